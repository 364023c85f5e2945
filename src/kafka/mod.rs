//! Everything that speaks Kafka: client construction and logging (`client`), the message
//! copied out at the boundary (`message`), partitions and offsets (`offsets`), positions
//! the log no longer holds (`outside_log`), the group
//! consumer with its rebalance handler (`group`), the publishing lease of standby replicas
//! (`lease`), replaying a topic to its end (`replay`), a list topic read as a table
//! (`list_table`),
//! the producer that knows what was delivered (`producer`), topic creation and checks
//! (`topics`), and the in-process cluster of the demo (`in_process`). Nothing here knows
//! similarity maths or the store.

pub mod client;
pub mod group;
pub mod in_process;
pub mod lease;
pub mod list_table;
pub mod message;
pub mod offsets;
pub mod outside_log;
pub mod producer;
pub mod replay;
pub mod topics;
