//! Decoding and validation of events (docs/design.md, "Events") from JSON lines and CSV records.
//!
//! Both formats feed the same [`build_event`], so a rule (id length, scale, time format)
//! is written once and a rejection names the same field whatever the format.

pub mod csv_records;
pub mod json;

use std::fmt;

use crate::event::{Event, EventBody, EventKind, UnixNanos};
use crate::timefmt::{format_rfc3339, parse_event_time, NANOS_PER_SECOND};

/// Why an input record was refused; the `code` is what counters are labelled with.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum RejectReason {
    /// The line is not a JSON object (or not UTF-8).
    BadJson,
    /// The CSV record has the wrong number of fields or is not UTF-8.
    BadCsv,
    /// A field the kind requires is absent.
    MissingField,
    /// A field has the wrong JSON type.
    WrongType,
    /// An id is the empty string.
    EmptyId,
    /// An id is longer than `input.max_id_bytes`.
    IdTooLong,
    /// A number is NaN or infinite.
    NotFinite,
    /// A rating lies outside `[rating_min, rating_max]`.
    OutOfScale,
    /// `kind` names no known event kind.
    UnknownKind,
    /// `at` is neither RFC 3339 nor integer Unix seconds, or out of range.
    BadTime,
    /// `quantity` is not a positive whole number.
    BadQuantity,
    /// The message is larger than `input.max_message_bytes`.
    TooLarge,
    /// `at` lies further after the record's own time than `input.max_future_skew`.
    TooFarAhead,
}

impl RejectReason {
    /// Every reason, for complete counter listings.
    pub const ALL: [RejectReason; 13] = [
        RejectReason::BadJson,
        RejectReason::BadCsv,
        RejectReason::MissingField,
        RejectReason::WrongType,
        RejectReason::EmptyId,
        RejectReason::IdTooLong,
        RejectReason::NotFinite,
        RejectReason::OutOfScale,
        RejectReason::UnknownKind,
        RejectReason::BadTime,
        RejectReason::BadQuantity,
        RejectReason::TooLarge,
        RejectReason::TooFarAhead,
    ];

    /// Stable snake_case name used in counters, rejects files and summaries.
    pub fn code(self) -> &'static str {
        match self {
            RejectReason::BadJson => "bad_json",
            RejectReason::BadCsv => "bad_csv",
            RejectReason::MissingField => "missing_field",
            RejectReason::WrongType => "wrong_type",
            RejectReason::EmptyId => "empty_id",
            RejectReason::IdTooLong => "id_too_long",
            RejectReason::NotFinite => "not_finite",
            RejectReason::OutOfScale => "out_of_scale",
            RejectReason::UnknownKind => "unknown_kind",
            RejectReason::BadTime => "bad_time",
            RejectReason::BadQuantity => "bad_quantity",
            RejectReason::TooLarge => "too_large",
            RejectReason::TooFarAhead => "too_far_ahead",
        }
    }
}

/// A refused record: which field, why, and a sentence for people.
#[derive(Debug, Clone, PartialEq)]
pub struct Rejection {
    /// The offending field (`(record)` when the record as a whole is malformed).
    pub field: &'static str,
    /// The counted reason.
    pub reason: RejectReason,
    /// What exactly was wrong, without echoing the whole payload.
    pub detail: String,
}

impl Rejection {
    /// Builds a rejection.
    pub fn new(field: &'static str, reason: RejectReason, detail: impl Into<String>) -> Self {
        Rejection {
            field,
            reason,
            detail: detail.into(),
        }
    }
}

impl fmt::Display for Rejection {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "field `{}`: {} ({})",
            self.field,
            self.detail,
            self.reason.code()
        )
    }
}

/// The validation limits an event must meet (set by the configuration's `[input]` and
/// `[similarity]` sections).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Limits {
    /// Longest id in bytes.
    pub max_id_bytes: usize,
    /// Lowest valid rating.
    pub rating_min: f64,
    /// Highest valid rating.
    pub rating_max: f64,
    /// Largest accepted message, in bytes of key, value and headers
    /// (`input.max_message_bytes`; Kafka messages only).
    pub max_record_bytes: usize,
    /// Longest time, in nanoseconds, an event's `at` may lie after the time it is read
    /// against (the record's timestamp, or the clock for files).
    pub max_future_skew_ns: i64,
}

/// Refuses `event` when its `at` lies more than `limits.max_future_skew_ns` after
/// `reference`: the broker's timestamp of the record it came in, or the clock when a file
/// is read. The newest `at` wins per user and item, so one event dated decades ahead
/// would pin an item (or, as an erasure, silence a user) until then.
pub fn refuse_if_ahead(event: &Event, reference: UnixNanos, limits: &Limits) -> Result<(), Rejection> {
    let ahead = event.at.0.saturating_sub(reference.0);
    if ahead <= limits.max_future_skew_ns {
        return Ok(());
    }
    Err(Rejection::new(
        "at",
        RejectReason::TooFarAhead,
        format!(
            "{} is {}s after the time it was read against ({}: the record's timestamp, or the clock for a file), more than input.max_future_skew = {}s",
            format_rfc3339(event.at),
            ahead / NANOS_PER_SECOND,
            format_rfc3339(reference),
            limits.max_future_skew_ns / NANOS_PER_SECOND
        ),
    ))
}

