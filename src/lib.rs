//! simtide keeps item-to-item similarities fresh from an event stream: per-pair sufficient
//! statistics in RocksDB, adjusted cosine for ratings, co-purchase scores for purchases,
//! and top-k neighbor lists republished as the statistics change.

pub mod backfill;
pub mod config;
pub mod decode;
pub mod demo;
pub mod diskspace;
pub mod drift;
pub mod engine;
pub mod evaluate;
pub mod event;
pub mod export;
pub mod health;
pub mod http;
pub mod inspect;
pub mod kafka;
pub mod live;
pub mod log_limit;
pub mod lookup;
pub mod meter;
pub mod metrics;
pub mod observe;
pub mod pipeline;
pub mod publish;
pub mod recommend;
pub mod record;
pub mod report;
pub mod score;
pub mod signal;
pub mod source;
pub mod status;
pub mod store;
pub mod timefmt;
pub mod topic_backfill;
