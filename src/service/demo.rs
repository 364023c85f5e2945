//! `simtide demo`: the embedded default, with no broker to install. It starts librdkafka's
//! in-process mock cluster, replays the bundled Fernwick Garden Supply events (invented;
//! see demo-data/generate.py) into its input topic at a visible pace, runs the real live
//! service against it, prints a few neighbor lists each time they change on the output
//! topic, then stops the service the way SIGTERM does and prints a summary.

use std::collections::BTreeMap;
use std::io::{BufRead, BufReader, Write};
use std::path::PathBuf;
use std::sync::mpsc;
use std::time::{Duration, Instant};

use anyhow::{Context, Result};

use crate::config::Config;
use crate::kafka::in_process::{follow_topic, produce_paced, GroupWatcher, InProcessCluster};
use crate::runtime::shutdown::Shutdown;
use crate::service::{run_service, RunOptions, SignalHandling};
use crate::signal::Signal;
use crate::store::Store;
use crate::views::inspect::neighbors_table;
use crate::views::record::NeighborRecord;

/// The bundled demo events, gzip-compressed JSON lines.
const DEMO_EVENTS: &[u8] = include_bytes!("../../demo-data/garden-events.jsonl.gz");

/// Items whose list changes the demo prints as they happen.
const SHOWCASE: [&str; 3] = [
    "heirloom-tomato-seeds",
    "drip-irrigation-kit",
    "bypass-pruning-shears",
];

/// Two malformed messages mixed into the stream, to show the dead-letter path.
const MALFORMED: [&str; 2] = [
    r#"{"kind":"rating","user":"fw-0042","item":"compost-bin-300l","value":9,"at":"2026-04-02T10:00:00Z"}"#,
    r#"{"kind":"rating","user":"fw-0042","item":"compost-bin-300l","value":4,"at":"yesterday"}"#,
];

/// How long the replay takes: slow enough to watch lists change, short enough to finish
/// well inside a minute.
const REPLAY_SECONDS: f64 = 12.0;

/// The demo's topics.
const INPUT: &str = "fernwick.events";
const INPUT_PARTITIONS: i32 = 3;
const OUTPUT: &str = "fernwick.item-lists.rating";
const PURCHASE_OUTPUT: &str = "fernwick.item-lists.purchase";
const DEAD_LETTER: &str = "fernwick.events.dead-letter";

fn demo_config(brokers: &str, store_dir: &std::path::Path) -> Result<Config> {
    let toml = format!(
        r#"
[store]
dir = "{store}"
[kafka]
brokers = "{brokers}"
group = "fernwick.simtide"
input_topic = "{INPUT}"
output_topic = "{OUTPUT}"
purchase_output_topic = "{PURCHASE_OUTPUT}"
dead_letter_topic = "{DEAD_LETTER}"
create_topics = false
[live]
batch_wait = "100ms"
[publish]
interval = "1s"
[http]
listen = "127.0.0.1:0"
"#,
        store = store_dir.display()
    );
    Config::from_toml_and_env(&toml, "demo configuration", std::iter::empty())
}

/// The demo events as (key, value) messages, malformed ones included.
fn demo_messages() -> Result<Vec<(String, String)>> {
    let reader = BufReader::new(flate2::read::GzDecoder::new(DEMO_EVENTS));
    let mut out = Vec::new();
    for line in reader.lines() {
        let line = line.context("the bundled demo events are unreadable")?;
        let value: serde_json::Value = serde_json::from_str(&line)?;
        let key = value
            .get("user")
            .or_else(|| value.get("item"))
            .and_then(|v| v.as_str())
            .unwrap_or_default()
            .to_string();
        out.push((key, line));
    }
    for (i, bad) in MALFORMED.iter().enumerate() {
        out.insert((i + 1) * out.len() / 3, ("fw-0042".to_string(), bad.to_string()));
    }
    Ok(out)
}

/// Follows the output topic, sending a line whenever a showcase item's list changes.
fn follow_output(brokers: &str, lines: mpsc::Sender<String>, stop: mpsc::Receiver<()>) -> Result<()> {
    let started = Instant::now();
    let mut last: BTreeMap<String, Vec<String>> = BTreeMap::new();
    follow_topic(brokers, OUTPUT, stop, |value| {
        let record: NeighborRecord = serde_json::from_slice(value)?;
        if !SHOWCASE.contains(&record.item.as_str()) {
            return Ok(());
        }
        let top: Vec<String> = record
            .neighbors
            .iter()
            .take(3)
            .map(|n| format!("{} {:.2}", n.item, n.score))
            .collect();
        if last.get(&record.item) != Some(&top) {
            let _ = lines.send(format!(
                "  [{:>5.1}s] {} v{}: {}",
                started.elapsed().as_secs_f64(),
                record.item,
                record.version,
                top.join(", ")
            ));
            last.insert(record.item.clone(), top);
        }
        Ok(())
    })
}

