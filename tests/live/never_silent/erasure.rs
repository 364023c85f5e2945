//! An erased user leaves no trace in any column family, table file or log of the store.

use super::*;

/// Whether any file under `dir` (recursively) holds `needle`, skipping files whose name
/// starts with a prefix in `skip`; returns the files that do.
fn files_holding(dir: &Path, needle: &[u8], skip: &[&str]) -> Vec<PathBuf> {
    let mut found = Vec::new();
    for entry in std::fs::read_dir(dir).unwrap() {
        let path = entry.unwrap().path();
        let name = path.file_name().unwrap().to_string_lossy().to_string();
        if skip.iter().any(|s| name.starts_with(s)) {
            continue;
        }
        if path.is_dir() {
            found.extend(files_holding(&path, needle, skip));
        } else if std::fs::read(&path)
            .unwrap()
            .windows(needle.len())
            .any(|w| w == needle)
        {
            found.push(path);
        }
    }
    found
}

/// The closed store at `dir` opened directly, read only, every merge operand kept: a
/// family's merge concatenates the value and its operands, so a scan sees every byte.
fn open_raw(dir: &Path) -> (rocksdb::DB, Vec<String>) {
    use rocksdb::{MergeOperands, Options, DB};
    fn concatenate(_: &[u8], existing: Option<&[u8]>, operands: &MergeOperands) -> Option<Vec<u8>> {
        Some(existing.into_iter().chain(operands).flatten().copied().collect())
    }
    let path = dir.join("db");
    let families = DB::list_cf(&Options::default(), &path).unwrap();
    let descriptors = families.iter().map(|name| {
        let mut options = Options::default();
        options.set_merge_operator_associative("concatenate", concatenate);
        rocksdb::ColumnFamilyDescriptor::new(name, options)
    });
    let db = DB::open_cf_descriptors_read_only(&Options::default(), &path, descriptors, false).unwrap();
    (db, families)
}

/// Every key and value (merge operands included) of every column family of the closed
/// store at `dir` that holds `needle`, as "family: key".
fn entries_holding(dir: &Path, needle: &[u8]) -> Vec<String> {
    use rocksdb::IteratorMode;
    let (db, families) = open_raw(dir);
    let mut found = Vec::new();
    for family in &families {
        let cf = db.cf_handle(family).unwrap();
        for entry in db.iterator_cf(cf, IteratorMode::Start) {
            let (key, value) = entry.unwrap();
            if [&key[..], &value[..]]
                .iter()
                .any(|b| b.windows(needle.len()).any(|w| w == needle))
            {
                found.push(format!("{family}: {}", String::from_utf8_lossy(&key)));
            }
        }
    }
    found
}

/// docs/design.md, "Personal data": a user rated, snapshotted (so the user is in table
/// files, not only in memory) and erased leaves no trace in any column family, table file
/// or log of the live store: the search is first shown to find the name in the snapshot.
/// A later replay of one of the user's old ratings is stale and writes nothing of the user;
/// only the keyed tombstone says when the name was erased.
#[test]
fn an_erased_user_leaves_no_trace_in_the_store_files() {
    const NAME: &str = "hollis-greenwood-4471";
    const ERASED_AT: i64 = 1_767_400_000;
    let broker = broker_with_one_partition(true);
    let brokers = broker.bootstrap();
    let work = tempfile::tempdir().unwrap();
    let store = work.path().join("store");
    let snapshots = work.path().join("snapshots");
    let (config, port) = write_config(work.path(), &brokers, &store, &LiveSettings::default());
    let mut events = ratings("u", 60);
    for (i, item) in ["rake", "hoe", "trowel", "twine"].iter().enumerate() {
        events.push(common::live::rating(
            NAME,
            item,
            2 + i as u8,
            1_767_300_000 + i as u64,
        ));
    }
    produce(&brokers, INPUT, &events);
    let env = [
        ("SIMTIDE_HTTP__ADMIN_TOKEN", "erase-test-token"),
        ("SIMTIDE_STORE__SNAPSHOT_DIR", snapshots.to_str().unwrap()),
    ];
    let service = Service::start_with_env(&config, port, &[], &env);
    wait_for("the ratings written", SOON, || {
        common::live::caught_up(&brokers, 1)
    });
    let dense_id = Store::open_read_only(&store).unwrap().user_ids(&[NAME]).unwrap()[0]
        .expect("the user has an id before the erasure");
    let auth = [("Authorization", "Bearer erase-test-token")];
    let (status, body) = common::live::http_request(port, "POST", "/v1/admin/snapshot", &auth).unwrap();
    assert_eq!(status, 201, "{body}");

    let erase = format!(r#"{{"kind":"erase_user","user":"{NAME}","at":{ERASED_AT}}}"#);
    produce(&brokers, INPUT, &[(NAME.to_string(), erase, None)]);
    wait_for("the erasure written", SOON, || {
        common::live::caught_up(&brokers, 1)
    });
    let (status, body) = service.get(&format!("/v1/users/{NAME}/recommendations")).unwrap();
    assert_eq!(status, 404, "{body}");
    // A replay of an old rating: stale, behind the tombstone.
    produce(
        &brokers,
        INPUT,
        &[common::live::rating(NAME, "shears", 5, 1_767_300_100)],
    );
    wait_for("the replayed rating counted", SOON, || {
        sample(
            &scrape(&service),
            r#"simtide_events_total{kind="rating",outcome="stale"}"#,
        ) == Some(1.0)
    });
    wait_for("the replay written", SOON, || {
        common::live::caught_up(&brokers, 1)
    });
    let (status, report) = service.terminate(SOON);
    assert!(status.success(), "{report}");

    let name = NAME.as_bytes();
    assert!(
        !files_holding(&snapshots, name, &[]).is_empty(),
        "the search finds the name where it is (the snapshot taken before the erasure)"
    );
    assert_eq!(entries_holding(&store, name), Vec::<String>::new());
    assert_eq!(
        files_holding(&store, name, &["MANIFEST-"]),
        Vec::<PathBuf>::new(),
        "no table file, write-ahead log, log or rejects file holds the name"
    );
    {
        use rocksdb::IteratorMode;
        let (db, _) = open_raw(&store);
        let users = db.cf_handle("users").unwrap();
        assert_eq!(
            db.get_cf(users, dense_id.to_be_bytes()).unwrap(),
            None,
            "no history under the dense id"
        );
        let ids = db.cf_handle("ids").unwrap();
        let holding_id: Vec<_> = db
            .iterator_cf(ids, IteratorMode::Start)
            .map(|e| e.unwrap())
            .filter(|(k, v)| k[0] == b'u' && v[..] == dense_id.to_be_bytes())
            .collect();
        assert!(holding_id.is_empty(), "no user name maps to the dense id");
    }
    // The MANIFEST may name a deleted boundary key until it is rewritten, which the next
    // open does.
    drop(Store::open_as_stored(&store).unwrap());
    assert_eq!(files_holding(&store, name, &[]), Vec::<PathBuf>::new());
    let after = Store::open_read_only(&store).unwrap();
    assert_eq!(after.user_ids(&[NAME]).unwrap(), vec![None]);
    assert_eq!(
        after.erasure_times(&[NAME]).unwrap(),
        vec![Some(simtide::event::UnixNanos(ERASED_AT * 1_000_000_000))],
        "the tombstone keeps the erasure time"
    );
    assert_eq!(after.erasure_times(&["u0"]).unwrap(), vec![None]);
}
