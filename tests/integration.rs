//! Every integration test of simtide, in one binary so RocksDB and librdkafka are linked
//! once (DEVELOPERS.md, "Build and test"). The modules follow what they exercise:
//! - `store`: backfill and the store (rules of the sums, bad input, crashes, full disks,
//!   shards, snapshots, layout upgrades, copies made whole);
//! - `live`: the service on the real broker (and the mock cluster for faults);
//! - `quality`: the maths against outside references, evaluation and ranking;
//! - `operator`: what an operator touches (configuration check, demo, HTTP surface,
//!   alerts, deployment manifests).
//!
//! Run one group with `cargo test --release --test integration store::`.

mod common;
mod live;
mod operator;
mod quality;
mod store;
