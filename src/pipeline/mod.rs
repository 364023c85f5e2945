//! The path every event takes, shared by the service, the backfill and the evaluation,
//! in one vocabulary:
//! 1. a [`messages::MessageBatch`] collects consumed Kafka messages (the service, the topic
//!    backfill) decoded into events and rejections, with the next offset of each
//!    partition. Every backfill hands its writer a `backfill::writer::ReadBatch` (events,
//!    rejects-file lines, records read): a file backfill fills it from lines, the topic
//!    backfill from a `MessageBatch` whose events it moves over;
//! 2. each batch's events are applied to an [`segment::OpenSegment`]: ids assigned,
//!    histories loaded once, pair deltas summed, the ledger kept with the positions;
//! 3. the segment is sealed ([`segment::SealedSegment`]: deltas summed and sorted) and
//!    written to the store in one write;
//! 4. [`publish`] rescores the lists of the items that write changed.

pub mod messages;
pub mod publish;
pub mod segment;
