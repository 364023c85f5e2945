//! Driving `simtide run` as a real process against a real broker: its configuration, the
//! events produced to the input topic, what it published, and its HTTP answers.

use std::collections::BTreeMap;
use std::io::{BufRead, BufReader, Read, Write};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitStatus, Stdio};
use std::time::{Duration, Instant};

use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::message::Headers;
use rdkafka::producer::{BaseRecord, DefaultProducerContext, Producer, ThreadedProducer};
use rdkafka::{ClientConfig, Message, Offset, TopicPartitionList};

use rdkafka::mocking::MockCluster;
use rdkafka::producer::DefaultProducerContext as MockContext;

use simtide::cluster::owner;
use simtide::observability::scrape::Scrape;
use simtide::signal::Signal;
use simtide::store::Store;

use super::broker::{free_port, Broker};

/// The topic names every live test uses.
pub const INPUT: &str = "ratings-in";
/// Rating lists.
pub const OUTPUT: &str = "lists-out";
/// Purchase lists.
pub const PURCHASE_OUTPUT: &str = "purchase-lists-out";
/// Dead letters.
pub const DEAD_LETTER: &str = "ratings-dead";
/// The service's consumer group.
pub const GROUP: &str = "simtide-test";

/// Settings a live test varies.
#[derive(Debug, Clone)]
pub struct LiveSettings {
    /// similarity.recenter_tolerance
    pub tolerance: f64,
    /// similarity.min_common_users
    pub min_common_users: u64,
    /// similarity.max_items_per_user (0 = no cut)
    pub max_items_per_user: usize,
    /// publish.interval
    pub publish_interval: &'static str,
    /// live.batch_events
    pub batch_events: usize,
    /// kafka.idempotent_producer
    pub idempotent_producer: bool,
}

impl Default for LiveSettings {
    fn default() -> Self {
        LiveSettings {
            tolerance: 0.0,
            min_common_users: 1,
            max_items_per_user: 0,
            publish_interval: "1s",
            batch_events: 2000,
            idempotent_producer: true,
        }
    }
}

/// Writes a configuration for `simtide run`; returns its path and the HTTP port.
pub fn write_config(dir: &Path, brokers: &str, store: &Path, s: &LiveSettings) -> (PathBuf, u16) {
    let port = free_port();
    let text = format!(
        r#"[similarity]
recenter_tolerance = {tol}
min_common_users = {support}
max_items_per_user = {cut}
rating_min = 0.5
damping = 0
[store]
dir = "{store}"
[kafka]
brokers = "{brokers}"
group = "{GROUP}"
input_topic = "{INPUT}"
output_topic = "{OUTPUT}"
purchase_output_topic = "{PURCHASE_OUTPUT}"
dead_letter_topic = "{DEAD_LETTER}"
create_topics = false
idempotent_producer = {idempotent}
[kafka.client]
"topic.metadata.refresh.interval.ms" = "2000"
[live]
batch_events = {batch}
batch_wait = "100ms"
shutdown_timeout = "60s"
[publish]
interval = "{interval}"
[http]
listen = "127.0.0.1:{port}"
"#,
        tol = s.tolerance,
        support = s.min_common_users,
        cut = s.max_items_per_user,
        store = store.display(),
        batch = s.batch_events,
        interval = s.publish_interval,
        idempotent = s.idempotent_producer,
    );
    let path = dir.join(format!("simtide-{port}.toml"));
    std::fs::write(&path, text).unwrap();
    (path, port)
}

/// A running `simtide run` process.
pub struct Service {
    /// The process (benchmarks read its memory and processor time).
    pub child: Child,
    /// Where its stderr (the log) goes.
    pub log: PathBuf,
    /// Its HTTP port.
    pub port: u16,
}

impl Service {
    /// Starts `simtide run --config FILE` with extra arguments.
    pub fn start(config: &Path, port: u16, extra: &[&str]) -> Service {
        Service::start_in_group(config, port, extra, GROUP)
    }

    /// Starts the service in consumer group `group` (an environment override).
    pub fn start_in_group(config: &Path, port: u16, extra: &[&str], group: &str) -> Service {
        Service::start_with_env(config, port, extra, &[("SIMTIDE_KAFKA__GROUP", group)])
    }

