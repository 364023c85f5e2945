//! The batch of consumed messages being collected (by the service and the topic
//! backfill): each decoded into an event or a rejection, with the next offset of every
//! partition they came from. Knows nothing of rdkafka; the consumer hands it plain
//! `InMessage`s.

use std::collections::BTreeMap;
use std::time::Instant;

use crate::decode::json::decode_json_line;
use crate::decode::{refuse_if_ahead, Limits, RejectReason, Rejection};
use crate::event::{Event, UnixMillis, UnixNanos};
use crate::kafka::message::InMessage;
use crate::kafka::producer::OutRecord;
use crate::timefmt::{now_nanos, NANOS_PER_MILLI};

/// A message that failed validation, kept whole for the dead-letter topic.
#[derive(Debug, Clone)]
pub struct Rejected {
    /// The original message.
    pub message: InMessage,
    /// Why it was refused.
    pub rejection: Rejection,
    /// Whether it looks like an erasure (its text names `erase_user`): a refused
    /// erasure leaves a person's data in place, so it is alerted, not only counted.
    pub erasure: bool,
}

/// Whether a refused message's value names the erasure kind. Deliberately loose: a
/// malformed erasure cannot be decoded, and a false alarm costs less than a missed one.
fn looks_like_erasure(value: Option<&[u8]>) -> bool {
    value.is_some_and(|v| v.windows(b"erase_user".len()).any(|w| w == b"erase_user"))
}

/// Header names on dead letters: the reason and where the original came from.
pub mod dead_letter_headers {
    /// Reason code (as counted).
    pub const REASON: &str = "simtide-reject-reason";
    /// The field at fault.
    pub const FIELD: &str = "simtide-reject-field";
    /// Human-readable detail.
    pub const DETAIL: &str = "simtide-reject-detail";
    /// Source topic.
    pub const TOPIC: &str = "simtide-source-topic";
    /// Source partition (decimal).
    pub const PARTITION: &str = "simtide-source-partition";
    /// Source offset (decimal).
    pub const OFFSET: &str = "simtide-source-offset";
}

impl Rejected {
    /// The dead-letter record: original key, value and headers, plus headers naming the
    /// reason and the source position. A message refused as too large keeps none of its
    /// content: its dead letter describes it (partition, offset, size, reason), since the
    /// content could not be produced again and is not needed to find it in the log.
    pub fn dead_letter(&self, source_topic: &str, dead_letter_topic: &str) -> OutRecord {
        use dead_letter_headers as h;
        let m = &self.message;
        let too_large = self.rejection.reason == RejectReason::TooLarge;
        let mut headers = if too_large { Vec::new() } else { m.headers.clone() };
        headers.extend([
            (
                h::REASON.to_string(),
                self.rejection.reason.code().as_bytes().to_vec(),
            ),
            (h::FIELD.to_string(), self.rejection.field.as_bytes().to_vec()),
            (h::DETAIL.to_string(), self.rejection.detail.as_bytes().to_vec()),
            (h::TOPIC.to_string(), source_topic.as_bytes().to_vec()),
            (h::PARTITION.to_string(), m.partition.to_string().into_bytes()),
            (h::OFFSET.to_string(), m.offset.to_string().into_bytes()),
        ]);
        let (key, value) = if too_large {
            let description = serde_json::json!({
                "topic": source_topic,
                "partition": m.partition,
                "offset": m.offset,
                "reason": self.rejection.reason.code(),
                "detail": self.rejection.detail,
            });
            (Vec::new(), description.to_string().into_bytes())
        } else {
            (
                m.key.clone().unwrap_or_default(),
                m.value.clone().unwrap_or_default(),
            )
        };
        OutRecord {
            topic: dead_letter_topic.to_string(),
            key,
            value: Some(value),
            headers,
        }
    }
}

/// The bytes a message takes: key, value and headers.
fn message_bytes(m: &InMessage) -> usize {
    let key = m.key.as_ref().map_or(0, Vec::len);
    let value = m.value.as_ref().map_or(0, Vec::len);
    let headers: usize = m.headers.iter().map(|(n, v)| n.len() + v.len()).sum();
    key + value + headers
}

