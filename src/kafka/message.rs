//! A consumed message as the rest of simtide sees it: owned bytes and plain numbers,
//! copied out of librdkafka's buffer at the adapter boundary.

use rdkafka::message::{BorrowedMessage, Headers, Message};

use crate::event::UnixMillis;

/// A consumed message, copied out of the client's buffer.
#[derive(Debug, Clone, PartialEq)]
pub struct InMessage {
    /// Partition it came from.
    pub partition: i32,
    /// Its offset.
    pub offset: i64,
    /// Record key (the user id by contract).
    pub key: Option<Vec<u8>>,
    /// Record value (one JSON event).
    pub value: Option<Vec<u8>>,
    /// Record headers, in order.
    pub headers: Vec<(String, Vec<u8>)>,
    /// Record timestamp, when the broker gave one.
    pub timestamp: Option<UnixMillis>,
}

impl InMessage {
    /// Copies a consumed message out of the client's buffer.
    pub fn copied_from(m: &BorrowedMessage<'_>) -> InMessage {
        let headers = m
            .headers()
            .map(|h| {
                h.iter()
                    .map(|header| (header.key.to_string(), header.value.unwrap_or_default().to_vec()))
                    .collect()
            })
            .unwrap_or_default();
        InMessage {
            partition: m.partition(),
            offset: m.offset(),
            key: m.key().map(<[u8]>::to_vec),
            value: m.payload().map(<[u8]>::to_vec),
            headers,
            timestamp: m.timestamp().to_millis().map(UnixMillis),
        }
    }
}
