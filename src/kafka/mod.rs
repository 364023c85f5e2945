//! Everything that speaks Kafka: client construction and logging, the producer that
//! knows what was delivered, and topic creation. Nothing here knows similarity maths.

pub mod client;
pub mod producer;
pub mod topics;
