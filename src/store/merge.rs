//! Merge operators: pair statistics and dirty marks are updated by merging deltas, never
//! by read-modify-write, so a batch writes blindly and RocksDB adds up operands lazily.
//! Every operator here is associative and commutative, so full and partial merges share
//! one function.

use rocksdb::compaction_filter::Decision;
use rocksdb::MergeOperands;

use super::codec::{
    decode_count, decode_dirty_mark, decode_rating_pair, encode_dirty_mark, encode_rating_pair,
    RATING_PAIR_MAX_LEN,
};
use crate::model::{DirtyMark, RatingPairStats};

/// Sums rating pair statistics field by field. A malformed operand is skipped with an
/// error log rather than poisoning the key (it can only come from a foreign writer).
pub fn merge_rating_pairs(_key: &[u8], existing: Option<&[u8]>, operands: &MergeOperands) -> Option<Vec<u8>> {
    let mut total = RatingPairStats::default();
    for bytes in existing.into_iter().chain(operands) {
        match decode_rating_pair(bytes) {
            Ok(delta) => total.add(&delta),
            Err(e) => tracing::error!(error = %e, "skipping malformed rating pair operand"),
        }
    }
    let mut out = Vec::with_capacity(RATING_PAIR_MAX_LEN);
    encode_rating_pair(&total, &mut out);
    Some(out)
}

/// Sums co-buyer counts.
pub fn merge_counts(_key: &[u8], existing: Option<&[u8]>, operands: &MergeOperands) -> Option<Vec<u8>> {
    let mut total: i64 = 0;
    for bytes in existing.into_iter().chain(operands) {
        match decode_count(bytes) {
            Ok(c) => total = total.wrapping_add(c),
            Err(e) => tracing::error!(error = %e, "skipping malformed count operand"),
        }
    }
    Some(total.to_le_bytes().to_vec())
}

/// Keeps the earliest dirty time and any neighbor flag.
pub fn merge_dirty(_key: &[u8], existing: Option<&[u8]>, operands: &MergeOperands) -> Option<Vec<u8>> {
    let mut combined: Option<DirtyMark> = None;
    for bytes in existing.into_iter().chain(operands) {
        if let Ok(mark) = decode_dirty_mark(bytes) {
            combined = Some(combined.map_or(mark, |c| c.combine(&mark)));
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
