//! simtide keeps item-to-item similarities fresh from an event stream: per-pair sufficient
//! statistics in RocksDB, adjusted cosine for ratings, co-purchase scores for purchases,
//! and top-k neighbor lists republished as the statistics change.
//!
//! The maths (events, decoding, the engine, scores, top-k, drift, predictions) is the
//! `simtide-core` crate; its modules are re-exported here so that the binary, the tests
//! and the benchmarks name one crate. This crate adds the store, the Kafka bus, the live
//! service, HTTP, and the commands.

pub use simtide_core::{decode, drift, engine, event, model, predict, ranking, score, signal, timefmt, topk};

pub mod cluster;
pub mod config;
pub mod demo;
pub mod diskspace;
pub mod evaluate;
pub mod exit;
pub mod export;
mod health;
pub mod http;
pub mod ingest;
pub mod inspect;
mod kafka;
pub mod live;
mod log_limit;
mod lookup;
mod meter;
pub mod metrics;
mod observe;
mod pipeline;
mod publish;
pub mod quality;
pub mod recommend;
pub mod record;
pub mod report;
mod retry;
pub mod shutdown;
mod source;
pub mod status;
pub mod store;
#[cfg(test)]
mod test_random;