/// Runs the demo; the store is kept at `keep` when given, otherwise removed afterwards.
/// Long by design: the demo is a script, told in the order it happens.
pub fn run_demo(keep: Option<PathBuf>, out: &mut dyn Write) -> Result<()> {
    let work = std::env::temp_dir().join(format!("simtide-demo-{}", std::process::id()));
    std::fs::create_dir_all(&work)?;
    let store_dir = keep.clone().unwrap_or_else(|| work.join("store"));
    let cluster = InProcessCluster::start(&[
        (INPUT, INPUT_PARTITIONS),
        (OUTPUT, 1),
        (PURCHASE_OUTPUT, 1),
        (DEAD_LETTER, 1),
    ])?;
    let brokers = cluster.brokers();
    let config = demo_config(&brokers, &store_dir)?;
    let messages = demo_messages()?;
    writeln!(
        out,
        "Fernwick Garden Supply (an invented shop): {} events replayed over {REPLAY_SECONDS:.0}s into an in-process Kafka mock cluster ({brokers}),\nconsumed live by simtide into {} (the in-process cluster cannot report topic settings, so the check that the list topics are compacted is off);\nlist changes as they reach the output topic:",
        messages.len(),
        store_dir.display()
    )?;

    let shutdown = Shutdown::new();
    let service = {
        let (config, shutdown) = (config.clone(), shutdown.clone());
        let options = RunOptions {
            signals: SignalHandling::Ignore,
            skip_compaction_check: true,
            ..RunOptions::default()
        };
        std::thread::spawn(move || run_service(&config, options, shutdown))
    };
    let (line_tx, line_rx) = mpsc::channel();
    let (reader_stop_tx, reader_stop_rx) = mpsc::channel();
    let reader = {
        let brokers = brokers.clone();
        std::thread::spawn(move || follow_output(&brokers, line_tx, reader_stop_rx))
    };
    let producer = {
        let brokers = brokers.clone();
        std::thread::spawn(move || {
            produce_paced(
                &brokers,
                INPUT,
                &messages,
                Duration::from_secs_f64(REPLAY_SECONDS),
            )
        })
    };
    while !producer.is_finished() {
        while let Ok(line) = line_rx.recv_timeout(Duration::from_millis(100)) {
            writeln!(out, "{line}")?;
        }
    }
    let produced = producer.join().expect("replay thread does not panic")?;
    // Wait until the service has committed everything, then stop it the way SIGTERM
    // does: it commits and publishes what is pending before leaving.
    let watcher = GroupWatcher::new(&brokers, &config.kafka.group)?;
    let give_up = Instant::now() + Duration::from_secs(20);
    while !watcher.caught_up(INPUT, INPUT_PARTITIONS)? && Instant::now() < give_up {
        if let Ok(line) = line_rx.recv_timeout(Duration::from_millis(200)) {
            writeln!(out, "{line}")?;
        }
    }
    drop(watcher);
    shutdown.begin();
    let report = service.join().expect("the service thread does not panic")?;
    while let Ok(line) = line_rx.recv_timeout(Duration::from_millis(800)) {
        writeln!(out, "{line}")?;
    }
    let _ = reader_stop_tx.send(());
    reader.join().expect("reader thread does not panic")?;
    writeln!(out, "\n{produced} messages produced.\n{report}\n")?;

    let store = Store::open_read_only(&store_dir)?;
    for item in SHOWCASE {
        write!(out, "{}", neighbors_table(&store, item, Some(Signal::Rating))?)?;
        writeln!(out)?;
    }
    write!(
        out,
        "{}",
        neighbors_table(&store, "drip-irrigation-kit", Some(Signal::Purchase))?
    )?;
    writeln!(
        out,
        "\n'reel-mower-blades' was discontinued (item_status available=false): it appears in no list."
    )?;
    drop(store);
    drop(cluster);
    if keep.is_none() {
        std::fs::remove_dir_all(&work)?;
    } else {
        std::fs::remove_dir_all(&work).ok();
        writeln!(
            out,
            "store kept at {}: try `simtide neighbors --store {} spring-lawn-feed`",
            store_dir.display(),
            store_dir.display()
        )?;
    }
    Ok(())
}
