//! The dashboard and the alert rules against a real Prometheus (Debian's `prometheus`
//! package, started here on a free 127.0.0.1 port with a generated configuration) that
//! scrapes a running `simtide run` during a stream on librdkafka's mock cluster: every
//! PromQL expression of dashboards/simtide-overview.json and the signal of every alert in
//! dashboards/alerts.yml returns at least one series. promtool checks the rule file and
//! runs its unit tests (dashboards/alerts.test.yml: each alert fires on a synthetic broken
//! series and stays quiet on a healthy one).

use crate::common;

use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::time::{Duration, SystemTime, UNIX_EPOCH};

use common::broker::free_port;
use common::live::{
    caught_up, http_get, mock_with_topics, produce, rating, wait_for, write_config, LiveSettings, Service,
    INPUT,
};

fn dashboards() -> &'static Path {
    Path::new(concat!(env!("CARGO_MANIFEST_DIR"), "/dashboards"))
}

fn promtool(args: &[&str]) -> (bool, String) {
    let out = Command::new("promtool")
        .args(args)
        .current_dir(dashboards())
        .output()
        .expect("promtool is installed by scripts/setup.sh");
    let text = String::from_utf8_lossy(&out.stdout).into_owned() + &String::from_utf8_lossy(&out.stderr);
    (out.status.success(), text)
}

#[test]
fn rule_file_is_valid_and_each_alert_fires_only_when_it_should() {
    let (ok, out) = promtool(&["check", "rules", "alerts.yml"]);
    assert!(ok && out.contains("SUCCESS: 14 rules found"), "{out}");
    let (ok, out) = promtool(&["test", "rules", "alerts.test.yml"]);
    assert!(ok && out.contains("SUCCESS"), "{out}");
    // Every alert has its runbook entry, and its annotation points at it.
    let rules = std::fs::read_to_string(dashboards().join("alerts.yml")).unwrap();
    let runbook = std::fs::read_to_string(dashboards().join("RUNBOOK.md")).unwrap();
    for (name, _) in alert_signals() {
        assert!(
            runbook.contains(&format!("\n## {name}\n")),
            "no runbook entry for {name}"
        );
        let anchor = format!("RUNBOOK.md#{}", name.to_lowercase());
        assert!(
            rules.contains(&anchor),
            "{name}'s runbook annotation should be {anchor}"
        );
    }
}

/// Percent-encodes a query for a URL.
fn encode(text: &str) -> String {
    text.bytes()
        .map(|b| match b {
            b'A'..=b'Z' | b'a'..=b'z' | b'0'..=b'9' | b'-' | b'_' | b'.' | b'~' => (b as char).to_string(),
            _ => format!("%{b:02X}"),
        })
        .collect()
}

/// The dashboard's expressions.
fn dashboard_expressions() -> Vec<String> {
    let text = std::fs::read_to_string(dashboards().join("simtide-overview.json")).unwrap();
    let dashboard: serde_json::Value = serde_json::from_str(&text).unwrap();
    let mut out = Vec::new();
    for panel in dashboard["panels"].as_array().unwrap() {
        for target in panel["targets"].as_array().into_iter().flatten() {
            out.push(target["expr"].as_str().unwrap().to_string());
        }
    }
    out
}

/// Each alert's signal: its expression without the one top-level comparison.
fn alert_signals() -> Vec<(String, String)> {
    let text = std::fs::read_to_string(dashboards().join("alerts.yml")).unwrap();
    let mut out = Vec::new();
    let mut name = String::new();
    for line in text.lines().map(str::trim) {
        if let Some(n) = line.strip_prefix("- alert: ") {
            name = n.to_string();
        } else if let Some(expr) = line.strip_prefix("expr: ") {
            let cut = [" > ", " < ", " == "]
                .iter()
                .filter_map(|op| expr.rfind(op))
                .max()
                .unwrap_or_else(|| panic!("{name}: no comparison in {expr}"));
            out.push((name.clone(), expr[..cut].to_string()));
        }
    }
    out
}

