//! The rating family's unit: a block of a row (docs/design.md, "Rows in blocks"). A key is
//! the row item and the block number `other >> BLOCK_BITS`; the value lists the row's
//! partners in that block in id order, each as a varint gap from the previous partner
//! and its compact sums ([`codec::encode_rating_pair`]). Writers hand entries over in key
//! order and get one (key, value) per block; readers decode a block into its entries;
//! the merge operator adds blocks partner by partner.

use anyhow::{bail, Result};

use super::codec;
use crate::model::RatingPairStats;

/// Low bits of a partner id that stay inside one block: a block spans 4,096 ids.
const BLOCK_BITS: u32 = 12;

/// Length of a block key: the row (4 bytes) and the block number (3 bytes), big-endian.
pub const BLOCK_KEY_LEN: usize = 7;

/// The key of the block of row `row` that holds partner `other`.
pub fn block_key(row: u32, other: u32) -> [u8; BLOCK_KEY_LEN] {
    let block = (other >> BLOCK_BITS).to_be_bytes();
    let mut k = [0u8; BLOCK_KEY_LEN];
    k[..4].copy_from_slice(&row.to_be_bytes());
    k[4..].copy_from_slice(&block[1..]);
    k
}

/// Splits a block key into (row, first partner id the block can hold).
pub fn split_block_key(key: &[u8]) -> Result<(u32, u32)> {
    if key.len() != BLOCK_KEY_LEN {
        bail!(
            "rating block key has {} bytes, expected {BLOCK_KEY_LEN}",
            key.len()
        );
    }
    let row = u32::from_be_bytes(key[..4].try_into().expect("4 bytes"));
    let block = u32::from_be_bytes([0, key[4], key[5], key[6]]);
    Ok((row, block << BLOCK_BITS))
}

/// Whether two partners fall in the same block of a row.
pub fn same_block(a: u32, b: u32) -> bool {
    a >> BLOCK_BITS == b >> BLOCK_BITS
}

/// Appends one entry to a block value being built; `previous` is the last partner
/// written to it (or the block's first id, for the first entry).
fn push_entry(out: &mut Vec<u8>, previous: u32, other: u32, stats: &RatingPairStats) {
    codec::push_varint(out, u64::from(other - previous));
    codec::encode_rating_pair(stats, out);
}

/// Encodes a block from entries sorted by partner, all in one block, none empty.
pub fn encode_block(entries: &[(u32, RatingPairStats)], out: &mut Vec<u8>) {
    let Some(&(first, _)) = entries.first() else {
        return;
    };
    let mut previous = first >> BLOCK_BITS << BLOCK_BITS;
    for (other, stats) in entries {
        push_entry(out, previous, *other, stats);
        previous = *other;
    }
}

/// Decodes a block whose key starts partners at `first`, appending its entries (in
/// partner order) to `out`.
pub fn decode_block_into(first: u32, mut bytes: &[u8], out: &mut Vec<(u32, RatingPairStats)>) -> Result<()> {
    let mut previous = first;
    while !bytes.is_empty() {
        let gap = codec::read_varint(&mut bytes)?;
        let other = u32::try_from(u64::from(previous) + gap)
            .map_err(|_| anyhow::anyhow!("rating block partner beyond the id range"))?;
        let stats = codec::read_rating_pair(&mut bytes)?;
        out.push((other, stats));
        previous = other;
    }
    Ok(())
}

/// Adds block values (in any number) partner by partner into one block value, leaving
/// out partners whose sums cancel to exactly zero. `first` is the block's first id. All
/// entries are decoded, sorted by partner and folded once: a block merged with many
/// operands (a compaction after many segments) costs one sort, not one pass per operand.
pub fn sum_blocks<'a>(first: u32, blocks: impl Iterator<Item = &'a [u8]>) -> Result<Vec<u8>> {
    let mut all: Vec<(u32, RatingPairStats)> = Vec::new();
    let mut operands = 0;
    for bytes in blocks {
        decode_block_into(first, bytes, &mut all)?;
        operands += 1;
    }
    if operands > 1 {
        all.sort_by_key(|e| e.0);
    }
    let mut total: Vec<(u32, RatingPairStats)> = Vec::with_capacity(all.len());
    for (other, stats) in all {
        match total.last_mut() {
            Some(last) if last.0 == other => last.1.add(&stats),
            _ => total.push((other, stats)),
        }
    }
    total.retain(|(_, s)| *s != RatingPairStats::default());
    let mut out = Vec::with_capacity(total.len() * 24);
    encode_block(&total, &mut out);
    Ok(out)
}

/// Adds two partner-sorted rows into `out`, dropping sums that cancel to zero.
pub fn add_sorted(
    a: &[(u32, RatingPairStats)],
    b: &[(u32, RatingPairStats)],
    out: &mut Vec<(u32, RatingPairStats)>,
) {
    let (mut i, mut j) = (0, 0);
    while i < a.len() || j < b.len() {
        let take_a = j == b.len() || (i < a.len() && a[i].0 < b[j].0);
        let take_b = i == a.len() || (j < b.len() && b[j].0 < a[i].0);
        if take_a {
            out.push(a[i]);
            i += 1;
        } else if take_b {
            out.push(b[j]);
            j += 1;
        } else {
            let mut sum = a[i].1;
            sum.add(&b[j].1);
            if sum != RatingPairStats::default() {
                out.push((a[i].0, sum));
            }
            i += 1;
            j += 1;
        }
    }
}

