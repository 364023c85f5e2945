//! What the on-call engineer sees of a running service: `/metrics` (checked by Debian's
//! `promtool check metrics`), staleness and event-time lag moving as defined, list drift
//! with values computed by hand, the lookups, the token on state-changing endpoints, and
//! secrets kept out of every output. On librdkafka's mock cluster with `simtide run` as
//! a separate process.

use crate::common;

use std::io::Write;
use std::process::{Command, Stdio};
use std::time::{Duration, SystemTime, UNIX_EPOCH};

use common::live::{
    http_request, mock_with_topics, produce, rating, sample, unrating, wait_for, write_config, LiveSettings,
    Service, INPUT,
};

const CLIENT_SECRET: &str = "pw-ZX81-never-printed";
const ADMIN_TOKEN: &str = "tok-QL42-admin";

fn metrics_of(service: &Service) -> String {
    service.get("/metrics").expect("/metrics answers").1
}

fn publish_now(service: &Service) {
    let auth = format!("Bearer {ADMIN_TOKEN}");
    let (status, _) = http_request(
        service.port,
        "POST",
        "/v1/admin/publish",
        &[("Authorization", &auth)],
    )
    .unwrap();
    assert_eq!(status, 202);
}

fn cycles(service: &Service) -> f64 {
    sample(&metrics_of(service), "simtide_publish_cycles_total").unwrap()
}

