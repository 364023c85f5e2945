//! Merge operators: pair statistics and dirty marks are updated by merging deltas, never
//! by read-modify-write, so a batch writes blindly and RocksDB adds up operands lazily.
//! Every operator here is associative and commutative, so full and partial merges share
//! one function.
//!
//! A malformed operand fails the merge: RocksDB then reports the read or compaction as
//! corruption, and the key is named in the error log and on `/readyz`
//! ([`malformed_operand`]). Skipping it would turn corruption into wrong sums or lost
//! dirty marks that nothing reports.

use std::fmt::Display;
use std::sync::OnceLock;

use rocksdb::compaction_filter::Decision;
use rocksdb::MergeOperands;

use super::codec::{
    decode_count, decode_dirty_mark, decode_rating_pair, encode_dirty_mark, encode_rating_pair,
    RATING_PAIR_MAX_LEN,
};
use crate::model::{DirtyMark, RatingPairStats};

/// The first malformed merge operand this process met: the family, the key in hex and
/// what was wrong. Merge operators get no context of their own, so this is process-wide.
static MALFORMED: OnceLock<String> = OnceLock::new();

/// Where the store holds a value its merge operator could not read, if it met one: the
/// store check of `/readyz` names it.
pub fn malformed_operand() -> Option<&'static str> {
    MALFORMED.get().map(String::as_str)
}

/// Fails a merge over a malformed operand of `family` at `key`, naming both.
fn refuse(family: &str, key: &[u8], error: impl Display) -> Option<Vec<u8>> {
    let hex: String = key.iter().map(|b| format!("{b:02x}")).collect();
    let place = format!("column family {family}, key {hex}: {error}");
    tracing::error!(%place, "malformed merge operand; the read or compaction fails as corruption");
    let _ = MALFORMED.set(place);
    None
}

/// Sums rating pair statistics field by field; a malformed operand fails the merge.
pub fn merge_rating_pairs(key: &[u8], existing: Option<&[u8]>, operands: &MergeOperands) -> Option<Vec<u8>> {
    let mut total = RatingPairStats::default();
    for bytes in existing.into_iter().chain(operands) {
        match decode_rating_pair(bytes) {
            Ok(delta) => total.add(&delta),
            Err(e) => return refuse("pairs", key, e),
        }
    }
    let mut out = Vec::with_capacity(RATING_PAIR_MAX_LEN);
    encode_rating_pair(&total, &mut out);
    Some(out)
}

/// Sums co-buyer counts; a malformed operand fails the merge.
pub fn merge_counts(key: &[u8], existing: Option<&[u8]>, operands: &MergeOperands) -> Option<Vec<u8>> {
    let mut total: i64 = 0;
    for bytes in existing.into_iter().chain(operands) {
        match decode_count(bytes) {
            Ok(c) => total = total.wrapping_add(c),
            Err(e) => return refuse("purchase_pairs", key, e),
        }
    }
    Some(total.to_le_bytes().to_vec())
}

/// Keeps the earliest dirty time and any neighbor flag; a malformed operand fails the
/// merge.
pub fn merge_dirty(key: &[u8], existing: Option<&[u8]>, operands: &MergeOperands) -> Option<Vec<u8>> {
    let mut combined: Option<DirtyMark> = None;
    for bytes in existing.into_iter().chain(operands) {
        match decode_dirty_mark(bytes) {
            Ok(mark) => combined = Some(combined.map_or(mark, |c| c.combine(&mark))),
            Err(e) => return refuse("dirty", key, e),
        }
    }
    combined.map(|m| encode_dirty_mark(&m).to_vec())
}

/// Drops rating pairs whose every contribution was retracted (n = 0), so erased users and
/// cut items leave no empty keys behind after compaction.
pub fn drop_empty_rating_pairs(_level: u32, _key: &[u8], value: &[u8]) -> Decision {
    keep_unless(decode_rating_pair(value).is_ok_and(|s| s.n == 0))
}

/// Drops co-buyer counts that fell to zero.
pub fn drop_empty_counts(_level: u32, _key: &[u8], value: &[u8]) -> Decision {
    keep_unless(decode_count(value).is_ok_and(|c| c == 0))
}

fn keep_unless(empty: bool) -> Decision {
    if empty {
        Decision::Remove
    } else {
        Decision::Keep
    }
}
