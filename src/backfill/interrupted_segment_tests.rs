//! A run killed after ingesting a segment's table files and before committing the rest:
//! the rerun must skip the ingested families, commit the rest, and end where an
//! uninterrupted run ends: the same sums, lists, ids and positions. Killing a process at that instant is a matter of luck (the
//! crash tests in tests/store/crash_resume.rs may or may not hit it), so the state is made here
//! directly.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use super::row_pass::sum_write_and_score;
use super::writer::BatchWriter;
use super::{backfill_files, BackfillRequest};
use crate::backfill::source::{Decoded, InputFile, RecordReader};
use crate::config::Config;
use crate::observability::meter::{Display, Meter, Unit};
use crate::pipeline::segment::OpenSegment;
use crate::store::{PairWrite, Store};

/// A deterministic little shop: 40 customers rating and buying from 25 items.
fn write_events(path: &Path, first_user: u32, users: u32) {
    let mut text = String::from("user,item,value,at\n");
    let mut random = crate::test_random::TestRandom::seeded(u64::from(first_user) * 7919 + 1);
    let mut next = move |n: u64| random.below(n);
    for u in first_user..first_user + users {
        for k in 0..(3 + next(10)) {
            let item = next(25);
            let time = 1_000 + u64::from(u) * 100 + k;
            if next(4) == 0 {
                text.push_str(&format!("u{u},i{item},,{time}\n"));
            } else {
                text.push_str(&format!("u{u},i{item},{},{time}\n", 1 + next(5)));
            }
        }
    }
    std::fs::write(path, text).unwrap();
}

fn request(store: &Path, inputs: &[PathBuf], batch_events: u64) -> BackfillRequest {
    let mut config = Config::default();
    config.similarity.recenter_tolerance = 0.0;
    config.similarity.max_items_per_user = 0;
    config.similarity.min_common_users = 1;
    config.backfill.batch_events = batch_events;
    BackfillRequest {
        store_dir: store.to_path_buf(),
        inputs: inputs.to_vec(),
        config,
        show_progress: false,
        metrics: None,
    }
}

/// The store's lists without the fields that depend on when and how often they were
/// published (the interrupted store published once more, after its first file).
fn export(store: &Path) -> String {
    let store = Store::open_read_only(store).unwrap();
    let mut out = Vec::new();
    crate::views::export::export_lists(&store, &mut out, false).unwrap();
    String::from_utf8(out)
        .unwrap()
        .lines()
        .map(|l| {
            let mut v: serde_json::Value = serde_json::from_str(l).unwrap();
            let fields = v.as_object_mut().unwrap();
            fields.remove("computed_at");
            fields.remove("version");
            v.to_string()
        })
        .collect::<Vec<_>>()
        .join("\n")
}

#[test]
fn a_segment_ingested_but_not_committed_is_finished_once() {
    let dir = tempfile::tempdir().unwrap();
    let first = dir.path().join("first.csv");
    let second = dir.path().join("second.csv");
    write_events(&first, 0, 20);
    write_events(&second, 10, 30);
    let inputs = vec![first.clone(), second.clone()];
    const BATCH: u64 = 100;

    let clean = dir.path().join("clean");
    backfill_files(&request(&clean, &inputs, BATCH)).unwrap();

    // The interrupted store: the first file committed, then a segment of the second
    // file's first batch applied and its table files ingested, and the process gone.
    let crashed = dir.path().join("crashed");
    backfill_files(&request(&crashed, &inputs[..1], BATCH)).unwrap();
    let req = request(&crashed, &inputs, BATCH);
    {
        let store = Store::open(&crashed, &req.config).unwrap();
        let mut reader =
            RecordReader::open(&InputFile::describe(&second).unwrap(), req.config.limits()).unwrap();
        let mut events = Vec::new();
        while reader.ordinal() < BATCH {
            match reader
                .next_record()
                .unwrap()
                .expect("the file has a full batch")
                .decoded
            {
                Decoded::Event(e) => events.push(e),
                other => panic!("the test's events are valid: {other:?}"),
            }
        }
        let mut segment = OpenSegment::new(&store);
        segment.stage(&store, &events, &BTreeMap::new()).unwrap();
        let (sealed, index, _) = segment.seal_staged(&store, &req.config.engine_settings());
        let hidden = Meter::new("rows", 0, Unit::Items, Display::Hidden);
        sum_write_and_score(&store, &index, sealed.end(), None, hidden).unwrap();
        store
            .ingest_purchase_pairs(sealed.effects(), sealed.end())
            .unwrap();
        assert!(store.uncommitted_segment_end().unwrap().is_some());
    }

    // A topic replay cannot cut the same batches, so it refuses to start on that store.
    let err = BatchWriter::open(&req, PairWrite::InBatch)
        .err()
        .expect("refused");
    assert!(
        format!("{err:#}").contains("unfinished segment of a file backfill"),
        "{err:#}"
    );
    // Batches that end elsewhere (at 98 and 105 records) cannot finish that segment.
    let err = backfill_files(&request(&crashed, &inputs, 7)).unwrap_err();
    assert!(
        format!("{err:#}").contains("rerun with the same inputs and backfill.batch_events"),
        "{err:#}"
    );
    // The same batches finish it: the sums are not added twice.
    backfill_files(&req).unwrap();
    let store = Store::open_read_only(&crashed).unwrap();
    assert_eq!(
        store.uncommitted_segment_end().unwrap(),
        None,
        "markers are removed"
    );
    // The work counters follow the segments (the interrupted run cut one more, and a
    // user's pairs shift once per segment); everything else is the same.
    let work_aside = |ledger: &crate::store::Ledger| crate::store::Ledger {
        recenterings: 0,
        pair_updates: 0,
        ..ledger.clone()
    };
    let clean_ledger = Store::open_read_only(&clean).unwrap().ledger().clone();
    assert!(clean_ledger.pair_updates > 0 && clean_ledger.recenterings > 0);
    assert_eq!(work_aside(store.ledger()), work_aside(&clean_ledger));
    drop(store);
    let (a, b) = (export(&clean), export(&crashed));
    assert!(a.lines().count() > 10, "{a}");
    assert!(
        a.contains("\"purchase\"") && a.contains("\"rating\""),
        "both signals are published"
    );
    for (x, y) in a.lines().zip(b.lines()) {
        assert_eq!(x, y, "a list differs after finishing the interrupted segment");
    }
    assert_eq!(a.lines().count(), b.lines().count());
}