/// Decodes a message into an event, refusing one larger than `input.max_message_bytes`
/// or dated too far after its record timestamp (the clock when it has none).
fn decode_checked(message: &InMessage, limits: &Limits) -> Result<Event, Rejection> {
    let bytes = message_bytes(message);
    if bytes > limits.max_record_bytes {
        return Err(Rejection::new(
            "(record)",
            RejectReason::TooLarge,
            format!(
                "the message takes {bytes} bytes, more than input.max_message_bytes = {}",
                limits.max_record_bytes
            ),
        ));
    }
    let event = decode_message(message.value.as_deref(), limits)?;
    let read_at = message
        .timestamp
        .map_or_else(now_nanos, |t| UnixNanos(t.0.saturating_mul(NANOS_PER_MILLI)));
    refuse_if_ahead(&event, read_at, limits)?;
    Ok(event)
}

/// Decodes one message value into an event.
pub fn decode_message(value: Option<&[u8]>, limits: &Limits) -> Result<Event, Rejection> {
    let Some(bytes) = value else {
        return Err(Rejection::new(
            "(record)",
            RejectReason::BadJson,
            "the message has no value",
        ));
    };
    let text = std::str::from_utf8(bytes)
        .map_err(|_| Rejection::new("(record)", RejectReason::BadJson, "the message is not UTF-8"))?;
    decode_json_line(text, limits)
}

/// The batch being collected.
#[derive(Debug, Default)]
pub struct MessageBatch {
    /// Valid events, in consumption order.
    pub events: Vec<Event>,
    /// Refused messages.
    pub rejected: Vec<Rejected>,
    /// Next offset per partition after the messages taken.
    pub next_offsets: BTreeMap<i32, i64>,
    /// Messages taken (events + rejected).
    pub messages: usize,
    /// Record timestamps of the messages taken, for event-to-publication latency.
    pub timestamps: Vec<UnixMillis>,
    /// When the first message was taken.
    pub opened: Option<Instant>,
}

impl MessageBatch {
    /// Decodes and takes one message.
    pub fn take(&mut self, message: InMessage, limits: &Limits) {
        self.opened.get_or_insert_with(Instant::now);
        self.messages += 1;
        // The last message wins, not the largest offset: a partition moved back to the
        // start of a replaced log must store the new log's position.
        self.next_offsets.insert(message.partition, message.offset + 1);
        if let Some(t) = message.timestamp {
            self.timestamps.push(t);
        }
        match decode_checked(&message, limits) {
            Ok(event) => self.events.push(event),
            Err(rejection) => {
                let erasure = looks_like_erasure(message.value.as_deref());
                let message = if rejection.reason == RejectReason::TooLarge {
                    // Only its place is kept: the dead letter describes it.
                    InMessage {
                        key: None,
                        value: None,
                        headers: Vec::new(),
                        ..message
                    }
                } else {
                    message
                };
                tracing::debug!(
                    partition = message.partition,
                    offset = message.offset,
                    reason = rejection.reason.code(),
                    field = rejection.field,
                    "message refused"
                );
                self.rejected.push(Rejected {
                    message,
                    rejection,
                    erasure,
                });
            }
        }
    }

    /// Whether nothing was taken.
    pub fn is_empty(&self) -> bool {
        self.messages == 0
    }

    /// Refused messages that look like erasures.
    pub fn rejected_erasures(&self) -> usize {
        self.rejected.iter().filter(|r| r.erasure).count()
    }