/// Cuts rows handed over entry by entry, in key order, into blocks, encoding each entry
/// as it comes: what every writer of the rating family (table files, write batches,
/// migration) shares.
#[derive(Default)]
pub struct BlockCutter {
    row: u32,
    /// The first partner of the block in progress, if one is.
    first: Option<u32>,
    previous: u32,
    value: Vec<u8>,
}

impl BlockCutter {
    /// Takes the next entry (in key order); when it starts a new block, first hands the
    /// finished block to `emit` as (key, value).
    pub fn push<E>(
        &mut self,
        row: u32,
        other: u32,
        stats: RatingPairStats,
        emit: &mut (impl FnMut(&[u8], &[u8]) -> Result<(), E> + ?Sized),
    ) -> Result<(), E> {
        if self.first.is_some() && (row != self.row || !same_block(self.previous, other)) {
            self.flush(emit)?;
        }
        if self.first.is_none() {
            self.row = row;
            self.first = Some(other);
            self.previous = other >> BLOCK_BITS << BLOCK_BITS;
        }
        push_entry(&mut self.value, self.previous, other, &stats);
        self.previous = other;
        Ok(())
    }

    /// Hands the block in progress, if any, to `emit`.
    pub fn flush<E>(
        &mut self,
        emit: &mut (impl FnMut(&[u8], &[u8]) -> Result<(), E> + ?Sized),
    ) -> Result<(), E> {
        let Some(first) = self.first.take() else {
            return Ok(());
        };
        emit(&block_key(self.row, first), &self.value)?;
        self.value.clear();
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn stats(n: i64, dot: i128) -> RatingPairStats {
        RatingPairStats {
            n,
            dot,
            s_row: dot.abs() << 3,
            s_other: 7 << 80,
        }
    }

    #[test]
    fn keys_order_rows_then_blocks_and_split_back() {
        let keys = [
            block_key(1, 4095),
            block_key(1, 4096),
            block_key(2, 0),
            block_key(2, u32::MAX),
        ];
        assert!(keys.windows(2).all(|w| w[0] < w[1]), "{keys:?}");
        assert_eq!(split_block_key(&keys[1]).unwrap(), (1, 4096));
        assert_eq!(split_block_key(&keys[3]).unwrap(), (2, u32::MAX >> 12 << 12));
        assert_eq!(block_key(1, 0), block_key(1, 4095), "one block spans 4,096 ids");
        assert!(split_block_key(&[0; 8]).is_err());
    }

    #[test]
    fn blocks_round_trip_and_add_partner_by_partner() {
        let a = vec![
            (8192, stats(2, -5 << 80)),
            (8200, stats(1, 3)),
            (12287, stats(4, 1 << 90)),
        ];
        let cancel = RatingPairStats {
            n: -1,
            dot: -3,
            s_row: -24,
            s_other: -(7 << 80),
        };
        let b = vec![(8193, stats(1, 9)), (8200, cancel), (12287, stats(1, 1))];
        let (mut ea, mut eb) = (Vec::new(), Vec::new());
        encode_block(&a, &mut ea);
        encode_block(&b, &mut eb);
        let mut back = Vec::new();
        decode_block_into(8192, &ea, &mut back).unwrap();
        assert_eq!(back, a);
        let sum = sum_blocks(8192, [ea.as_slice(), eb.as_slice()].into_iter()).unwrap();
        let mut got = Vec::new();
        decode_block_into(8192, &sum, &mut got).unwrap();
        let mut last = stats(4, 1 << 90);
        last.add(&stats(1, 1));
        assert_eq!(
            got,
            vec![(8192, stats(2, -5 << 80)), (8193, stats(1, 9)), (12287, last)],
            "8200 cancelled to zero and is left out"
        );
        assert!(decode_block_into(8192, &ea[..ea.len() - 1], &mut Vec::new()).is_err());
    }

    #[test]
    fn the_cutter_emits_one_value_per_row_block_in_key_order() {
        let entries = [(1, 5), (1, 4095), (1, 4096), (3, 2), (3, 9000)];
        let mut cutter = BlockCutter::default();
        let mut out: Vec<(Vec<u8>, Vec<u8>)> = Vec::new();
        let mut emit = |k: &[u8], v: &[u8]| {
            out.push((k.to_vec(), v.to_vec()));
            Ok::<(), ()>(())
        };
        for (row, other) in entries {
            cutter.push(row, other, stats(1, 1), &mut emit).unwrap();
        }
        cutter.flush(&mut emit).unwrap();
        let keys: Vec<(u32, u32)> = out.iter().map(|(k, _)| split_block_key(k).unwrap()).collect();
        assert_eq!(keys, vec![(1, 0), (1, 4096), (3, 0), (3, 8192)]);
        let mut first = Vec::new();
        decode_block_into(0, &out[0].1, &mut first).unwrap();
        assert_eq!(first.iter().map(|e| e.0).collect::<Vec<_>>(), vec![5, 4095]);
    }
}
