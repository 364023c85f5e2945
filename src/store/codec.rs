//! Compact binary encodings of stored values and keys. Fixed-width little-endian fields
//! behind a leading format byte; big-endian ids in keys so that byte order is id order.

use anyhow::{bail, Result};

use crate::engine::user_state::{PurchaseEntry, RatingEntry, UserState};
use crate::engine::ItemStatus;
use crate::signal::Signal;

/// Sums of one rating pair, oriented to its key (row item, other item).
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct RatingPairStats {
    /// Co-raters.
    pub n: i64,
    /// Σ d_row·d_other, fixed point (see `engine::fixed`).
    pub dot: i128,
    /// Σ d_row² over co-raters.
    pub s_row: i128,
    /// Σ d_other² over co-raters.
    pub s_other: i128,
}

/// Encoded length of [`RatingPairStats`].
pub const RATING_PAIR_LEN: usize = 8 + 3 * 16;

impl RatingPairStats {
    /// Fixed 56-byte form.
    pub fn encode(&self) -> [u8; RATING_PAIR_LEN] {
        let mut out = [0u8; RATING_PAIR_LEN];
        out[..8].copy_from_slice(&self.n.to_le_bytes());
        out[8..24].copy_from_slice(&self.dot.to_le_bytes());
        out[24..40].copy_from_slice(&self.s_row.to_le_bytes());
        out[40..56].copy_from_slice(&self.s_other.to_le_bytes());
        out
    }

    /// Reads the 56-byte form.
    pub fn decode(bytes: &[u8]) -> Result<RatingPairStats> {
        if bytes.len() != RATING_PAIR_LEN {
            bail!(
                "rating pair value has {} bytes, expected {RATING_PAIR_LEN}",
                bytes.len()
            );
        }
        let i128_at = |o: usize| i128::from_le_bytes(bytes[o..o + 16].try_into().expect("16 bytes"));
        Ok(RatingPairStats {
            n: i64::from_le_bytes(bytes[..8].try_into().expect("8 bytes")),
            dot: i128_at(8),
            s_row: i128_at(24),
            s_other: i128_at(40),
        })
    }

    /// Field-wise sum; wrapping, as the range argument in `engine::fixed` rules out
    /// overflow and a merge operator must not panic.
    pub fn add(&mut self, other: &RatingPairStats) {
        self.n = self.n.wrapping_add(other.n);
        self.dot = self.dot.wrapping_add(other.dot);
        self.s_row = self.s_row.wrapping_add(other.s_row);
        self.s_other = self.s_other.wrapping_add(other.s_other);
    }
}

/// Reads an i64 count value.
pub fn decode_count(bytes: &[u8]) -> Result<i64> {
    match <[u8; 8]>::try_from(bytes) {
        Ok(b) => Ok(i64::from_le_bytes(b)),
        Err(_) => bail!("count value has {} bytes, expected 8", bytes.len()),
    }
}

/// Key of a dense id: 4 bytes big-endian.
pub fn id_key(id: u32) -> [u8; 4] {
    id.to_be_bytes()
}

/// Key of an ordered pair (row, other): both ids big-endian, so a prefix scan on the row's
/// 4 bytes lists its row.
pub fn pair_row_key(row: u32, other: u32) -> [u8; 8] {
    let mut k = [0u8; 8];
    k[..4].copy_from_slice(&row.to_be_bytes());
    k[4..].copy_from_slice(&other.to_be_bytes());
    k
}

/// Splits a pair key into (row, other).
pub fn split_pair_key(key: &[u8]) -> Result<(u32, u32)> {
    if key.len() != 8 {
        bail!("pair key has {} bytes, expected 8", key.len());
    }
    Ok((
        u32::from_be_bytes(key[..4].try_into().expect("4 bytes")),
        u32::from_be_bytes(key[4..].try_into().expect("4 bytes")),
    ))
}

/// Key of an item's entry in a per-signal family (`dirty`, `published`).
pub fn signal_item_key(signal: Signal, item: u32) -> [u8; 5] {
    let mut k = [0u8; 5];
    k[0] = signal.key_byte();
    k[1..].copy_from_slice(&item.to_be_bytes());
    k
}

/// Splits a per-signal key.
pub fn split_signal_item_key(key: &[u8]) -> Result<(Signal, u32)> {
    if key.len() != 5 {
        bail!("signal key has {} bytes, expected 5", key.len());
    }
    let Some(signal) = Signal::from_key_byte(key[0]) else {
        bail!("unknown signal byte {}", key[0]);
    };
    Ok((signal, u32::from_be_bytes(key[1..].try_into().expect("4 bytes"))))
}

/// A pending re-score of an item's list.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct DirtyMark {
    /// Wall-clock time the list first became out of date (nanoseconds).
    pub since: i64,
    /// Also re-score every item that lists this one.
    pub with_neighbors: bool,
}

