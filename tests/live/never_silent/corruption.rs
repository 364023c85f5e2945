//! A malformed merge operand fails reads as corruption, named on `/readyz`.

use super::*;

/// Writes `operand` as a merge operand of `key` in the store's `family`, as a foreign
/// writer or a damaged disk could leave it (RocksDB opened directly, simtide closed).
fn write_raw_operand(store: &Path, family: &str, key: &[u8], operand: &[u8]) {
    let path = store.join("db");
    let names = rocksdb::DB::list_cf(&rocksdb::Options::default(), &path).unwrap();
    let descriptors = names.iter().map(|name| {
        let mut options = rocksdb::Options::default();
        options
            .set_merge_operator_associative("test_raw_writer", |_, existing, _| existing.map(<[u8]>::to_vec));
        rocksdb::ColumnFamilyDescriptor::new(name, options)
    });
    let db = rocksdb::DB::open_cf_descriptors(&rocksdb::Options::default(), &path, descriptors).unwrap();
    db.merge_cf(db.cf_handle(family).unwrap(), key, operand).unwrap();
    db.flush_cf(db.cf_handle(family).unwrap()).unwrap();
}

#[test]
fn a_malformed_merge_operand_fails_reads_as_corruption_named_on_readyz() {
    let work = tempfile::tempdir().unwrap();
    let mock = common::live::mock_with_topics();
    let brokers = mock.bootstrap_servers();
    let rate = common::live::rating;
    produce(
        &brokers,
        INPUT,
        &[
            // ana and ben each rate rake and hoe alike and well above their own mean, so
            // the pair scores 1; trowel shares only ben.
            rate("ana", "rake", 5, 100),
            rate("ana", "hoe", 5, 101),
            rate("ana", "spade", 1, 102),
            rate("ben", "rake", 4, 103),
            rate("ben", "hoe", 4, 104),
            rate("ben", "trowel", 1, 105),
        ],
    );
    let store = work.path().join("store");
    let (config, port) = write_config(work.path(), &brokers, &store, &LiveSettings::default());
    // Two co-raters at least: rake and hoe have two, rake and trowel only ben.
    let service = Service::start_with_env(
        &config,
        port,
        &[],
        &[("SIMTIDE_SIMILARITY__MIN_COMMON_USERS", "2")],
    );
    wait_for("rake's list", SOON, || {
        service.get("/v1/lists/rake").is_some_and(|(s, _)| s == 200)
    });
    let (status, body) = service.get("/v1/pairs/rake/hoe").unwrap();
    assert_eq!(status, 200, "{body}");
    let (status, body) = service.get("/v1/pairs/rake/trowel").unwrap();
    assert_eq!(status, 404, "{body}");
    assert!(
        body.contains(r#""error":"below_support""#) && body.contains("1 co-rater") && !body.contains("dot"),
        "one co-rater's deviations stay hidden: {body}"
    );
    let (status, _) = service.terminate(SOON);
    assert!(status.success());
    let key = {
        let s = Store::open_as_stored(&store).unwrap();
        simtide::store::row_blocks::block_key(s.item_id("rake").unwrap(), s.item_id("hoe").unwrap())
    };
    write_raw_operand(&store, "pairs", &key, b"\xff");
    let hex: String = key.iter().map(|b| format!("{b:02x}")).collect();

    let service = Service::start(&config, port, &[]);
    wait_for("the pair lookup to fail", SOON, || {
        service.get("/v1/pairs/rake/hoe").is_some_and(|(s, _)| s >= 500)
    });
    let (status, body) = service.get("/readyz").unwrap();
    assert_eq!(status, 503, "{body}");
    assert!(
        body.contains("corruption") && body.contains(&format!("column family pairs, key {hex}")),
        "{body}"
    );
    assert!(service.log_text().contains(&hex), "the error log names the key");
    drop(service);

    let out = Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(["explain", "--store"])
        .arg(&store)
        .args(["rake", "hoe"])
        .output()
        .unwrap();
    assert!(
        !out.status.success(),
        "a read over the operand fails, never a wrong sum"
    );
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("Corruption") || stderr.contains("corruption"),
        "{stderr}"
    );
}
