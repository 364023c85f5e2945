//! The micro-batch being collected: consumed messages decoded into events or rejections,
//! and the next offset of every partition they came from. Knows nothing of rdkafka; the
//! consumer hands it plain [`InMessage`]s.

use std::collections::BTreeMap;
use std::time::Instant;

use crate::decode::json::decode_json_line;
use crate::decode::{Limits, RejectReason, Rejection};
use crate::event::{Event, UnixMillis};
use crate::kafka::message::InMessage;
use crate::kafka::producer::OutRecord;

/// A message that failed validation, kept whole for the dead-letter topic.
#[derive(Debug, Clone)]
pub struct Rejected {
    /// The original message.
    pub message: InMessage,
    /// Why it was refused.
    pub rejection: Rejection,
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
    /// reason and the source position.
    pub fn dead_letter(&self, source_topic: &str, dead_letter_topic: &str) -> OutRecord {
        use dead_letter_headers as h;
        let m = &self.message;
        let mut headers = m.headers.clone();
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
        OutRecord {
            topic: dead_letter_topic.to_string(),
            key: m.key.clone().unwrap_or_default(),
            value: Some(m.value.clone().unwrap_or_default()),
            headers,
        }
    }
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
pub struct PendingBatch {
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

impl PendingBatch {
    /// Decodes and takes one message.
    pub fn take(&mut self, message: InMessage, limits: &Limits) {
        self.opened.get_or_insert_with(Instant::now);
        self.messages += 1;
        let next = self
            .next_offsets
            .entry(message.partition)
            .or_insert(message.offset + 1);
        *next = (*next).max(message.offset + 1);
        if let Some(t) = message.timestamp {
            self.timestamps.push(t);
        }
        match decode_message(message.value.as_deref(), limits) {
            Ok(event) => self.events.push(event),
            Err(rejection) => {
                tracing::debug!(
                    partition = message.partition,
                    offset = message.offset,
                    reason = rejection.reason.code(),
                    field = rejection.field,
                    "message refused"
                );
                self.rejected.push(Rejected { message, rejection });
            }
        }
    }

    /// Whether nothing was taken.
    pub fn is_empty(&self) -> bool {
        self.messages == 0
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
            timestamp: Some(UnixMillis(1000)),
        }
    }

    #[test]
    fn offsets_advance_past_every_message_and_rejections_keep_the_original() {
        let limits = crate::config::Config::default().limits();
        let mut b = PendingBatch::default();
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
}