    /// Refused messages by reason.
    pub fn reject_counts(&self) -> BTreeMap<RejectReason, u64> {
        let mut out = BTreeMap::new();
        for r in &self.rejected {
            *out.entry(r.rejection.reason).or_default() += 1;
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn message(partition: i32, offset: i64, value: &[u8]) -> InMessage {
        InMessage {
            partition,
            offset,
            key: Some(b"u1".to_vec()),
            value: Some(value.to_vec()),
            headers: vec![("origin".into(), b"checkout".to_vec())],
            // 2026-06-01T00:00:00Z, after the events the tests send.
            timestamp: Some(UnixMillis(1_780_272_000_000)),
        }
    }

    #[test]
    fn offsets_advance_past_every_message_and_rejections_keep_the_original() {
        let limits = crate::config::Config::default().limits();
        let mut b = MessageBatch::default();
        let good = br#"{"kind":"rating","user":"u1","item":"rake","value":4,"at":"2026-05-01T10:00:00Z"}"#;
        b.take(message(0, 7, good), &limits);
        b.take(message(0, 8, b"{not json"), &limits);
        b.take(message(2, 3, &[0xff, 0xfe]), &limits);
        assert_eq!(b.events.len(), 1);
        assert_eq!(b.next_offsets, BTreeMap::from([(0, 9), (2, 4)]));
        assert_eq!(b.reject_counts(), BTreeMap::from([(RejectReason::BadJson, 2)]));
        let dl = b.rejected[0].dead_letter("shop-events", "dlq");
        assert_eq!(dl.value.as_deref(), Some(&b"{not json"[..]));
        assert_eq!(dl.headers[0], ("origin".to_string(), b"checkout".to_vec()));
        let header = |name: &str| {
            dl.headers
                .iter()
                .find(|(n, _)| n == name)
                .map(|(_, v)| String::from_utf8(v.clone()).unwrap())
        };
        assert_eq!(header(dead_letter_headers::REASON).as_deref(), Some("bad_json"));
        assert_eq!(header(dead_letter_headers::OFFSET).as_deref(), Some("8"));
        assert_eq!(header(dead_letter_headers::TOPIC).as_deref(), Some("shop-events"));
    }

    #[test]
    fn an_oversized_message_is_dead_lettered_as_a_description_without_content() {
        let mut limits = crate::config::Config::default().limits();
        limits.max_record_bytes = 2048;
        let mut b = MessageBatch::default();
        let big = vec![b'x'; 4096];
        b.take(message(1, 40, &big), &limits);
        let good = br#"{"kind":"rating","user":"u1","item":"rake","value":4,"at":"2026-05-01T10:00:00Z"}"#;
        b.take(message(1, 41, good), &limits);
        assert_eq!(b.events.len(), 1, "the event after it is taken");
        assert_eq!(b.reject_counts(), BTreeMap::from([(RejectReason::TooLarge, 1)]));
        let dl = b.rejected[0].dead_letter("shop-events", "dlq");
        let value = String::from_utf8(dl.value.clone().unwrap()).unwrap();
        assert!(dl.key.is_empty() && !value.contains("xxxx"), "{value}");
        let described: serde_json::Value = serde_json::from_str(&value).unwrap();
        assert_eq!(described["offset"], 40);
        assert_eq!(described["reason"], "too_large");
        assert!(
            described["detail"].as_str().unwrap().contains("4112 bytes"),
            "{described}"
        );
        assert!(
            dl.headers.iter().all(|(n, _)| n.starts_with("simtide-")),
            "the original headers stay out too"
        );
    }

    #[test]
    fn an_event_far_after_its_record_timestamp_is_refused_and_the_next_taken() {
        let limits = crate::config::Config::default().limits();
        let mut b = MessageBatch::default();
        let bomb = br#"{"kind":"rating","user":"u1","item":"rake","value":4,"at":"2261-01-01T00:00:00Z"}"#;
        let fine = br#"{"kind":"rating","user":"u1","item":"rake","value":2,"at":"2026-06-01T00:59:00Z"}"#;
        b.take(message(0, 1, bomb), &limits);
        b.take(message(0, 2, fine), &limits);
        assert_eq!(b.events.len(), 1);
        assert_eq!(b.rejected[0].rejection.reason, RejectReason::TooFarAhead);
        assert_eq!(b.rejected[0].rejection.field, "at");
        assert_eq!(b.rejected_erasures(), 0);
        b.take(
            message(0, 3, br#"{"kind":"erase_user","user":"u1","at":"yesterday"}"#),
            &limits,
        );
        assert_eq!(b.rejected_erasures(), 1, "a refused erasure is told apart");
    }
}
