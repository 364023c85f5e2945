//! simtide keeps item-to-item similarities fresh from an event stream: per-pair sufficient
//! statistics in RocksDB, adjusted cosine for ratings, co-purchase scores for purchases,
//! and top-k neighbor lists republished as the statistics change.
//!
//! The maths (events, decoding, the engine, scores, top-k, drift, predictions) is the
//! `simtide-core` crate; its modules are re-exported here so that the binary, the tests
//! and the benchmarks name one crate. This crate's folders, by role:
//! - `pipeline`: the path every event takes — batches applied and written, then the
//!   changed lists rescored and published — shared by the three below;
//! - `service`: `simtide run`, the live service (its loop, probes, HTTP, health, the
//!   read view, the demo on an in-process cluster);
//! - `backfill`: replaying files or the input topic into a store;
//! - `evaluation`: offline evaluation of settings and its report;
//! - `views`: what the command line and HTTP show of a store (neighbors and why,
//!   recommendations, lists as records, export);
//! - `store`: everything RocksDB; `kafka`: everything librdkafka;
//! - `config`: the TOML file and its environment overrides;
//! - `observability`: metrics, the observation type that writes them and the logs, the
//!   progress meter, the status screen;
//! - `runtime`: shutdown, retries, exit codes, disk space;
//! - `cluster.rs`: which shard owns an item.
//!
//! The command line itself (`src/cli/`) is the binary's, beside `main.rs`.

pub use simtide_core::{decode, drift, engine, event, model, predict, ranking, score, signal, timefmt, topk};

pub mod backfill;
pub mod cluster;
pub mod config;
pub mod evaluation;
mod kafka;
pub mod observability;
mod pipeline;
pub mod runtime;
pub mod service;
pub mod store;
#[cfg(test)]
mod test_random;
pub mod views;
