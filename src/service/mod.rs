//! `simtide run`: the long-running service (docs/design.md: "Data flow", "Storage",
//! "Publication", "Failure model"). Its state machine runs on the calling thread, never on
//! an async worker: one loop polls the group consumer, collects micro-batches (bounded by
//! count and age) and applies each in memory; before every publication cycle (every
//! `publish.interval`), and sooner past `live.memory_budget`, it writes the applied batches
//! with their next offsets (one write that a reopened store finishes if it was cut in
//! two), commits group offsets for external lag tools, and starts the publication cycle
//! on a thread of its own (`cycle`) while it goes on consuming; the next write waits for
//! that cycle. Store writes, dead-letter deliveries and retry back-offs happen on this
//! thread. A small tokio runtime serves HTTP, signals and the topic checks (the Kafka
//! admin API is async). Shutdown (SIGTERM/SIGINT or the caller) ends the loop; draining
//! commits the batch in flight and publishes what is pending.

mod cycle;
pub mod demo;
pub mod handover;
pub(crate) mod health;
pub mod http;
pub(crate) mod latency;
mod lease_role;
pub(crate) mod lookup;
pub(crate) mod positions;
mod probes;
mod report;
mod run_loop;
pub(crate) mod segment;
mod startup;
pub(crate) mod state;

pub use report::{RunCounters, RunReport};
pub use run_loop::run_service;
pub use startup::{start, RunOptions, Service, SignalHandling, StopAt};