    /// Starts the service with extra environment variables (overrides of the
    /// configuration file); the consumer group is [`GROUP`] unless `env` sets another.
    pub fn start_with_env(config: &Path, port: u16, extra: &[&str], env: &[(&str, &str)]) -> Service {
        static STARTS: std::sync::atomic::AtomicUsize = std::sync::atomic::AtomicUsize::new(0);
        let n = STARTS.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
        let log = config.with_extension(format!("run{n}.log"));
        let child = Command::new(env!("CARGO_BIN_EXE_simtide"))
            .arg("run")
            .arg("--config")
            .arg(config)
            .args(extra)
            .env(
                "SIMTIDE_LOG",
                std::env::var("SIMTIDE_TEST_LOG").unwrap_or_else(|_| "info".into()),
            )
            .env("SIMTIDE_KAFKA__GROUP", GROUP)
            .envs(env.iter().copied())
            .stdout(Stdio::piped())
            .stderr(std::fs::File::create(&log).unwrap())
            .spawn()
            .expect("simtide starts");
        Service { child, log, port }
    }

    /// Sends SIGTERM and waits for the exit; returns the status and stdout.
    pub fn terminate(self, within: Duration) -> (ExitStatus, String) {
        let pid = self.child.id().to_string();
        Command::new("kill").args(["-TERM", &pid]).status().unwrap();
        self.wait_exit(within)
    }

    /// Waits for the process to exit on its own; returns the status and stdout.
    pub fn wait_exit(mut self, within: Duration) -> (ExitStatus, String) {
        let deadline = Instant::now() + within;
        loop {
            if let Some(status) = self.child.try_wait().unwrap() {
                let mut out = String::new();
                self.child
                    .stdout
                    .take()
                    .unwrap()
                    .read_to_string(&mut out)
                    .unwrap();
                return (status, out);
            }
            assert!(
                Instant::now() < deadline,
                "simtide did not exit within {within:?}"
            );
            std::thread::sleep(Duration::from_millis(50));
        }
    }

    /// SIGKILL, no chance to clean up.
    pub fn kill(mut self) {
        self.child.kill().unwrap();
        self.child.wait().unwrap();
    }

    /// Whether the process is still running.
    pub fn running(&mut self) -> bool {
        self.child.try_wait().unwrap().is_none()
    }

    /// GET `path` on the service's HTTP port: (status code, body), `None` if it does not
    /// answer.
    pub fn get(&self, path: &str) -> Option<(u16, String)> {
        http_get(self.port, path)
    }

    /// The log so far.
    pub fn log_text(&self) -> String {
        std::fs::read_to_string(&self.log).unwrap_or_default()
    }

    /// [`wait_for`], with the last lines of the service's log in the panic message: a
    /// wait that times out in CI then says what the service was doing.
    pub fn wait_for(&self, what: &str, within: Duration, check: impl FnMut() -> bool) {
        wait_saying(what, within, check, || {
            let log = self.log_text();
            let lines: Vec<&str> = log.lines().collect();
            format!(
                "; the service's log ends:\n{}",
                lines[lines.len().saturating_sub(40)..].join("\n")
            )
        });
    }
}