struct Prometheus {
    child: Child,
    port: u16,
}

impl Drop for Prometheus {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

fn start_prometheus(dir: &Path, target_port: u16) -> Prometheus {
    let port = free_port();
    let config = dir.join("prometheus.yml");
    std::fs::write(
        &config,
        format!(
            "global:\n  scrape_interval: 1s\n  evaluation_interval: 1s\nscrape_configs:\n  - job_name: simtide\n    static_configs:\n      - targets: ['127.0.0.1:{target_port}']\n"
        ),
    )
    .unwrap();
    let child = Command::new("prometheus")
        .arg(format!("--config.file={}", config.display()))
        .arg(format!("--storage.tsdb.path={}", dir.join("tsdb").display()))
        .arg(format!("--web.listen-address=127.0.0.1:{port}"))
        .stdout(Stdio::null())
        .stderr(std::fs::File::create(dir.join("prometheus.log")).unwrap())
        .spawn()
        .expect("prometheus is installed by scripts/setup.sh");
    Prometheus { child, port }
}

fn query(prom: &Prometheus, expr: &str) -> serde_json::Value {
    let (status, body) = http_get(prom.port, &format!("/api/v1/query?query={}", encode(expr)))
        .unwrap_or_else(|| panic!("Prometheus did not answer for {expr}"));
    assert_eq!(status, 200, "{expr}: {body}");
    serde_json::from_str(&body).unwrap()
}

#[test]
fn every_dashboard_and_alert_expression_returns_series_from_a_running_service() {
    let work = tempfile::tempdir().unwrap();
    let mock = mock_with_topics();
    let brokers = mock.bootstrap_servers();
    let (config, port) = write_config(
        work.path(),
        &brokers,
        &work.path().join("store"),
        &LiveSettings::default(),
    );
    let service = Service::start(&config, port, &[]);
    let prom = start_prometheus(work.path(), port);
    wait_for("Prometheus to scrape simtide", Duration::from_secs(60), || {
        http_get(prom.port, "/api/v1/query?query=simtide_build_info")
            .is_some_and(|(s, b)| s == 200 && b.contains("simtide_build_info"))
    });

    // A small stream with a change of lists and a refused event, over a few cycles.
    let now = SystemTime::now().duration_since(UNIX_EPOCH).unwrap().as_secs();
    let users = ["ana", "ben", "cai", "dee"];
    for round in 0..3u64 {
        let mut records = Vec::new();
        for (i, u) in users.iter().enumerate() {
            for (j, item) in ["rake", "hoe", "spade", "trowel", "shears"].iter().enumerate() {
                let value = 1 + ((i + j + round as usize) % 5) as u8;
                records.push(rating(u, item, value, now + round));
            }
        }
        records.push(("ana".into(), "{not json".into(), None));
        produce(&brokers, INPUT, &records);
        std::thread::sleep(Duration::from_millis(1500));
    }
    wait_for("the stream to be consumed", Duration::from_secs(60), || {
        caught_up(&brokers, 3)
    });
    // Enough scrapes for rates and derivatives over raw samples.
    std::thread::sleep(Duration::from_secs(4));

    let mut empty = Vec::new();
    let mut checked = 0;
    let expressions: Vec<(String, String)> = dashboard_expressions()
        .into_iter()
        .map(|e| ("dashboard".to_string(), e))
        .chain(alert_signals())
        .collect();
    for (origin, expr) in &expressions {
        let answer = query(&prom, expr);
        assert_eq!(answer["status"], "success", "{origin}: {expr}: {answer}");
        checked += 1;
        if answer["data"]["result"].as_array().is_none_or(|r| r.is_empty()) {
            empty.push(format!("{origin}: {expr}"));
        }
    }
    assert!(checked >= 30, "{checked} expressions");
    assert!(
        empty.is_empty(),
        "expressions without a series:\n{}",
        empty.join("\n")
    );
    let (status, _) = service.terminate(Duration::from_secs(30));
    assert!(status.success());
}