impl DirtyMark {
    /// 9-byte form.
    pub fn encode(&self) -> [u8; 9] {
        let mut k = [0u8; 9];
        k[..8].copy_from_slice(&self.since.to_le_bytes());
        k[8] = u8::from(self.with_neighbors);
        k
    }

    /// Reads the 9-byte form.
    pub fn decode(bytes: &[u8]) -> Result<DirtyMark> {
        if bytes.len() != 9 {
            bail!("dirty mark has {} bytes, expected 9", bytes.len());
        }
        Ok(DirtyMark {
            since: i64::from_le_bytes(bytes[..8].try_into().expect("8 bytes")),
            with_neighbors: bytes[8] != 0,
        })
    }

    /// Combination of two marks: the earlier time, either flag.
    pub fn combine(&self, other: &DirtyMark) -> DirtyMark {
        DirtyMark {
            since: self.since.min(other.since),
            with_neighbors: self.with_neighbors || other.with_neighbors,
        }
    }
}

/// One entry of a published list, with the dense id of the neighbor.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StoredNeighbor {
    /// Dense item id.
    pub item: u32,
    /// Its score.
    pub score: f64,
    /// Co-raters or co-buyers behind the score.
    pub support: u64,
}

/// The last list published for an item and signal.
#[derive(Debug, Clone, PartialEq)]
pub struct PublishedList {
    /// Starts at 1, +1 at every change.
    pub version: u64,
    /// Wall-clock time it was computed.
    pub computed_at: i64,
    /// Newest event time reflected in the store when it was computed.
    pub event_time_watermark: Option<i64>,
    /// Neighbors, best first; empty means a tombstone.
    pub neighbors: Vec<StoredNeighbor>,
}

const FORMAT_V1: u8 = 1;

/// Little-endian writer for variable-length records.
struct Writer(Vec<u8>);

impl Writer {
    fn u8(&mut self, v: u8) {
        self.0.push(v);
    }
    fn u32(&mut self, v: u32) {
        self.0.extend_from_slice(&v.to_le_bytes());
    }
    fn u64(&mut self, v: u64) {
        self.0.extend_from_slice(&v.to_le_bytes());
    }
    fn i64(&mut self, v: i64) {
        self.0.extend_from_slice(&v.to_le_bytes());
    }
    fn f64(&mut self, v: f64) {
        self.0.extend_from_slice(&v.to_le_bytes());
    }
}

/// Reader matching [`Writer`], failing on truncation.
struct Reader<'a> {
    bytes: &'a [u8],
    what: &'static str,
}

impl Reader<'_> {
    fn take<const N: usize>(&mut self) -> Result<[u8; N]> {
        if self.bytes.len() < N {
            bail!("{} record is truncated", self.what);
        }
        let (head, rest) = self.bytes.split_at(N);
        self.bytes = rest;
        Ok(head.try_into().expect("length checked"))
    }
    fn u8(&mut self) -> Result<u8> {
        Ok(self.take::<1>()?[0])
    }
    fn u32(&mut self) -> Result<u32> {
        Ok(u32::from_le_bytes(self.take()?))
    }
    fn u64(&mut self) -> Result<u64> {
        Ok(u64::from_le_bytes(self.take()?))
    }
    fn i64(&mut self) -> Result<i64> {
        Ok(i64::from_le_bytes(self.take()?))
    }
    fn f64(&mut self) -> Result<f64> {
        Ok(f64::from_le_bytes(self.take()?))
    }
    fn version(&mut self) -> Result<()> {
        let v = self.u8()?;
        if v != FORMAT_V1 {
            bail!(
                "{} record has format {v}, this build reads {FORMAT_V1}",
                self.what
            );
        }
        Ok(())
    }
    fn done(&self) -> Result<()> {
        if !self.bytes.is_empty() {
            bail!("{} record has {} trailing bytes", self.what, self.bytes.len());
        }
        Ok(())
    }
}

const NONE_TIME: i64 = i64::MIN;

/// Encodes a user's state. Layout: format, flags (bit 0: erased), erased_at, center,
/// rating count, ratings (item, value or NaN when withdrawn, at, seq), purchase count,
/// purchases (item, at, seq).
pub fn encode_user(u: &UserState) -> Vec<u8> {
    let mut w = Writer(Vec::with_capacity(
        26 + u.ratings.len() * 28 + u.purchases.len() * 20,
    ));
    w.u8(FORMAT_V1);
    w.u8(u8::from(u.erased_at.is_some()));
    w.i64(u.erased_at.unwrap_or(NONE_TIME));
    w.f64(u.center);
    w.u32(u.ratings.len() as u32);
    for e in &u.ratings {
        w.u32(e.item);
        w.f64(e.value.unwrap_or(f64::NAN));
        w.i64(e.at);
        w.u64(e.seq);
    }
    w.u32(u.purchases.len() as u32);
    for e in &u.purchases {
        w.u32(e.item);
        w.i64(e.at);
        w.u64(e.seq);
    }
    w.0
}