impl Drop for Service {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// A GET on the service: (status code, body), `None` when nothing answers.
pub fn http_get(port: u16, path: &str) -> Option<(u16, String)> {
    http_request(port, "GET", path, &[])
}

/// A request without a body: (status code, body) of any status, `None` when nothing
/// answers within 10 s.
pub fn http_request(port: u16, method: &str, path: &str, headers: &[(&str, &str)]) -> Option<(u16, String)> {
    static AGENT: std::sync::LazyLock<ureq::Agent> = std::sync::LazyLock::new(|| {
        ureq::Agent::config_builder()
            .timeout_global(Some(Duration::from_secs(10)))
            .http_status_as_error(false)
            .build()
            .into()
    });
    let mut request = ureq::http::Request::builder()
        .method(method)
        .uri(format!("http://127.0.0.1:{port}{path}"));
    for (name, value) in headers {
        request = request.header(*name, *value);
    }
    let mut answer = AGENT.run(request.body(()).ok()?).ok()?;
    let body = answer.body_mut().read_to_string().ok()?;
    Some((answer.status().as_u16(), body))
}

/// The value of one series in a Prometheus text exposition (`name{labels}` as exposed,
/// labels in their order; a `shard` label is left out).
pub fn sample(metrics: &str, series: &str) -> Option<f64> {
    Scrape::parse(metrics).value(series)
}

/// Waits until `check` holds, panicking with `what` after `within`.
pub fn wait_for(what: &str, within: Duration, check: impl FnMut() -> bool) {
    wait_saying(what, within, check, String::new);
}

/// Waits until `check` holds, panicking after `within` with `what` and what `context`
/// adds.
fn wait_saying(
    what: &str,
    within: Duration,
    mut check: impl FnMut() -> bool,
    context: impl FnOnce() -> String,
) {
    let deadline = Instant::now() + within;
    while !check() {
        if Instant::now() >= deadline {
            panic!("timed out after {within:?} waiting for {what}{}", context());
        }
        std::thread::sleep(Duration::from_millis(200));
    }
}

/// One simtide CSV row of MovieLens as a JSON event: (key = user, value, `at` seconds).
pub fn csv_events(csv: &Path, limit: usize) -> Vec<(String, String, i64)> {
    let file = std::fs::File::open(csv).unwrap();
    BufReader::new(file)
        .lines()
        .skip(1)
        .take(limit)
        .map(|line| {
            let line = line.unwrap();
            let f: Vec<&str> = line.split(',').collect();
            let at: i64 = f[3].parse().unwrap();
            let value = format!(
                r#"{{"kind":"rating","user":"{}","item":"{}","value":{},"at":{at}}}"#,
                f[0], f[1], f[2]
            );
            (f[0].to_string(), value, at)
        })
        .collect()
}

/// [`csv_events`] as records for [`produce`], the timestamps left to the producer.
pub fn unstamped_events(csv: &Path, limit: usize) -> Vec<(String, String, Option<i64>)> {
    csv_events(csv, limit)
        .into_iter()
        .map(|(k, v, _)| (k, v, None))
        .collect()
}

/// Produces (key, value, timestamp ms) records to a topic and waits for every
/// acknowledgement.
pub fn produce(brokers: &str, topic: &str, records: &[(String, String, Option<i64>)]) {
    let producer: ThreadedProducer<DefaultProducerContext> = ClientConfig::new()
        .set("bootstrap.servers", brokers)
        .set("enable.idempotence", "true")
        .set("linger.ms", "20")
        .create()
        .expect("producer");
    for (key, value, ts) in records {
        let mut record = BaseRecord::to(topic).key(key.as_str()).payload(value.as_str());
        if let Some(ts) = ts {
            record = record.timestamp(*ts);
        }
        while let Err((e, back)) = producer.send(record) {
            assert!(
                matches!(
                    e.rdkafka_error_code(),
                    Some(rdkafka::error::RDKafkaErrorCode::QueueFull)
                ),
                "produce failed: {e}"
            );
            record = back;
            std::thread::sleep(Duration::from_millis(5));
        }
    }
    producer
        .flush(Duration::from_secs(60))
        .expect("all records acknowledged");
}

fn client(brokers: &str, group: &str) -> BaseConsumer {
    ClientConfig::new()
        .set("bootstrap.servers", brokers)
        .set("group.id", group)
        .set("enable.auto.commit", "false")
        .create()
        .expect("consumer")
}

/// Whether the service group's committed offsets reached the end of every partition.
pub fn caught_up(brokers: &str, partitions: i32) -> bool {
    caught_up_in(brokers, GROUP, partitions)
}

/// Σ of `group`'s committed offsets over the input partitions (0 where none).
pub fn committed_total(brokers: &str, group: &str, partitions: i32) -> i64 {
    let c = client(brokers, group);
    let mut tpl = TopicPartitionList::new();
    for p in 0..partitions {
        tpl.add_partition(INPUT, p);
    }
    c.committed_offsets(tpl, Duration::from_secs(5))
        .map_or(0, |list| {
            list.elements()
                .iter()
                .map(|e| match e.offset() {
                    Offset::Offset(o) => o,
                    _ => 0,
                })
                .sum()
        })
}

/// Whether `group`'s committed offsets reached the end of every partition.
pub fn caught_up_in(brokers: &str, group: &str, partitions: i32) -> bool {
    let c = client(brokers, group);
    let mut tpl = TopicPartitionList::new();
    for p in 0..partitions {
        tpl.add_partition(INPUT, p);
    }
    let Ok(committed) = c.committed_offsets(tpl, Duration::from_secs(5)) else {
        return false;
    };
    committed.elements().iter().all(|e| {
        let high = c
            .fetch_watermarks(INPUT, e.partition(), Duration::from_secs(5))
            .map_or(-1, |(_, h)| h);
        high == 0 || e.offset() == Offset::Offset(high)
    })
}

/// One record read back from a topic.
#[derive(Debug, Clone)]
pub struct ReadRecord {
    /// Key.
    pub key: String,
    /// Value, `None` for a tombstone.
    pub value: Option<Vec<u8>>,
    /// Headers.
    pub headers: BTreeMap<String, String>,
}

/// Every record of a topic from the beginning to its current end, in partition order.
pub fn read_all(brokers: &str, topic: &str) -> Vec<ReadRecord> {
    let c = client(brokers, "simtide-test-reader");
    let metadata = c.fetch_metadata(Some(topic), Duration::from_secs(10)).unwrap();
    let mut ends = BTreeMap::new();
    let mut tpl = TopicPartitionList::new();
    for p in metadata.topics()[0].partitions() {
        let (low, high) = c
            .fetch_watermarks(topic, p.id(), Duration::from_secs(10))
            .unwrap();
        if high > low {
            ends.insert(p.id(), high);
            tpl.add_partition_offset(topic, p.id(), Offset::Offset(low))
                .unwrap();
        }
    }
    c.assign(&tpl).unwrap();
    let mut out = Vec::new();
    let deadline = Instant::now() + Duration::from_secs(120);
    while !ends.is_empty() {
        assert!(
            Instant::now() < deadline,
            "reading {topic} to its end took too long"
        );
        let Some(m) = c.poll(Duration::from_millis(500)) else {
            // Records without a value may be skipped by the broker: the position says
            // whether a partition is done.
            for e in c.position().unwrap().elements() {
                if let (Offset::Offset(at), Some(&end)) = (e.offset(), ends.get(&e.partition())) {
                    if at >= end {
                        ends.remove(&e.partition());
                    }
                }
            }
            continue;
        };
        let m = m.unwrap();
        let headers = m
            .headers()
            .map(|h| {
                h.iter()
                    .map(|x| {
                        (
                            x.key.to_string(),
                            String::from_utf8_lossy(x.value.unwrap_or_default()).into_owned(),
                        )
                    })
                    .collect()
            })
            .unwrap_or_default();
        out.push(ReadRecord {
            key: String::from_utf8_lossy(m.key().unwrap_or_default()).into_owned(),
            value: m.payload().map(<[u8]>::to_vec),
            headers,
        });
        if ends.get(&m.partition()).is_some_and(|&end| m.offset() + 1 >= end) {
            ends.remove(&m.partition());
        }
    }
    out
}

/// The last record per key, in the form of `simtide export` (one JSON line per list),
/// written to `out`; keys whose last record is a tombstone are left out, as export leaves
/// out empty lists. Returns the number of lists written.
pub fn last_lists_as_export(records: &[ReadRecord], out: &Path) -> usize {
    let mut last: BTreeMap<&str, &Option<Vec<u8>>> = BTreeMap::new();
    for r in records {
        last.insert(&r.key, &r.value);
    }
    let mut file = std::fs::File::create(out).unwrap();
    let mut n = 0;
    for value in last.values().filter_map(|v| v.as_ref()) {
        file.write_all(value).unwrap();
        file.write_all(b"\n").unwrap();
        n += 1;
    }
    n
}

/// A rating event as a (key, value, no timestamp) record for [`produce`].
pub fn rating(user: &str, item: &str, value: u8, at: u64) -> (String, String, Option<i64>) {
    (
        user.to_string(),
        format!(r#"{{"kind":"rating","user":"{user}","item":"{item}","value":{value},"at":{at}}}"#),
        None,
    )
}

/// An unrating event as a record for [`produce`].
pub fn unrating(user: &str, item: &str, at: u64) -> (String, String, Option<i64>) {
    (
        user.to_string(),
        format!(r#"{{"kind":"unrating","user":"{user}","item":"{item}","at":{at}}}"#),
        None,
    )
}

/// A real broker with the four topics of the live tests (input in 3 partitions).
pub fn broker_with_topics() -> Broker {
    let broker = Broker::start();
    broker.create_topic(INPUT, 3, false);
    broker.create_topic(OUTPUT, 1, true);
    broker.create_topic(PURCHASE_OUTPUT, 1, true);
    broker.create_topic(DEAD_LETTER, 1, false);
    broker
}

/// librdkafka's in-process mock cluster with the same four topics.
pub fn mock_with_topics() -> MockCluster<'static, MockContext> {
    let mock = MockCluster::new(1).expect("mock cluster");
    mock.create_topic(INPUT, 3, 1).unwrap();
    for t in [OUTPUT, PURCHASE_OUTPUT, DEAD_LETTER] {
        mock.create_topic(t, 1, 1).unwrap();
    }
    mock
}

/// Appends to `records` the tombstone tansu does not return (see tests/live/service.rs)
/// for each item whose stored list became empty right after its last record there;
/// returns how many. `stores` are the stores of shards 0, 1, … (one store: unsharded),
/// and each item's list is read from its owner's.
pub fn accept_missing_tombstones(records: &mut Vec<ReadRecord>, stores: &[&Path]) -> usize {
    let stores: Vec<Store> = stores
        .iter()
        .map(|dir| Store::open_read_only(dir).unwrap())
        .collect();
    let mut last: BTreeMap<String, u64> = BTreeMap::new();
    for r in records.iter() {
        if let Some(v) = &r.value {
            let rec: serde_json::Value = serde_json::from_slice(v).unwrap();
            last.insert(r.key.clone(), rec["version"].as_u64().unwrap());
        }
    }
    let mut emptied = Vec::new();
    for (key, version) in &last {
        let store = &stores[owner(key, stores.len() as u32) as usize];
        let id = store.item_id(key).expect("published items are in the store");
        let stored = store
            .published(Signal::Rating, id)
            .unwrap()
            .expect("a stored list");
        if stored.neighbors.is_empty() && stored.version == version + 1 {
            emptied.push(key.clone());
        }
    }
    for key in &emptied {
        records.push(ReadRecord {
            key: key.clone(),
            value: None,
            headers: BTreeMap::new(),
        });
    }
    emptied.len()
}

/// The non-empty lists among `records` (topic values or export lines), by item: each
/// item's neighbors as published.
pub fn nonempty_lists(
    records: impl Iterator<Item = serde_json::Value>,
) -> BTreeMap<String, serde_json::Value> {
    records
        .filter(|rec| !rec["neighbors"].as_array().unwrap().is_empty())
        .map(|rec| {
            (
                rec["item"].as_str().unwrap().to_string(),
                rec["neighbors"].clone(),
            )
        })
        .collect()
}

/// Where [`single_store_lists`] backfills its store under `work`.
pub fn single_store_dir(work: &Path) -> PathBuf {
    work.join("single")
}

/// The non-empty lists of one store (holding every item) backfilled from `slice` at
/// recenter tolerance `tolerance`, built under `work`: what the live instances must add
/// up to.
pub fn single_store_lists(work: &Path, slice: &Path, tolerance: f64) -> BTreeMap<String, serde_json::Value> {
    let single = single_store_dir(work);
    super::backfill(
        &single,
        &[slice],
        &super::config(super::Settings {
            tolerance,
            batch_events: 5_000,
            ..super::Settings::EXACT
        }),
    );
    nonempty_lists(super::export_without_times(&single, &work.join("single.jsonl")).into_iter())
}

/// Asserts that two sets of lists are equal item for item, naming the first difference.
pub fn assert_same_lists(
    expected: &BTreeMap<String, serde_json::Value>,
    got: &BTreeMap<String, serde_json::Value>,
) {
    let differing: Vec<&String> = expected
        .keys()
        .chain(got.keys())
        .filter(|item| expected.get(*item) != got.get(*item))
        .collect();
    assert!(
        differing.is_empty(),
        "{} lists differ, first {:?}: expected {:?}, got {:?}",
        differing.len(),
        differing[0],
        expected.get(differing[0]),
        got.get(differing[0])
    );
}
