//! The live service on the real broker (tansu), and on librdkafka's mock cluster for
//! injected faults.

mod mock_cluster;
mod never_silent;
mod service;
mod shards;
mod standby;