#[test]
fn metrics_move_as_defined_and_secrets_stay_out() {
    let work = tempfile::tempdir().unwrap();
    let mock = mock_with_topics();
    let brokers = mock.bootstrap_servers();
    let store = work.path().join("store");
    let (config, port) = write_config(
        work.path(),
        &brokers,
        &store,
        &LiveSettings {
            publish_interval: "1h",
            ..LiveSettings::default()
        },
    );
    let text = std::fs::read_to_string(&config)
        .unwrap()
        .replace(
            "[kafka.client]\n",
            &format!("[kafka.client]\n\"sasl.password\" = \"{CLIENT_SECRET}\"\n"),
        )
        .replace("[http]\n", &format!("[http]\nadmin_token = \"{ADMIN_TOKEN}\"\n"));
    std::fs::write(&config, text).unwrap();
    let now = SystemTime::now().duration_since(UNIX_EPOCH).unwrap().as_secs();

    // Two users rate rake, hoe and spade alike and trowel apart: rake's list is
    // [hoe, spade] (adjusted cosine 1 each, ties by name), hoe's [rake, spade],
    // spade's [hoe, rake].
    let phase_one = [
        rating("ana", "rake", 5, now),
        rating("ana", "hoe", 5, now),
        rating("ana", "spade", 5, now),
        rating("ana", "trowel", 1, now),
        rating("ben", "rake", 4, now),
        rating("ben", "hoe", 4, now),
        rating("ben", "spade", 4, now),
        rating("ben", "trowel", 1, now),
    ];
    produce(&brokers, INPUT, &phase_one);
    let service = Service::start(&config, port, &[]);
    // Applied in memory: with an interval of 1 h nothing reaches the store (or the
    // group's offsets) before the publication asked for below.
    let applied = |kind: &str| {
        let series = format!(r#"simtide_events_total{{kind="{kind}",outcome="applied"}}"#);
        // The listener may not be up yet: no answer counts as nothing applied.
        service
            .get("/metrics")
            .and_then(|(_, m)| sample(&m, &series))
            .unwrap_or(0.0)
    };
    wait_for("phase one applied", Duration::from_secs(60), || {
        applied("rating") == 8.0
    });

    // Held back (interval 1 h): staleness grows with the age of the oldest change.
    let first = sample(&metrics_of(&service), "simtide_staleness_seconds").unwrap();
    std::thread::sleep(Duration::from_millis(1500));
    let second = sample(&metrics_of(&service), "simtide_staleness_seconds").unwrap();
    assert!(
        first > 0.0 && second >= first + 1.0,
        "staleness {first} then {second}"
    );

    // State-changing endpoints refuse a missing or wrong token.
    for headers in [vec![], vec![("Authorization", "Bearer not-the-token")]] {
        let (status, _) = http_request(port, "POST", "/v1/admin/publish", &headers).unwrap();
        assert_eq!(status, 401, "{headers:?}");
    }
    assert_eq!(cycles(&service), 0.0, "a refused request published nothing");
    // With the token: an unknown action, and a snapshot while store.snapshot_dir is
    // empty, are refused with a JSON reason.
    let bearer = format!("Bearer {ADMIN_TOKEN}");
    let auth = [("Authorization", bearer.as_str())];
    for (path, want) in [
        ("/v1/admin/reboot", (404, "no_such_action")),
        ("/v1/admin/snapshot", (409, "snapshots_off")),
    ] {
        let (status, body) = http_request(port, "POST", path, &auth).unwrap();
        let reason: serde_json::Value =
            serde_json::from_str(&body).unwrap_or_else(|_| panic!("{path}: {body}"));
        assert_eq!(
            (status, reason["error"].as_str().unwrap()),
            want,
            "{path}: {body}"
        );
    }
    publish_now(&service);
    wait_for("the first cycle", Duration::from_secs(30), || {
        cycles(&service) >= 1.0
    });
    let m = metrics_of(&service);
    let staleness = sample(&m, "simtide_staleness_seconds").unwrap();
    assert!(staleness < 0.5, "staleness after publication {staleness}");
    // Events are stamped with the current second, so the lag is about the time since.
    let lag = sample(&m, "simtide_event_time_lag_seconds").unwrap();
    assert!((0.0..30.0).contains(&lag), "event-time lag {lag}");
    assert_eq!(
        sample(&m, r#"simtide_events_total{kind="rating",outcome="applied"}"#),
        Some(8.0)
    );

    // Phase two: spade is withdrawn and shears take its place. By hand, per list:
    //   rake  [hoe, spade] → [hoe, shears]: 1 − 1/2 = 0.5; RBO_ext (p = 0.9, X1 = X2 = 1)
    //         = (1−p)/p·(p + p²/2) + p²/2 = 0.145 + 0.405 = 0.55
    //   hoe   [rake, spade] → [rake, shears]: 0.5 and 0.55 likewise
    //   spade [hoe, rake] → [] (tombstone): drift 1, RBO 0
    //   shears: a first list, no drift
    let phase_two = [
        unrating("ana", "spade", now + 1),
        unrating("ben", "spade", now + 1),
        rating("ana", "shears", 5, now + 1),
        rating("ben", "shears", 4, now + 1),
        // cleo has rated rake alone: no pair, so no list changes.
        rating("cleo", "rake", 5, now + 1),
    ];
    produce(&brokers, INPUT, &phase_two);
    wait_for("phase two applied", Duration::from_secs(60), || {
        applied("rating") == 11.0 && applied("unrating") == 2.0
    });
    publish_now(&service);
    wait_for("the second cycle", Duration::from_secs(30), || {
        cycles(&service) >= 2.0
    });
    let m = metrics_of(&service);
    let series = |name: &str| sample(&m, name).unwrap_or(f64::NAN);
    assert_eq!(
        series(r#"simtide_list_drift_ratio_count{signal="rating"}"#),
        3.0,
        "{m}"
    );
    assert!((series(r#"simtide_list_drift_ratio_sum{signal="rating"}"#) - 2.0).abs() < 1e-12);
    assert_eq!(
        series(r#"simtide_list_drift_ratio_bucket{signal="rating",le="0.5"}"#),
        2.0
    );
    assert!((series(r#"simtide_list_rank_biased_overlap_ratio_sum{signal="rating"}"#) - 1.1).abs() < 1e-9);
    assert_eq!(
        series(r#"simtide_tombstones_published_total{signal="rating"}"#),
        1.0
    );
    // The first cycle read rake, hoe, spade and trowel from the store and kept their
    // rows; the second scores those four whole to fill their candidates (shears is read
    // from the store): four refills, nothing yet from kept candidates.
    assert_eq!(
        series(r#"simtide_list_sources_total{source="refill"}"#),
        4.0,
        "{m}"
    );
    assert_eq!(series(r#"simtide_list_sources_total{source="candidates"}"#), 0.0);

    // promtool (Debian's prometheus package) finds nothing to complain about.
    let mut promtool = Command::new("promtool")
        .args(["check", "metrics"])
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("promtool is installed by scripts/setup.sh");
    promtool.stdin.take().unwrap().write_all(m.as_bytes()).unwrap();
    let checked = promtool.wait_with_output().unwrap();
    let complaints =
        String::from_utf8_lossy(&checked.stdout).into_owned() + &String::from_utf8_lossy(&checked.stderr);
    assert!(
        checked.status.success() && complaints.trim().is_empty(),
        "promtool: {complaints}"
    );

    // Lookups.
    let (status, body) = service.get("/v1/lists/rake").unwrap();
    assert_eq!(status, 200);
    let record: serde_json::Value = serde_json::from_str(&body).unwrap();
    assert_eq!(record["signal"], "rating");
    let names: Vec<&str> = record["neighbors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|n| n["item"].as_str().unwrap())
        .collect();
    assert_eq!(names, ["hoe", "shears"]);
    let (status, body) = service.get("/v1/pairs/rake/hoe").unwrap();
    assert!(
        status == 200 && body.contains("rake") && body.contains("hoe"),
        "{body}"
    );
    // Recommendations for cleo, who rated rake 5: the candidates are rake's neighbors hoe
    // and shears. Under the default ranking, similarity mass over normalised lists, each
    // scores its similarity to rake, the one item cleo has, over the sum of rake's list:
    // 1 / (1 + 1) = 0.5 each (ana and ben deviate alike on rake, hoe and shears), and the
    // tie goes by name.
    let (status, body) = service.get("/v1/users/cleo/recommendations").unwrap();
    assert_eq!(status, 200, "{body}");
    let answer: serde_json::Value = serde_json::from_str(&body).unwrap();
    assert_eq!(
        answer,
        serde_json::json!({"user": "cleo", "ranking": "similarity_mass", "items": [
            {"item": "hoe", "score": 0.5, "basis": "neighbors"},
            {"item": "shears", "score": 0.5, "basis": "neighbors"},
        ]})
    );
    let (_, body) = service.get("/v1/users/cleo/recommendations?count=1").unwrap();
    let answer: serde_json::Value = serde_json::from_str(&body).unwrap();
    assert_eq!(answer["items"].as_array().map(Vec::len), Some(1), "{body}");
    // ana has every item already: nothing to recommend, and that is an answer.
    let (status, body) = service.get("/v1/users/ana/recommendations").unwrap();
    assert_eq!(
        (status, body.as_str()),
        (200, r#"{"user":"ana","ranking":"similarity_mass","items":[]}"#)
    );
    // Errors are JSON with a stable code; an over-long id is refused without being echoed.
    let error_of = |path: &str| {
        let (status, body) = service.get(path).unwrap();
        let e: serde_json::Value = serde_json::from_str(&body).unwrap_or_else(|_| panic!("{path}: {body}"));
        (status, e["error"].as_str().unwrap_or("").to_string(), body)
    };
    assert_eq!(error_of("/v1/lists/no-such-item").0, 404);
    assert_eq!(error_of("/v1/lists/no-such-item").1, "not_found");
    let (status, code, _) = error_of("/v1/lists/rake?signal=purchase");
    assert_eq!(
        (status, code.as_str()),
        (404, "not_found"),
        "rake has no purchase list"
    );
    assert_eq!(error_of("/v1/lists/rake?signal=bogus").1, "bad_signal");
    let long = "x".repeat(5000);
    let (status, code, body) = error_of(&format!("/v1/lists/{long}"));
    assert_eq!((status, code.as_str()), (400, "bad_id"), "{body}");
    assert!(body.contains("256") && !body.contains(&long[..300]), "{body}");
    assert_eq!(error_of(&format!("/v1/pairs/rake/{long}")).1, "bad_id");
    assert_eq!(error_of("/v1/no-such-route").1, "no_such_route");
    assert_eq!(
        error_of("/v1/users/nobody/recommendations").0,
        404,
        "a user the store never saw"
    );
    assert_eq!(error_of("/v1/users/nobody/recommendations").1, "unknown_user");
    for count in ["0", "1001", "many"] {
        let (status, code, body) = error_of(&format!("/v1/users/cleo/recommendations?count={count}"));
        assert_eq!((status, code.as_str()), (400, "bad_count"), "{body}");
    }
    assert_eq!(error_of(&format!("/v1/users/{long}/recommendations")).1, "bad_id");

    // The one-screen status against the running service (not a terminal: no colour).
    let status = Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args([
            "status",
            "--window",
            "1s",
            "--url",
            &format!("http://127.0.0.1:{port}"),
        ])
        .output()
        .unwrap();
    let screen = String::from_utf8_lossy(&status.stdout);
    assert!(
        status.status.success(),
        "{screen}{}",
        String::from_utf8_lossy(&status.stderr)
    );
    for part in [
        ": READY",
        "staleness",
        "lag ",
        "events/s applied",
        "dead letters 0 in the last 1 s",
        "drift        rating: 0.667",
    ] {
        assert!(screen.contains(part), "{part:?} missing from:\n{screen}");
    }
    assert!(!screen.contains('\x1b'), "no colour outside a terminal");

    // Secrets: not in /metrics, the log, check-config, nor a failing command's error.
    let log_path = service.log.clone();
    let (status, _) = service.terminate(Duration::from_secs(30));
    assert!(status.success());
    let check = Command::new(env!("CARGO_BIN_EXE_simtide"))
        .arg("check-config")
        .arg(&config)
        .output()
        .unwrap();
    let refused = Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(["run", "--config"])
        .arg(&config)
        .args(["--start-offsets", "0:0"])
        .output()
        .unwrap();
    assert!(!refused.status.success());
    let outputs = [
        m,
        std::fs::read_to_string(log_path).unwrap(),
        String::from_utf8_lossy(&check.stdout).into_owned(),
        String::from_utf8_lossy(&check.stderr).into_owned(),
        String::from_utf8_lossy(&refused.stderr).into_owned(),
    ];
    for (i, text) in outputs.iter().enumerate() {
        for secret in [CLIENT_SECRET, ADMIN_TOKEN] {
            assert!(!text.contains(secret), "output {i} shows a secret:\n{text}");
        }
    }
    assert!(outputs[2].contains("admin_token = \"****\""), "{}", outputs[2]);
}

#[test]
fn backfill_serves_the_same_metrics_when_asked() {
    let work = tempfile::tempdir().unwrap();
    let port = common::broker::free_port();
    let mut child = Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(["backfill", "--quiet", "--batch-events", "2000", "--store"])
        .arg(work.path().join("store"))
        .arg("--input")
        .arg(common::movielens_csv())
        .args(["--metrics-listen", &format!("127.0.0.1:{port}")])
        .stdout(Stdio::null())
        .spawn()
        .unwrap();
    let mut seen = 0.0;
    while child.try_wait().unwrap().is_none() {
        if let Some((200, body)) = common::live::http_get(port, "/metrics") {
            seen = sample(&body, "simtide_batches_total").unwrap_or(0.0).max(seen);
            let applied =
                sample(&body, r#"simtide_events_total{kind="rating",outcome="applied"}"#).unwrap_or(0.0);
            assert!(applied <= common::MOVIELENS_RATINGS as f64);
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    assert!(child.wait().unwrap().success());
    assert!(
        seen >= 1.0,
        "batches were counted on /metrics while the backfill ran"
    );
}
