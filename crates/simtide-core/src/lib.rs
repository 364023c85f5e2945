//! The maths of simtide, free of I/O: the event contract and its decoders, the engine that
//! turns a micro-batch into additive pair deltas, scores and top-k selection over stored
//! sums, list drift, weighted-sum predictions and top-N ranking. Storage (RocksDB), the Kafka bus and the
//! HTTP listener live in the `simtide` crate; this one builds and tests without a C++
//! toolchain. The design and its maths are in `docs/design.md` at the repository root.

pub mod decode;
pub mod drift;
pub mod engine;
pub mod event;
pub mod model;
pub mod predict;
pub mod ranking;
pub mod score;
pub mod signal;
pub mod timefmt;
pub mod topk;
