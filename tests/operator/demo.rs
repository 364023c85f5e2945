//! `simtide demo` (what `make demo` runs): the live path on librdkafka's in-process mock
//! cluster, finishing by itself, with lists that group the invented shop's items by
//! customer interest (demo-data/generate.py builds the events around those interests).

use std::process::Command;
use std::time::{Duration, Instant};

#[test]
fn the_demo_runs_the_live_path_and_finishes_within_a_minute() {
    let started = Instant::now();
    let out = Command::new(env!("CARGO_BIN_EXE_simtide"))
        .arg("demo")
        .output()
        .unwrap();
    let elapsed = started.elapsed();
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{text}{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(elapsed < Duration::from_secs(60), "took {elapsed:?}");
    // A first look at the product has no warnings about what the in-process cluster
    // cannot do; the demo says once, in its first lines, that the compaction check is off.
    let log = String::from_utf8_lossy(&out.stderr);
    assert!(!log.contains("WARN"), "{log}");
    assert!(text.contains("compacted is off"), "{text}");
    // Every bundled event went through the broker and was committed; the two malformed
    // ones went to the dead-letter topic.
    let produced: u64 = text
        .lines()
        .find_map(|l| l.strip_suffix(" messages produced."))
        .and_then(|n| n.trim().parse().ok())
        .expect("the produced count is printed");
    assert!(
        text.contains(&format!("messages committed {produced:>10}")),
        "{text}"
    );
    assert!(text.contains("dead letters                2"), "{text}");
    // Lists were seen changing on the output topic while the stream ran.
    let changes = text.lines().filter(|l| l.trim_start().starts_with('[')).count();
    assert!(changes >= 3, "expected list changes on the output topic:\n{text}");
    // Final lists follow the shop's customer interests.
    let tomato = text
        .split("heirloom-tomato-seeds (rating signal)")
        .nth(1)
        .expect("tomato seeds' list is printed");
    let top3: Vec<&str> = tomato.lines().skip(2).take(3).collect();
    assert!(
        top3.iter()
            .any(|l| l.contains("sweet-basil-seeds") || l.contains("runner-bean-seeds")),
        "{top3:?}"
    );
    assert!(
        !text.contains("1  reel-mower-blades"),
        "a discontinued item is in no list"
    );
}
