//! CSV decoding: a header row naming the columns, then one event per record.
//!
//! Required columns: `user`, `item`, `value`, `at`. A `kind` column is optional; without
//! it (or where it is empty) an empty `value` means a purchase and any other a rating.
//! Optional `quantity` and `available` columns serve purchases and item_status.

use super::{build_event, time_from_text, FieldSource, Limits, RejectReason, Rejection};
use crate::event::{Event, UnixNanos};

/// A CSV header without one of the required columns (named).
#[derive(Debug, Clone, Copy, PartialEq, Eq, thiserror::Error)]
#[error("CSV header lacks the required column `{0}` (expected user,item,value,at)")]
pub struct MissingColumn(pub &'static str);

/// Where each known column sits in a record, found from the header row.
#[derive(Debug, Clone, Default)]
pub struct CsvColumns {
    user: Option<usize>,
    item: Option<usize>,
    value: Option<usize>,
    at: Option<usize>,
    kind: Option<usize>,
    quantity: Option<usize>,
    available: Option<usize>,
    width: usize,
}

impl CsvColumns {
    /// Reads the header; refuses a header that lacks a required column, naming it.
    pub fn from_header(header: &csv::StringRecord) -> Result<CsvColumns, MissingColumn> {
        let find = |name: &str| header.iter().position(|h| h.trim() == name);
        let cols = CsvColumns {
            user: find("user"),
            item: find("item"),
            value: find("value"),
            at: find("at"),
            kind: find("kind"),
            quantity: find("quantity"),
            available: find("available"),
            width: header.len(),
        };
        for (name, pos) in [
            ("user", cols.user),
            ("item", cols.item),
            ("value", cols.value),
            ("at", cols.at),
        ] {
            if pos.is_none() {
                return Err(MissingColumn(name));
            }
        }
        Ok(cols)
    }

    /// Decodes one record into a validated event.
    pub fn decode(&self, record: &csv::StringRecord, limits: &Limits) -> Result<Event, Rejection> {
        if record.len() != self.width {
            return Err(Rejection::new(
                "(record)",
                RejectReason::BadCsv,
                format!("{} fields, the header has {}", record.len(), self.width),
            ));
        }
        let fields = CsvFields { cols: self, record };
        let kind = match fields.cell(self.kind) {
            Some(k) => k.to_string(),
            None if fields.cell(self.value).is_none() => "purchase".to_string(),
            None => "rating".to_string(),
        };
        build_event(&kind, &fields, limits)
    }
}

struct CsvFields<'a> {
    cols: &'a CsvColumns,
    record: &'a csv::StringRecord,
}

impl CsvFields<'_> {
    /// A non-empty cell, trimmed; empty cells count as absent.
    fn cell(&self, pos: Option<usize>) -> Option<&str> {
        let v = self.record.get(pos?)?.trim();
        (!v.is_empty()).then_some(v)
    }

    fn column(&self, field: &'static str) -> Option<usize> {
        match field {
            "user" => self.cols.user,
            "item" => self.cols.item,
            "value" => self.cols.value,
            "at" => self.cols.at,
            "quantity" => self.cols.quantity,
            "available" => self.cols.available,
            _ => None,
        }
    }
}

impl FieldSource for CsvFields<'_> {
    fn text(&self, field: &'static str) -> Result<Option<String>, Rejection> {
        // An id column that is present but empty is an empty id, not a missing one.
        match self.column(field) {
            None => Ok(None),
            Some(pos) => Ok(self.record.get(pos).map(|v| v.trim().to_string())),
        }
    }

    fn number(&self, field: &'static str) -> Result<Option<f64>, Rejection> {
        match self.cell(self.column(field)) {
            None => Ok(None),
            Some(v) => v
                .parse::<f64>()
                .map(Some)
                .map_err(|_| Rejection::new(field, RejectReason::WrongType, "expected a number")),
        }
    }

    fn boolean(&self, field: &'static str) -> Result<Option<bool>, Rejection> {
        match self.cell(self.column(field)) {
            None => Ok(None),
            Some("true") => Ok(Some(true)),
            Some("false") => Ok(Some(false)),
            Some(_) => Err(Rejection::new(
                field,
                RejectReason::WrongType,
                "expected true or false",
            )),
        }
    }

    fn time(&self, field: &'static str) -> Result<Option<UnixNanos>, Rejection> {
        match self.cell(self.column(field)) {
            None => Ok(None),
            Some(v) => time_from_text(field, v).map(Some),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::event::EventBody;

    const LIMITS: Limits = Limits {
        max_id_bytes: 64,
        rating_min: 1.0,
        rating_max: 5.0,
        max_record_bytes: 1 << 20,
        max_future_skew_ns: 3_600_000_000_000,
    };

    fn rec(cells: &[&str]) -> csv::StringRecord {
        csv::StringRecord::from(cells.to_vec())
    }

    #[test]
    fn value_decides_kind_without_kind_column() {
        let cols = CsvColumns::from_header(&rec(&["user", "item", "value", "at"])).unwrap();
        let r = cols
            .decode(&rec(&["u1", "hose", "3", "874965758"]), &LIMITS)
            .unwrap();
        assert!(matches!(r.body, EventBody::Rating { value, .. } if value == 3.0));
        let p = cols
            .decode(&rec(&["u1", "hose", "", "2026-01-01T00:00:00Z"]), &LIMITS)
            .unwrap();
        assert!(matches!(p.body, EventBody::Purchase { .. }));
        let nan = cols
            .decode(&rec(&["u1", "hose", "NaN", "1"]), &LIMITS)
            .unwrap_err();
        assert_eq!((nan.field, nan.reason), ("value", RejectReason::NotFinite));
        let short = cols.decode(&rec(&["u1", "hose"]), &LIMITS).unwrap_err();
        assert_eq!(short.reason, RejectReason::BadCsv);
    }

    #[test]
    fn header_without_at_is_refused() {
        let err = CsvColumns::from_header(&rec(&["user", "item", "value"])).unwrap_err();
        assert!(err.to_string().contains("`at`"));
    }
}
