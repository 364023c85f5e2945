//! `simtide backfill --from-topic`: replays the input topic itself, from the store's
//! positions (or the earliest retained offsets) to the end it had when the run began,
//! then publishes and exits. Positions are stored per partition exactly as the live
//! service stores them, so `simtide run` continues where the backfill stopped.

use std::collections::BTreeMap;
use std::io::Write;
use std::time::{Duration, Instant};

use anyhow::{Context, Result};
use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::{Offset, TopicPartitionList};
use serde_json::json;

use crate::backfill::{open_rejects, publish_at_end, record_batch, BackfillRequest, BackfillSummary};
use crate::config::secrets::Scrubber;
use crate::decode::Limits;
use crate::engine::EngineSettings;
use crate::kafka::client::{base_config, describe_error, BrokerState, BusContext};
use crate::live::batch::PendingBatch;
use crate::live::consumer::copy_message;
use crate::live::handover::{offsets_client, partitions_of};
use crate::meter::Meter;
use crate::pipeline::apply_and_commit;
use crate::store::{rejects_path, Store};

/// How long one watermark request may take.
const REQUEST_TIMEOUT: Duration = Duration::from_secs(15);

/// Where each partition starts and where this run stops.
fn plan(store: &Store, client: &BaseConsumer<BusContext>, topic: &str) -> Result<BTreeMap<i32, (i64, i64)>> {
    let stored = store.progress().offsets.get(topic).cloned().unwrap_or_default();
    let mut out = BTreeMap::new();
    for p in partitions_of(client, topic)? {
        let (low, high) = client
            .fetch_watermarks(topic, p, REQUEST_TIMEOUT)
            .with_context(|| format!("cannot read the offsets of {topic} partition {p}"))?;
        let start = stored.get(&p).copied().unwrap_or(low).max(low);
        out.insert(p, (start, high));
    }
    Ok(out)
}

/// One line of the rejects file for a refused message.
fn reject_line(topic: &str, rejected: &crate::live::batch::Rejected) -> String {
    let m = &rejected.message;
    json!({
        "source": topic,
        "partition": m.partition,
        "offset": m.offset,
        "field": rejected.rejection.field,
        "reason": rejected.rejection.reason.code(),
        "detail": rejected.rejection.detail,
        "raw": String::from_utf8_lossy(m.value.as_deref().unwrap_or_default()),
    })
    .to_string()
}

/// Replays the input topic of `request.config` into the store, then publishes.
pub fn run_topic_backfill(request: &BackfillRequest) -> Result<BackfillSummary> {
    let config = &request.config;
    let kafka = &config.kafka;
    let topic = kafka.input_topic.as_str();
    let started = Instant::now();
    let bus = BusContext::new(
        std::sync::Arc::new(BrokerState::default()),
        Scrubber::of(config).into(),
    );
    let mut store = Store::open(&request.store_dir, config)?;
    let client = offsets_client(kafka, &bus)?;
    let ranges = plan(&store, &client, topic)?;
    let total: u64 = ranges.values().map(|(s, e)| (e - s).max(0) as u64).sum();
    tracing::info!(topic, messages = total, "replaying the topic to its current end");

    let mut consumer_config = base_config(kafka);
    consumer_config.set("group.id", format!("{}-backfill", kafka.group));
    consumer_config.set("enable.auto.commit", "false");
    let consumer: BaseConsumer<BusContext> = consumer_config
        .create_with_context(bus.clone())
        .map_err(|e| describe_error(bus.scrubber(), "cannot create the Kafka consumer", &e))?;
    let mut assignment = TopicPartitionList::new();
    for (&p, &(start, end)) in &ranges {
        if start < end {
            assignment.add_partition_offset(topic, p, Offset::Offset(start))?;
        }
    }
    consumer.assign(&assignment)?;

    let settings = EngineSettings::from_config(config);
    let limits = Limits::from_config(config);
    let batch_len = config.backfill.batch_events as usize;
    let mut rejects_file = open_rejects(&store)?;
    let mut summary = BackfillSummary {
        rejects_file: rejects_path(store.dir()),
        ..BackfillSummary::default()
    };
    let mut meter = Meter::new("backfill", total, false, request.show_progress);
    let mut remaining: BTreeMap<i32, i64> = ranges
        .iter()
        .filter(|(_, (s, e))| s < e)
        .map(|(&p, &(_, e))| (p, e))
        .collect();
    let mut pending = PendingBatch::default();
    let mut consumed = 0u64;
    while !remaining.is_empty() || !pending.is_empty() {
        let message = if remaining.is_empty() {
            None
        } else {
            consumer.poll(Duration::from_millis(500)).transpose()?
        };
        if message.is_none() && !remaining.is_empty() {
            // Compaction or transaction markers can leave a partition's last offsets
            // without a message: the position, not the last message, says it is done.
            for element in consumer.position()?.elements() {
                if let (Offset::Offset(at), Some(&end)) =
                    (element.offset(), remaining.get(&element.partition()))
                {
                    if at >= end {
                        remaining.remove(&element.partition());
                    }
                }
            }
        }
        if let Some(m) = message {
            let copied = copy_message(&m);
            let (p, next) = (copied.partition, copied.offset + 1);
            if remaining.get(&p).is_some_and(|&end| copied.offset < end) {
                pending.take(copied, &limits);
                consumed += 1;
            }
            if remaining.get(&p).is_some_and(|&end| next >= end) {
                remaining.remove(&p);
            }
        }
        if pending.messages >= batch_len || (remaining.is_empty() && !pending.is_empty()) {
            let batch = std::mem::take(&mut pending);
            let mut text = String::new();
            for r in &batch.rejected {
                text.push_str(&reject_line(topic, r));
                text.push('\n');
            }
            rejects_file.write_all(text.as_bytes())?;
            rejects_file.flush()?;
            let rejects_len = rejects_file.metadata()?.len();
            let rejects = batch.reject_counts();
            let commit_started = Instant::now();
            let committed = apply_and_commit(&mut store, &settings, &batch.events, &rejects, |p| {
                let stored = p.offsets.entry(topic.to_string()).or_default();
                stored.extend(batch.next_offsets.iter().map(|(&k, &v)| (k, v)));
                p.rejects_file_len = rejects_len;
            })?;
            record_batch(
                request,
                &mut summary,
                &committed,
                rejects,
                batch.messages,
                commit_started,
            );
            let elapsed = started.elapsed().as_secs_f64().max(1e-9);
            meter.update(consumed, &format!("{:.0} events/s", consumed as f64 / elapsed));
        }
    }
    meter.finish();
    drop(consumer);
    summary.apply_seconds = started.elapsed().as_secs_f64();
    publish_at_end(&store, request, &mut summary)?;
    Ok(summary)
}
