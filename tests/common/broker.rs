//! A real Kafka-protocol broker for the tests: tansu 0.6.0 (crates.io), built into the
//! cache by scripts/setup.sh, started on a free 127.0.0.1 port with its sqlite storage
//! engine in a temp directory, and stopped (or restarted on the same port and data) by
//! the test.

use std::net::TcpStream;
use std::path::PathBuf;
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use rdkafka::admin::{AdminClient, AdminOptions, NewTopic, TopicReplication};
use rdkafka::client::DefaultClientContext;
use rdkafka::ClientConfig;

use super::cache_dir;

/// A free TCP port on 127.0.0.1 for a child process to listen on: bound once to check,
/// then released. Picked below the kernel's ephemeral range, from which every outgoing
/// connection of every test takes its local port: a port from that range could be taken
/// by some client's socket between the check and the child's bind (seen once the tests
/// ran in one binary, more of them at a time).
pub fn free_port() -> u16 {
    use std::sync::atomic::{AtomicU32, Ordering};
    static NEXT: AtomicU32 = AtomicU32::new(0);
    let ephemeral_start = std::fs::read_to_string("/proc/sys/net/ipv4/ip_local_port_range")
        .ok()
        .and_then(|r| r.split_whitespace().next()?.parse::<u32>().ok())
        .unwrap_or(32_768);
    let first = 10_000u32.min(ephemeral_start / 2);
    let span = ephemeral_start - first;
    let seed = std::process::id().wrapping_mul(7_919);
    for _ in 0..span {
        let port = first + seed.wrapping_add(NEXT.fetch_add(1, Ordering::Relaxed)) % span;
        let port = u16::try_from(port).expect("ports fit in 16 bits");
        if std::net::TcpListener::bind(("127.0.0.1", port)).is_ok() {
            return port;
        }
    }
    panic!("no free port below the ephemeral range {ephemeral_start}");
}

/// A running tansu broker.
pub struct Broker {
    /// The broker process while it runs (benchmarks read its processor time).
    pub child: Option<Child>,
    port: u16,
    data: tempfile::TempDir,
}

fn tansu_binary() -> PathBuf {
    let path = cache_dir().join("tools/bin/tansu");
    assert!(
        path.exists(),
        "{} is missing: run `scripts/setup.sh test` (make test does)",
        path.display()
    );
    path
}

impl Broker {
    /// Starts a broker with empty storage and waits until it accepts connections.
    pub fn start() -> Broker {
        let mut broker = Broker::reserved();
        broker.resume();
        broker
    }

    /// A broker whose port and storage are chosen but which is not running yet: a
    /// client pointed at it finds nothing until [`Broker::resume`].
    pub fn reserved() -> Broker {
        Broker {
            child: None,
            port: free_port(),
            data: tempfile::tempdir().expect("broker data dir"),
        }
    }

    /// `host:port` for bootstrap.servers.
    pub fn bootstrap(&self) -> String {
        format!("127.0.0.1:{}", self.port)
    }

    /// The last `lines` lines the broker wrote since it last started, for failure messages.
    pub fn log_tail(&self, lines: usize) -> String {
        let text = std::fs::read_to_string(self.data.path().join("broker.log")).unwrap_or_default();
        let tail: Vec<&str> = text.lines().rev().take(lines).collect();
        tail.into_iter().rev().collect::<Vec<_>>().join("\n")
    }

    /// Kills the broker process (its storage stays).
    pub fn stop(&mut self) {
        if let Some(mut child) = self.child.take() {
            let _ = child.kill();
            let _ = child.wait();
        }
    }

    /// Starts the broker again on the same port and storage.
    pub fn resume(&mut self) {
        assert!(self.child.is_none(), "broker already running");
        let url = format!("tcp://127.0.0.1:{}", self.port);
        // tansu reads the sqlite path relative to its working directory.
        let storage = "sqlite://tansu.db";
        let log = std::fs::File::create(self.data.path().join("broker.log")).expect("broker log");
        let child = Command::new(tansu_binary())
            .args([
                "broker",
                "--listener-url",
                &url,
                "--advertised-listener-url",
                &url,
            ])
            .args(["--storage-engine", storage])
            .current_dir(self.data.path())
            .stdout(Stdio::null())
            .stderr(log)
            .spawn()
            .expect("tansu starts");
        self.child = Some(child);
        let deadline = Instant::now() + Duration::from_secs(30);
        while TcpStream::connect(("127.0.0.1", self.port)).is_err() {
            let exited = self.child.as_mut().and_then(|c| c.try_wait().ok().flatten());
            assert!(
                exited.is_none() && Instant::now() < deadline,
                "tansu did not listen on port {} within 30 s ({}); its log:\n{}",
                self.port,
                exited.map_or("still running".to_string(), |s| format!("exited: {s}")),
                self.log_tail(20)
            );
            std::thread::sleep(Duration::from_millis(50));
        }
    }

    /// Creates a topic (tansu does not auto-create), compacted when asked.
    pub fn create_topic(&self, name: &str, partitions: i32, compacted: bool) {
        let mut topic = NewTopic::new(name, partitions, TopicReplication::Fixed(1));
        if compacted {
            topic = topic.set("cleanup.policy", "compact");
        }
        let results = self
            .admin(|admin, runtime| runtime.block_on(admin.create_topics([&topic], &AdminOptions::new())));
        for r in results {
            r.unwrap_or_else(|(t, e)| panic!("creating topic {t}: {e}"));
        }
    }

    /// The topics the broker lists.
    pub fn topics(&self) -> Vec<String> {
        let client: rdkafka::consumer::BaseConsumer = ClientConfig::new()
            .set("bootstrap.servers", self.bootstrap())
            .create()
            .expect("metadata client");
        let metadata = rdkafka::consumer::Consumer::fetch_metadata(&client, None, Duration::from_secs(10))
            .expect("the broker lists its topics");
        metadata.topics().iter().map(|t| t.name().to_string()).collect()
    }

    /// Deletes a topic and its records (to replace it under a stopped service).
    pub fn delete_topic(&self, name: &str) {
        let results =
            self.admin(|admin, runtime| runtime.block_on(admin.delete_topics(&[name], &AdminOptions::new())));
        for r in results {
            r.unwrap_or_else(|(t, e)| panic!("deleting topic {t}: {e}"));
        }
    }

    /// Runs one admin request against the broker and returns its per-topic results.
    fn admin<R>(
        &self,
        request: impl FnOnce(
            &AdminClient<DefaultClientContext>,
            &tokio::runtime::Runtime,
        ) -> rdkafka::error::KafkaResult<R>,
    ) -> R {
        let admin: AdminClient<DefaultClientContext> = ClientConfig::new()
            .set("bootstrap.servers", self.bootstrap())
            .create()
            .expect("admin client");
        let runtime = tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()
            .unwrap();
        request(&admin, &runtime).expect("the broker answered the admin request")
    }
}

impl Drop for Broker {
    fn drop(&mut self) {
        self.stop();
    }
}
