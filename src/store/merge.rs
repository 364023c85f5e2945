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

use super::codec::{decode_count, decode_dirty_mark, encode_dirty_mark};
use super::row_blocks::{decode_block_into, split_block_key, sum_blocks};
use super::table_files::SEGMENT_MARKER_KEY;
use crate::model::DirtyMark;

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

/// Adds rating row blocks partner by partner (docs/design.md, "Rows in blocks"); a
/// malformed operand fails the merge.
pub fn merge_rating_blocks(key: &[u8], existing: Option<&[u8]>, operands: &MergeOperands) -> Option<Vec<u8>> {
    let summed =
        split_block_key(key).and_then(|(_, first)| sum_blocks(first, existing.into_iter().chain(operands)));
    match summed {
        Ok(block) => Some(block),
        Err(e) => refuse("pairs", key, e),
    }
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

/// Drops rating row blocks left without a partner (every contribution to each of its
/// pairs was retracted), so erased users and cut items leave no empty keys behind after
/// compaction. The segment marker and anything unreadable are kept (a read reports the
/// latter).
pub fn drop_empty_rating_blocks(_level: u32, key: &[u8], value: &[u8]) -> Decision {
    if key == SEGMENT_MARKER_KEY {
        return Decision::Keep;
    }
    let empty = split_block_key(key).is_ok_and(|(_, first)| {
        let mut entries = Vec::new();
        decode_block_into(first, value, &mut entries).is_ok() && entries.iter().all(|(_, s)| s.n == 0)
    });
    keep_unless(empty)
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
