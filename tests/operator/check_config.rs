//! `simtide check-config`: the effective configuration, secrets masked, and error messages
//! that never quote a secret.

use std::process::Command;

fn simtide(args: &[&str], env: &[(&str, &str)]) -> (bool, String, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(args)
        .envs(env.iter().copied())
        .output()
        .unwrap();
    (
        out.status.success(),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

#[test]
fn effective_configuration_is_printed_with_secrets_masked() {
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("simtide.toml");
    std::fs::write(
        &file,
        r#"
[kafka]
brokers = "kafka-1:9093"
[kafka.client]
"security.protocol" = "SASL_SSL"
"sasl.username" = "fernwick.simtide"
"sasl.password" = "file-secret-7731"
"#,
    )
    .unwrap();
    let (ok, out, err) = simtide(
        &["check-config", file.to_str().unwrap()],
        &[
            ("SIMTIDE_KAFKA__CLIENT__SSL_KEY_PASSWORD", "env-secret-5519"),
            ("SIMTIDE_PUBLISH__INTERVAL", "2s"),
        ],
    );
    assert!(ok, "{err}");
    for secret in ["file-secret-7731", "env-secret-5519"] {
        assert!(
            !out.contains(secret) && !err.contains(secret),
            "secret {secret} printed:\n{out}{err}"
        );
    }
    assert!(out.contains(r#""sasl.password" = "****""#), "{out}");
    assert!(out.contains(r#""ssl.key.password" = "****""#), "{out}");
    assert!(out.contains(r#""sasl.username" = "fernwick.simtide""#), "{out}");
    assert!(
        out.contains(r#"interval = "2s""#),
        "environment override shown: {out}"
    );
    assert!(out.contains(r#"brokers = "kafka-1:9093""#), "{out}");
    // The printed configuration is itself a valid configuration.
    let printed = dir.path().join("printed.toml");
    std::fs::write(&printed, &out).unwrap();
    let (ok, _, err) = simtide(&["check-config", printed.to_str().unwrap()], &[]);
    assert!(ok, "{err}");
}

#[test]
fn an_error_about_a_secret_value_does_not_quote_it() {
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("bad.toml");
    // librdkafka properties are strings; a number is refused, and the refusal would
    // quote the value.
    std::fs::write(&file, "[kafka.client]\n\"sasl.password\" = 90817263\n").unwrap();
    let (ok, out, err) = simtide(&["check-config", file.to_str().unwrap()], &[]);
    assert!(!ok);
    assert!(err.contains("kafka"), "the error names the section: {err}");
    assert!(!err.contains("90817263") && !out.contains("90817263"), "{err}");
}

#[test]
fn bad_values_are_refused_by_key() {
    let dir = tempfile::tempdir().unwrap();
    for (text, key) in [
        ("[publish]\ninterval = \"5\"\n", "unknown duration unit"),
        ("[kafka]\ngroup = \"\"\n", "kafka.group"),
        ("[http]\nlisten = \"everywhere\"\n", "http.listen"),
        ("[live]\nbatch_events = 0\n", "live.batch_events"),
        (
            "[live]\nmemory_budget = \"512KiB\"\n",
            "live.memory_budget must be at least 1MiB",
        ),
        ("[backfill]\nmemory_budget = \"0B\"\n", "backfill.memory_budget"),
        (
            "[cluster]\nshards = 3\nshard = 3\n",
            "cluster.shard is 3, but cluster.shards is 3",
        ),
        ("[cluster]\nshards = 0\n", "cluster.shards must be at least 1"),
        (
            "[cluster]\nlease_timeout = \"500ms\"\n",
            "cluster.lease_timeout must be at least 1s",
        ),
    ] {
        let file = dir.path().join("c.toml");
        std::fs::write(&file, text).unwrap();
        let (ok, _, err) = simtide(&["check-config", file.to_str().unwrap()], &[]);
        assert!(!ok && err.contains(key), "{text:?} → {err}");
    }
}

#[test]
fn logs_are_json_lines_when_configured() {
    let dir = tempfile::tempdir().unwrap();
    let port = std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port();
    let file = dir.path().join("json-logs.toml");
    std::fs::write(
        &file,
        format!(
            "[log]\nformat = \"json\"\n[store]\ndir = \"{}\"\n[kafka]\nbrokers = \"127.0.0.1:1\"\n[http]\nlisten = \"127.0.0.1:{port}\"\n",
            dir.path().join("store").display()
        ),
    )
    .unwrap();
    // A start position cannot be resolved without a broker: the run logs, then fails.
    let (ok, _, err) = simtide(
        &[
            "run",
            "--config",
            file.to_str().unwrap(),
            "--start-offsets",
            "0:0",
        ],
        &[
            ("SIMTIDE_LOG", "info"),
            ("SIMTIDE_KAFKA__CLIENT__SOCKET_TIMEOUT_MS", "2000"),
        ],
    );
    assert!(!ok);
    let logged: Vec<serde_json::Value> = err
        .lines()
        .filter(|l| l.starts_with('{'))
        .map(|l| serde_json::from_str(l).unwrap_or_else(|e| panic!("not JSON ({e}): {l}")))
        .collect();
    assert!(
        logged.iter().any(|v| v["fields"]["message"]
            .as_str()
            .is_some_and(|m| m.contains("HTTP listener up"))),
        "{err}"
    );
}

/// Command-line flags and directories: each refusal names the flag or the directory and
/// the reason, and writes nothing.
#[test]
fn bad_flags_and_directories_are_refused_by_name() {
    let dir = tempfile::tempdir().unwrap();
    let config = dir.path().join("c.toml");
    std::fs::write(&config, "").unwrap();
    let config = config.to_str().unwrap();
    let empty = dir.path().join("empty");
    std::fs::create_dir(&empty).unwrap();
    let empty = empty.to_str().unwrap();
    let missing_input = dir.path().join("no-such-file.jsonl");
    let store = dir.path().join("store");
    for (args, said) in [
        (
            vec!["run", "--config", config, "--stop-at-offsets", "0:x"],
            "--stop-at-offsets: offset \"x\" is not a number",
        ),
        (
            vec!["run", "--config", config, "--start-offsets", "7"],
            "--start-offsets: \"7\" is not PARTITION:OFFSET",
        ),
        (
            vec![
                "run",
                "--config",
                config,
                "--stop-at-end",
                "--stop-at-offsets",
                "0:1",
            ],
            "cannot be used with",
        ),
        (
            vec!["run", "--config", config, "--bogus"],
            "unexpected argument '--bogus'",
        ),
        (vec!["export", "--store", empty], "is not a simtide store"),
        (
            vec!["neighbors", "--store", empty, "m1"],
            "is not a simtide store",
        ),
        (vec!["snapshot", "--verify", empty], "is not a readable snapshot"),
        (
            vec![
                "backfill",
                "--store",
                store.to_str().unwrap(),
                "--input",
                missing_input.to_str().unwrap(),
            ],
            "no-such-file.jsonl",
        ),
    ] {
        let (ok, _, err) = simtide(&args, &[]);
        assert!(!ok && err.contains(said), "{args:?} → {err}");
    }
    assert!(
        std::fs::read_dir(empty).unwrap().next().is_none(),
        "nothing written into a directory that is not a store"
    );
}
