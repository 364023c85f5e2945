//! JSON-lines decoding: one JSON object per line, unknown fields ignored.

use serde::Deserialize;
use serde_json::value::RawValue;

use super::{build_event, time_from_text, FieldSource, Limits, RejectReason, Rejection};
use crate::event::{Event, UnixNanos};
use crate::timefmt::unix_seconds_to_nanos;

/// The contract's fields, kept as raw JSON so each can be checked with a message that
/// names it. Fields not listed here are ignored, as the contract requires.
#[derive(Deserialize)]
struct JsonFields<'a> {
    #[serde(borrow, default)]
    kind: Option<&'a RawValue>,
    #[serde(borrow, default)]
    user: Option<&'a RawValue>,
    #[serde(borrow, default)]
    item: Option<&'a RawValue>,
    #[serde(borrow, default)]
    value: Option<&'a RawValue>,
    #[serde(borrow, default)]
    at: Option<&'a RawValue>,
    #[serde(borrow, default)]
    quantity: Option<&'a RawValue>,
    #[serde(borrow, default)]
    available: Option<&'a RawValue>,
}

impl<'a> JsonFields<'a> {
    fn raw(&self, field: &'static str) -> Option<&'a RawValue> {
        let raw = match field {
            "kind" => self.kind,
            "user" => self.user,
            "item" => self.item,
            "value" => self.value,
            "at" => self.at,
            "quantity" => self.quantity,
            "available" => self.available,
            _ => None,
        }?;
        // An explicit null counts as absent.
        (raw.get() != "null").then_some(raw)
    }

    fn typed<T: serde::de::DeserializeOwned>(
        &self,
        field: &'static str,
        expected: &str,
    ) -> Result<Option<T>, Rejection> {
        match self.raw(field) {
            None => Ok(None),
            Some(raw) => serde_json::from_str(raw.get())
                .map(Some)
                .map_err(|_| Rejection::new(field, RejectReason::WrongType, format!("expected {expected}"))),
        }
    }
}

impl FieldSource for JsonFields<'_> {
    fn text(&self, field: &'static str) -> Result<Option<String>, Rejection> {
        self.typed(field, "a string")
    }

    fn number(&self, field: &'static str) -> Result<Option<f64>, Rejection> {
        self.typed(field, "a number")
    }

    fn boolean(&self, field: &'static str) -> Result<Option<bool>, Rejection> {
        self.typed(field, "true or false")
    }

    fn time(&self, field: &'static str) -> Result<Option<UnixNanos>, Rejection> {
        let Some(raw) = self.raw(field) else {
            return Ok(None);
        };
        if let Ok(text) = serde_json::from_str::<String>(raw.get()) {
            return time_from_text(field, &text).map(Some);
        }
        if let Ok(seconds) = serde_json::from_str::<i64>(raw.get()) {
            return unix_seconds_to_nanos(seconds)
                .map(Some)
                .ok_or_else(|| Rejection::new(field, RejectReason::BadTime, "out of range"));
        }
        Err(Rejection::new(
            field,
            RejectReason::BadTime,
            "expected an RFC 3339 string or integer Unix seconds",
        ))
    }
}