/// A record's fields, as either decoder sees them. Each accessor returns `Ok(None)` when
/// the field is absent and a [`Rejection`] naming the field when it has the wrong type.
pub trait FieldSource {
    /// A text field.
    fn text(&self, field: &'static str) -> Result<Option<String>, Rejection>;
    /// A numeric field.
    fn number(&self, field: &'static str) -> Result<Option<f64>, Rejection>;
    /// A boolean field.
    fn boolean(&self, field: &'static str) -> Result<Option<bool>, Rejection>;
    /// The event time: RFC 3339 text or integer Unix seconds.
    fn time(&self, field: &'static str) -> Result<Option<UnixNanos>, Rejection>;
}

fn required<T>(value: Option<T>, field: &'static str, kind: EventKind) -> Result<T, Rejection> {
    value.ok_or_else(|| {
        Rejection::new(
            field,
            RejectReason::MissingField,
            format!("required for kind {}", kind.as_str()),
        )
    })
}

fn checked_id(
    fields: &dyn FieldSource,
    field: &'static str,
    kind: EventKind,
    limits: &Limits,
) -> Result<String, Rejection> {
    let id = required(fields.text(field)?, field, kind)?;
    if id.is_empty() {
        return Err(Rejection::new(field, RejectReason::EmptyId, "must not be empty"));
    }
    if id.len() > limits.max_id_bytes {
        return Err(Rejection::new(
            field,
            RejectReason::IdTooLong,
            format!("{} bytes, limit is {}", id.len(), limits.max_id_bytes),
        ));
    }
    Ok(id)
}

/// Parses a time string for [`FieldSource::time`] implementations.
pub fn time_from_text(field: &'static str, text: &str) -> Result<UnixNanos, Rejection> {
    parse_event_time(text).ok_or_else(|| {
        Rejection::new(
            field,
            RejectReason::BadTime,
            "expected RFC 3339 (e.g. 2026-05-01T10:00:00Z) or integer Unix seconds",
        )
    })
}

/// Validates a record of the given kind and turns it into an [`Event`].
pub fn build_event(kind_name: &str, fields: &dyn FieldSource, limits: &Limits) -> Result<Event, Rejection> {
    let kind = EventKind::parse(kind_name).ok_or_else(|| {
        let shown: String = kind_name.chars().take(40).collect();
        Rejection::new(
            "kind",
            RejectReason::UnknownKind,
            format!("unknown kind {shown:?}; expected rating, unrating, purchase, erase_user or item_status"),
        )
    })?;
    let at = required(fields.time("at")?, "at", kind)?;
    let body = match kind {
        EventKind::Rating => {
            let user = checked_id(fields, "user", kind, limits)?;
            let item = checked_id(fields, "item", kind, limits)?;
            let value = required(fields.number("value")?, "value", kind)?;
            if !value.is_finite() {
                return Err(Rejection::new(
                    "value",
                    RejectReason::NotFinite,
                    "must be a finite number",
                ));
            }
            if value < limits.rating_min || value > limits.rating_max {
                return Err(Rejection::new(
                    "value",
                    RejectReason::OutOfScale,
                    format!(
                        "{value} is outside the rating scale {}–{}",
                        limits.rating_min, limits.rating_max
                    ),
                ));
            }
            EventBody::Rating { user, item, value }
        }
        EventKind::Unrating => EventBody::Unrating {
            user: checked_id(fields, "user", kind, limits)?,
            item: checked_id(fields, "item", kind, limits)?,
        },
        EventKind::Purchase => {
            let user = checked_id(fields, "user", kind, limits)?;
            let item = checked_id(fields, "item", kind, limits)?;
            if let Some(q) = fields.number("quantity")? {
                if !(q.is_finite() && q >= 1.0 && q.fract() == 0.0) {
                    return Err(Rejection::new(
                        "quantity",
                        RejectReason::BadQuantity,
                        "must be a whole number ≥ 1",
                    ));
                }
            }
            EventBody::Purchase { user, item }
        }
        EventKind::EraseUser => EventBody::EraseUser {
            user: checked_id(fields, "user", kind, limits)?,
        },
        EventKind::ItemStatus => EventBody::ItemStatus {
            item: checked_id(fields, "item", kind, limits)?,
            available: required(fields.boolean("available")?, "available", kind)?,
        },
    };
    Ok(Event { at, body })
}
