//! Topic backfill (`backfill --from-topic`): replays the input topic from the store's
//! positions (or the earliest retained offsets) to the end it had when the run began.
//! Positions are stored per partition exactly as the live service stores them, so
//! `simtide run` continues where the backfill stopped.

use std::sync::Arc;

use anyhow::Result;

use super::writer::{BatchWriter, ReadBatch, RecordOrigin};
use super::{BackfillRequest, BackfillSummary};
use crate::config::secrets::Scrubber;
use crate::kafka::client::{BrokerState, BusContext};
use crate::kafka::offsets::OffsetsClient;
use crate::kafka::replay::{ReplayPlan, TopicReplay};
use crate::observability::meter::{Display, Meter, Unit};
use crate::pipeline::messages::MessageBatch;
use crate::store::PairWrite;

/// Replays the input topic of `request.config` into the store, then publishes.
pub fn backfill_topic(request: &BackfillRequest) -> Result<BackfillSummary> {
    let config = &request.config;
    let kafka = &config.kafka;
    let topic = kafka.input_topic.as_str();
    let bus = BusContext::new(Arc::new(BrokerState::default()), Scrubber::of(config).into());
    let mut writer = BatchWriter::open(request, PairWrite::InBatch)?;
    let stored = writer
        .store()
        .ledger()
        .offsets
        .get(topic)
        .cloned()
        .unwrap_or_default();
    let plan = ReplayPlan::to_current_end(
        &OffsetsClient::new(kafka, &bus)?,
        topic,
        &stored,
        kafka.position_outside_log,
    )?;
    writer.note_offsets_skipped(plan.skipped);
    tracing::info!(
        topic,
        messages = plan.messages(),
        "replaying the topic to its current end"
    );
    let mut replay = TopicReplay::start(kafka, &bus, topic, &plan)?;

    let limits = config.limits();
    let batch_len = config.backfill.batch_events as usize;
    let mut meter = Meter::new(
        "backfill",
        plan.messages(),
        Unit::Items,
        Display::when(request.show_progress),
    );
    let mut collecting = MessageBatch::default();
    let mut consumed = 0u64;
    while !replay.finished() || !collecting.is_empty() {
        if let Some(message) = replay.next_message()? {
            collecting.take(message, &limits);
            consumed += 1;
        }
        if collecting.messages >= batch_len || (replay.finished() && !collecting.is_empty()) {
            let mut taken = std::mem::take(&mut collecting);
            let next_offsets = std::mem::take(&mut taken.next_offsets);
            let batch = read_batch(taken, topic, config.backfill.rejects_keep_text);
            writer.apply(batch, |p| {
                let stored = p.offsets.entry(topic.to_string()).or_default();
                stored.extend(next_offsets);
            })?;
            meter.update(consumed, &format!("{:.0} events/s", writer.records_per_second()));
        }
    }
    meter.finish();
    drop(replay);
    writer.finish()
}

/// What the consumer collected, as the one batch every backfill hands its writer: the
/// events move over, each refused message becomes a rejects-file line naming its
/// partition and offset (its text only with `keep_text`).
fn read_batch(taken: MessageBatch, topic: &str, keep_text: bool) -> ReadBatch {
    let mut batch = ReadBatch {
        records: taken.messages,
        ..ReadBatch::default()
    };
    for r in &taken.rejected {
        let m = &r.message;
        let origin = RecordOrigin::Topic {
            partition: m.partition,
            offset: m.offset,
        };
        let raw = keep_text.then(|| String::from_utf8_lossy(m.value.as_deref().unwrap_or_default()));
        batch.reject(topic, origin, &r.rejection, raw.as_deref());
    }
    batch.events = taken.events;
    batch
}