/// Decodes one JSON line into a validated event.
pub fn decode_json_line(line: &str, limits: &Limits) -> Result<Event, Rejection> {
    // serde would read a JSON array positionally into the struct: only objects are events.
    if !line.trim_start().starts_with('{') {
        return Err(Rejection::new(
            "(record)",
            RejectReason::BadJson,
            "not a JSON object",
        ));
    }
    let fields: JsonFields = serde_json::from_str(line).map_err(|e| {
        Rejection::new(
            "(record)",
            RejectReason::BadJson,
            format!("not a JSON object: {}", e),
        )
    })?;
    let kind: String = fields
        .text("kind")?
        .ok_or_else(|| Rejection::new("kind", RejectReason::MissingField, "every event needs a kind"))?;
    build_event(&kind, &fields, limits)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::event::EventBody;

    const LIMITS: Limits = Limits {
        max_id_bytes: 8,
        rating_min: 1.0,
        rating_max: 5.0,
        max_record_bytes: 1 << 20,
        max_future_skew_ns: 3_600_000_000_000,
    };

    fn rejected(line: &str) -> Rejection {
        decode_json_line(line, &LIMITS).unwrap_err()
    }

    #[test]
    fn an_event_dated_past_the_skew_is_refused_naming_at() {
        use crate::decode::{refuse_if_ahead, RejectReason};
        use crate::timefmt::parse_event_time;
        let read_at = parse_event_time("2026-05-01T10:00:00Z").unwrap();
        let event = |at: &str| {
            decode_json_line(
                &format!(r#"{{"kind":"erase_user","user":"u1","at":"{at}"}}"#),
                &LIMITS,
            )
            .unwrap()
        };
        // Exactly one hour ahead is still accepted; a second more is not.
        assert_eq!(
            refuse_if_ahead(&event("2026-05-01T11:00:00Z"), read_at, &LIMITS),
            Ok(())
        );
        assert_eq!(
            refuse_if_ahead(&event("2020-01-01T00:00:00Z"), read_at, &LIMITS),
            Ok(())
        );
        let r = refuse_if_ahead(&event("2026-05-01T11:00:01Z"), read_at, &LIMITS).unwrap_err();
        assert_eq!((r.field, r.reason), ("at", RejectReason::TooFarAhead));
        let r = refuse_if_ahead(&event("2261-01-01T00:00:00Z"), read_at, &LIMITS).unwrap_err();
        assert!(
            r.detail.contains("2261-01-01T00:00:00Z") && r.detail.contains("input.max_future_skew = 3600s"),
            "{}",
            r.detail
        );
    }

    #[test]
    fn rating_with_unknown_fields_decodes() {
        let e = decode_json_line(
            r#"{"kind":"rating","user":"u1","item":"rake","value":4.5,"at":"2026-03-01T08:00:00Z","shop":"north"}"#,
            &LIMITS,
        )
        .unwrap();
        assert_eq!(
            e.body,
            EventBody::Rating {
                user: "u1".into(),
                item: "rake".into(),
                value: 4.5
            }
        );
    }

    #[test]
    fn each_bad_field_is_named() {
        let base = r#""user":"u1","item":"rake","at":"2026-03-01T08:00:00Z""#;
        let cases = [
            (
                format!(r#"{{"kind":"rating",{base},"value":9}}"#),
                "value",
                RejectReason::OutOfScale,
            ),
            (
                format!(r#"{{"kind":"rating",{base},"value":"4"}}"#),
                "value",
                RejectReason::WrongType,
            ),
            (
                format!(r#"{{"kind":"rating",{base}}}"#),
                "value",
                RejectReason::MissingField,
            ),
            (
                format!(r#"{{"kind":"rate",{base},"value":4}}"#),
                "kind",
                RejectReason::UnknownKind,
            ),
            (
                r#"{"kind":"purchase","user":"","item":"rake","at":"2026-03-01T08:00:00Z"}"#.to_string(),
                "user",
                RejectReason::EmptyId,
            ),
            (
                r#"{"kind":"purchase","user":"u1","item":"rake-and-hoe","at":"2026-03-01T08:00:00Z"}"#
                    .to_string(),
                "item",
                RejectReason::IdTooLong,
            ),
            (
                r#"{"kind":"purchase","user":"u1","item":"rake","at":"noon"}"#.to_string(),
                "at",
                RejectReason::BadTime,
            ),
            (
                r#"{"kind":"purchase","user":"u1","item":"rake","at":"2026-03-01T08:00:00Z","quantity":0}"#
                    .to_string(),
                "quantity",
                RejectReason::BadQuantity,
            ),
            (
                r#"{"kind":"rating","user":"u1","item":"rake","value":NaN,"at":1}"#.to_string(),
                "(record)",
                RejectReason::BadJson,
            ),
            (r#"[1,2]"#.to_string(), "(record)", RejectReason::BadJson),
        ];
        for (line, field, reason) in cases {
            let r = rejected(&line);
            assert_eq!((r.field, r.reason), (field, reason), "{line}");
        }
    }

    #[test]
    fn item_status_needs_boolean() {
        let r = rejected(r#"{"kind":"item_status","item":"rake","available":"no","at":5}"#);
        assert_eq!((r.field, r.reason), ("available", RejectReason::WrongType));
        let ok = decode_json_line(
            r#"{"kind":"item_status","item":"rake","available":false,"at":5}"#,
            &LIMITS,
        )
        .unwrap();
        assert_eq!(ok.at, UnixNanos(5_000_000_000));
    }
}
