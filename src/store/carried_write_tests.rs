//! A live segment written with [`PairWrite::RatingsIngested`] and a process killed between
//! ingesting its rating table files and writing the batch that completes them: the next
//! open must finish that write from the batch the marker carries, so the store ends equal
//! to one that was never interrupted — and equal to one written in plain WriteBatches.
//! Killing a process at that instant is luck, so the state is made here directly.

use std::collections::BTreeMap;
use std::path::Path;

use crate::config::Config;
use crate::event::{Event, EventBody, UnixNanos};
use crate::pipeline::segment::OpenSegment;
use crate::signal::Signal;
use crate::store::{PairWrite, Store};

/// Batches of ratings, withdrawals and purchases by a dozen customers over twenty items,
/// one of them erasing a customer.
fn batches() -> Vec<Vec<Event>> {
    let mut batches = crate::test_random::shop_batches(23, 12, 30, 12, 20, true);
    let at = batches[7].last().expect("batches are not empty").at;
    batches[7].push(Event {
        at: UnixNanos(at.0 + 1),
        body: EventBody::EraseUser { user: "c3".into() },
    });
    batches
}

fn config() -> Config {
    let mut config = Config::default();
    config.similarity.max_items_per_user = 0;
    config.similarity.min_common_users = 1;
    config
}

/// Applies `batch` to a fresh segment of `store`; the write is left to the caller.
fn segment(store: &Store, batch: &[Event]) -> OpenSegment {
    let mut segment = OpenSegment::new(store);
    segment
        .apply(store, &config().engine_settings(), batch, &BTreeMap::new())
        .unwrap();
    segment
}

/// Writes every batch as its own segment, each with `pairs`.
fn write_all(dir: &Path, pairs: PairWrite) {
    let mut store = Store::open(dir, &config()).unwrap();
    for batch in batches() {
        segment(&store, &batch).seal().write(&mut store, pairs).unwrap();
    }
}

/// What a store holds, without the wall-clock times of its dirty marks.
#[derive(Debug, PartialEq)]
struct Contents {
    ledger: crate::store::Ledger,
    rating_rows: Vec<Vec<(u32, crate::model::RatingPairStats)>>,
    purchase_rows: Vec<Vec<(u32, i64)>>,
    users: Vec<(u32, String)>,
    dirty: Vec<(Signal, u32, crate::model::DirtyScope)>,
}

fn contents(dir: &Path) -> Contents {
    let store = Store::open_read_only(dir).unwrap();
    let items = 0..store.item_count() as u32;
    let users: Vec<u32> = (0..store.ledger().next_user).collect();
    let loaded = store.load_users(&users).unwrap();
    let mut users: Vec<(u32, String)> = loaded.iter().map(|(id, s)| (*id, format!("{s:?}"))).collect();
    users.sort();
    let mut dirty = Vec::new();
    for signal in Signal::ALL {
        for (item, mark) in store.dirty_marks(signal).unwrap() {
            dirty.push((signal, item, mark.scope));
        }
    }
    Contents {
        ledger: store.ledger().clone(),
        rating_rows: items.clone().map(|i| store.rating_row(i).unwrap()).collect(),
        purchase_rows: items.map(|i| store.purchase_row(i).unwrap()).collect(),
        users,
        dirty,
    }
}

#[test]
fn a_write_killed_after_its_table_files_is_finished_at_the_next_open() {
    let dir = tempfile::tempdir().unwrap();
    let whole = dir.path().join("whole");
    write_all(&whole, PairWrite::RatingsIngested);
    let in_batch = dir.path().join("in-batch");
    write_all(&in_batch, PairWrite::InBatch);
    let expected = contents(&whole);
    assert!(
        expected.rating_rows.iter().filter(|r| !r.is_empty()).count() > 5
            && expected.purchase_rows.iter().filter(|r| !r.is_empty()).count() > 5,
        "both signals hold pairs"
    );
    assert_eq!(
        contents(&in_batch),
        expected,
        "table files and WriteBatches store the same"
    );

    // Killed after the table files of the sixth segment: the five before it are whole.
    let killed = dir.path().join("killed");
    let all = batches();
    {
        let mut store = Store::open(&killed, &config()).unwrap();
        for batch in &all[..5] {
            segment(&store, batch)
                .seal()
                .write(&mut store, PairWrite::RatingsIngested)
                .unwrap();
        }
        segment(&store, &all[5])
            .seal()
            .ingest_ratings_only(&store)
            .unwrap();
    }
    {
        let reader = Store::open_read_only(&killed).unwrap();
        assert!(
            reader.uncommitted_segment_end().unwrap().is_some(),
            "the marker of the half-written segment is there"
        );
        assert!(reader.ledger().next_seq < reader.uncommitted_segment_end().unwrap().unwrap());
    }
    // The next open finishes it; the run goes on with the following batches.
    let mut store = Store::open(&killed, &config()).unwrap();
    assert_eq!(
        store.uncommitted_segment_end().unwrap(),
        None,
        "the marker is gone"
    );
    for batch in &all[6..] {
        segment(&store, batch)
            .seal()
            .write(&mut store, PairWrite::RatingsIngested)
            .unwrap();
    }
    drop(store);
    assert_eq!(
        contents(&killed),
        expected,
        "the interrupted store ends like the whole one"
    );
}

/// docs/design.md, "Personal data": the eighth segment erases customer c3. Killed after
/// its table files, its batch (carried by the marker) is written at the next open, and
/// the scrub that batch asks for (`scrub_pending`) is finished before the open returns.
#[test]
fn a_forgetting_write_killed_after_its_table_files_is_scrubbed_at_the_next_open() {
    let dir = tempfile::tempdir().unwrap();
    let all = batches();
    {
        let mut store = Store::open(dir.path(), &config()).unwrap();
        for batch in &all[..7] {
            segment(&store, batch)
                .seal()
                .write(&mut store, PairWrite::RatingsIngested)
                .unwrap();
        }
        assert!(
            store.user_ids(&["c3"]).unwrap()[0].is_some(),
            "c3 is stored before"
        );
        segment(&store, &all[7])
            .seal()
            .ingest_ratings_only(&store)
            .unwrap();
    }
    let store = Store::open(dir.path(), &config()).unwrap();
    assert_eq!(
        store.user_ids(&["c3"]).unwrap(),
        vec![None],
        "the carried batch forgot c3"
    );
    assert!(store.erasure_times(&["c3"]).unwrap()[0].is_some());
    let scrub_left = store
        .db
        .get_cf(store.cf(super::CF_META), super::erasure::META_SCRUB_PENDING)
        .unwrap();
    assert_eq!(scrub_left, None, "the scrub the batch asked for is finished");
}