/// Decodes [`encode_user`]'s form.
pub fn decode_user(bytes: &[u8]) -> Result<UserState> {
    let mut r = Reader { bytes, what: "user" };
    r.version()?;
    let erased = r.u8()? & 1 == 1;
    let erased_at = r.i64()?;
    let center = r.f64()?;
    let n = r.u32()? as usize;
    let mut ratings = Vec::with_capacity(n);
    for _ in 0..n {
        let item = r.u32()?;
        let value = r.f64()?;
        ratings.push(RatingEntry {
            item,
            value: (!value.is_nan()).then_some(value),
            at: r.i64()?,
            seq: r.u64()?,
        });
    }
    let n = r.u32()? as usize;
    let mut purchases = Vec::with_capacity(n);
    for _ in 0..n {
        purchases.push(PurchaseEntry {
            item: r.u32()?,
            at: r.i64()?,
            seq: r.u64()?,
        });
    }
    r.done()?;
    Ok(UserState {
        center,
        erased_at: erased.then_some(erased_at),
        ratings,
        purchases,
    })
}

/// Encodes an item status: format, available, at, seq.
pub fn encode_status(s: &ItemStatus) -> Vec<u8> {
    let mut w = Writer(Vec::with_capacity(18));
    w.u8(FORMAT_V1);
    w.u8(u8::from(s.available));
    w.i64(s.at);
    w.u64(s.seq);
    w.0
}

/// Decodes [`encode_status`]'s form.
pub fn decode_status(bytes: &[u8]) -> Result<ItemStatus> {
    let mut r = Reader {
        bytes,
        what: "item status",
    };
    r.version()?;
    let s = ItemStatus {
        available: r.u8()? != 0,
        at: r.i64()?,
        seq: r.u64()?,
    };
    r.done()?;
    Ok(s)
}

/// Encodes a published list: format, version, computed_at, watermark, count, then
/// (item, score, support) per neighbor.
pub fn encode_published(p: &PublishedList) -> Vec<u8> {
    let mut w = Writer(Vec::with_capacity(33 + p.neighbors.len() * 20));
    w.u8(FORMAT_V1);
    w.u64(p.version);
    w.i64(p.computed_at);
    w.i64(p.event_time_watermark.unwrap_or(NONE_TIME));
    w.u32(p.neighbors.len() as u32);
    for n in &p.neighbors {
        w.u32(n.item);
        w.f64(n.score);
        w.u64(n.support);
    }
    w.0
}

/// Decodes [`encode_published`]'s form.
pub fn decode_published(bytes: &[u8]) -> Result<PublishedList> {
    let mut r = Reader {
        bytes,
        what: "published list",
    };
    r.version()?;
    let version = r.u64()?;
    let computed_at = r.i64()?;
    let watermark = r.i64()?;
    let n = r.u32()? as usize;
    let mut neighbors = Vec::with_capacity(n);
    for _ in 0..n {
        neighbors.push(StoredNeighbor {
            item: r.u32()?,
            score: r.f64()?,
            support: r.u64()?,
        });
    }
    r.done()?;
    Ok(PublishedList {
        version,
        computed_at,
        event_time_watermark: (watermark != NONE_TIME).then_some(watermark),
        neighbors,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn user_round_trip_keeps_withdrawals_and_erasure() {
        let u = UserState {
            center: 3.25,
            erased_at: Some(77),
            ratings: vec![
                RatingEntry {
                    item: 1,
                    value: Some(4.0),
                    at: 100,
                    seq: 5,
                },
                RatingEntry {
                    item: 9,
                    value: None,
                    at: 120,
                    seq: 6,
                },
            ],
            purchases: vec![PurchaseEntry {
                item: 2,
                at: 130,
                seq: 7,
            }],
        };
        assert_eq!(decode_user(&encode_user(&u)).unwrap(), u);
        assert!(decode_user(&encode_user(&u)[..20]).is_err());
    }

    #[test]
    fn pair_stats_round_trip_and_add() {
        let mut a = RatingPairStats {
            n: 2,
            dot: -5,
            s_row: 1 << 100,
            s_other: 3,
        };
        assert_eq!(RatingPairStats::decode(&a.encode()).unwrap(), a);
        a.add(&RatingPairStats {
            n: -2,
            dot: 5,
            s_row: -(1 << 100),
            s_other: -3,
        });
        assert_eq!(a, RatingPairStats::default());
    }

    #[test]
    fn published_round_trip() {
        let p = PublishedList {
            version: 3,
            computed_at: 10,
            event_time_watermark: None,
            neighbors: vec![StoredNeighbor {
                item: 4,
                score: 0.5,
                support: 9,
            }],
        };
        assert_eq!(decode_published(&encode_published(&p)).unwrap(), p);
    }
}
