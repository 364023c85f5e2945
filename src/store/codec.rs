//! Compact binary encodings of stored values and keys. Fixed-width little-endian fields
//! behind a leading format byte; big-endian ids in keys so that byte order is id order.

use anyhow::{bail, Result};

use crate::engine::user_state::{PurchaseEntry, RatingEntry, UserState};
use crate::engine::ItemStatus;
use crate::event::UnixNanos;
use crate::model::{DirtyMark, DirtyScope, Neighbor, PublishedList, RatingPairStats};
use crate::signal::Signal;

/// Longest encoded [`RatingPairStats`]: signs byte, n (10-byte varint), and three sums of
/// a header byte and up to 16 bytes each.
pub const RATING_PAIR_MAX_LEN: usize = 1 + 10 + 3 * 17;

/// Header byte of a sum that needs all 16 bytes (no other header has both nibbles at 15:
/// a sum's zero bytes and significant bytes add up to at most 16).
const FULL_WIDTH: u8 = 0xFF;

/// Appends a rating pair's sums in compact form. The sums are fixed-point integers
/// (`engine::fixed`) of a few significant bytes with zero bytes on both sides (a 2^80
/// scale leaves the low bytes of a double's product empty), so each magnitude is written
/// as a header byte — zero bytes dropped at the low end (high nibble) and bytes kept (low
/// nibble) — and only the kept bytes; the four signs share one byte and n is a varint.
/// Typically 25–30 bytes where the fixed layout took 56, which is less to write, to keep
/// in the write-ahead log and to read back.
pub fn encode_rating_pair(stats: &RatingPairStats, out: &mut Vec<u8>) {
    let sums = [stats.dot, stats.s_row, stats.s_other];
    let mut signs = u8::from(stats.n < 0);
    for (bit, v) in sums.iter().enumerate() {
        signs |= u8::from(*v < 0) << (bit + 1);
    }
    out.push(signs);
    push_varint(out, stats.n.unsigned_abs());
    for v in sums {
        let m = v.unsigned_abs();
        let bytes = m.to_le_bytes();
        if m == 0 {
            out.push(0);
            continue;
        }
        let low_zeros = (m.trailing_zeros() / 8) as usize;
        let high_zeros = (m.leading_zeros() / 8) as usize;
        let kept = 16 - low_zeros - high_zeros;
        if kept == 16 {
            out.push(FULL_WIDTH);
        } else {
            out.push(((low_zeros as u8) << 4) | kept as u8);
        }
        out.extend_from_slice(&bytes[low_zeros..low_zeros + kept]);
    }
}

/// Appends `v` as a little-endian base-128 varint (7 bits a byte, high bit = more).
pub fn push_varint(out: &mut Vec<u8>, mut v: u64) {
    loop {
        let low = (v & 0x7F) as u8;
        v >>= 7;
        if v == 0 {
            out.push(low);
            return;
        }
        out.push(low | 0x80);
    }
}

/// Reads a [`push_varint`] varint from the front of `bytes`, advancing past it.
pub fn read_varint(bytes: &mut &[u8]) -> Result<u64> {
    let mut v: u64 = 0;
    let mut shift = 0;
    loop {
        let Some((&b, tail)) = bytes.split_first() else {
            bail!("varint cut short");
        };
        *bytes = tail;
        if shift > 63 {
            bail!("varint longer than 64 bits");
        }
        v |= u64::from(b & 0x7F) << shift;
        shift += 7;
        if b & 0x80 == 0 {
            return Ok(v);
        }
    }
}

/// Reads [`encode_rating_pair`]'s form: the whole of `bytes`.
pub fn decode_rating_pair(bytes: &[u8]) -> Result<RatingPairStats> {
    let mut rest = bytes;
    let stats = read_rating_pair(&mut rest)?;
    if !rest.is_empty() {
        bail!("rating pair value of {} bytes is malformed", bytes.len());
    }
    Ok(stats)
}

/// Reads one [`encode_rating_pair`] value from the front of `bytes`, advancing past it
/// (a row block holds many in a row).
pub fn read_rating_pair(bytes: &mut &[u8]) -> Result<RatingPairStats> {
    let malformed = |len: usize| anyhow::anyhow!("rating pair value of {len} bytes is malformed");
    let len = bytes.len();
    let (&signs, mut rest) = bytes.split_first().ok_or_else(|| malformed(len))?;
    let n = read_varint(&mut rest).map_err(|_| malformed(len))?;
    let mut sums = [0i128; 3];
    for (bit, sum) in sums.iter_mut().enumerate() {
        let (&header, tail) = rest.split_first().ok_or_else(|| malformed(len))?;
        let (low_zeros, kept) = match header {
            FULL_WIDTH => (0, 16),
            h => ((h >> 4) as usize, (h & 0x0F) as usize),
        };
        if low_zeros + kept > 16 || tail.len() < kept {
            return Err(malformed(len));
        }
        let mut le = [0u8; 16];
        le[low_zeros..low_zeros + kept].copy_from_slice(&tail[..kept]);
        rest = &tail[kept..];
        let m = u128::from_le_bytes(le);
        *sum = if signs & (1 << (bit + 1)) != 0 {
            (m as i128).wrapping_neg()
        } else {
            m as i128
        };
    }
    *bytes = rest;
    let n = if signs & 1 != 0 {
        (n as i64).wrapping_neg()
    } else {
        n as i64
    };
    let [dot, s_row, s_other] = sums;
    Ok(RatingPairStats {
        n,
        dot,
        s_row,
        s_other,
    })
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

/// Leading key byte of a signal in the `dirty` and `published` column families (a prefix
/// scan of one signal starts here).
pub fn signal_key_byte(signal: Signal) -> u8 {
    match signal {
        Signal::Rating => b'r',
        Signal::Purchase => b'p',
    }
}

/// Key of an item's entry in a per-signal family (`dirty`, `published`).
pub fn signal_item_key(signal: Signal, item: u32) -> [u8; 5] {
    let mut k = [0u8; 5];
    k[0] = signal_key_byte(signal);
    k[1..].copy_from_slice(&item.to_be_bytes());
    k
}

/// Splits a per-signal key.
pub fn split_signal_item_key(key: &[u8]) -> Result<(Signal, u32)> {
    if key.len() != 5 {
        bail!("signal key has {} bytes, expected 5", key.len());
    }
    let Some(signal) = Signal::ALL.into_iter().find(|s| signal_key_byte(*s) == key[0]) else {
        bail!("unknown signal byte {}", key[0]);
    };
    Ok((signal, u32::from_be_bytes(key[1..].try_into().expect("4 bytes"))))
}

/// Length of an encoded [`DirtyMark`]: the time, then the scope byte.
const DIRTY_MARK_LEN: usize = 9;

/// The 9-byte form of a dirty mark.
pub fn encode_dirty_mark(mark: &DirtyMark) -> [u8; DIRTY_MARK_LEN] {
    let mut k = [0u8; DIRTY_MARK_LEN];
    k[..8].copy_from_slice(&mark.since.0.to_le_bytes());
    k[8] = u8::from(mark.scope == DirtyScope::WithNeighbors);
    k
}

/// Reads [`encode_dirty_mark`]'s form.
pub fn decode_dirty_mark(bytes: &[u8]) -> Result<DirtyMark> {
    if bytes.len() != DIRTY_MARK_LEN {
        bail!("dirty mark has {} bytes, expected {DIRTY_MARK_LEN}", bytes.len());
    }
    Ok(DirtyMark {
        since: UnixNanos(i64::from_le_bytes(bytes[..8].try_into().expect("8 bytes"))),
        scope: if bytes[8] != 0 {
            DirtyScope::WithNeighbors
        } else {
            DirtyScope::OwnList
        },
    })
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
    fn time(&mut self, v: UnixNanos) {
        self.0.extend_from_slice(&v.0.to_le_bytes());
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
    fn time(&mut self) -> Result<UnixNanos> {
        Ok(UnixNanos(i64::from_le_bytes(self.take()?)))
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

/// Stands for "no time" in a fixed-width time field.
const NONE_TIME: UnixNanos = UnixNanos(i64::MIN);

/// Encodes a user's state. Layout: format, flags (bit 0: erased), erased_at, center,
/// rating count, ratings (item, value or NaN when withdrawn, at, seq), purchase count,
/// purchases (item, at, seq).
pub fn encode_user(u: &UserState) -> Vec<u8> {
    let mut w = Writer(Vec::with_capacity(
        26 + u.ratings.len() * 28 + u.purchases.len() * 20,
    ));
    w.u8(FORMAT_V1);
    w.u8(u8::from(u.erased_at.is_some()));
    w.time(u.erased_at.unwrap_or(NONE_TIME));
    w.f64(u.center);
    w.u32(u.ratings.len() as u32);
    for e in &u.ratings {
        w.u32(e.item);
        w.f64(e.value.unwrap_or(f64::NAN));
        w.time(e.at);
        w.u64(e.seq);
    }
    w.u32(u.purchases.len() as u32);
    for e in &u.purchases {
        w.u32(e.item);
        w.time(e.at);
        w.u64(e.seq);
    }
    w.0
}

/// Decodes [`encode_user`]'s form.
pub fn decode_user(bytes: &[u8]) -> Result<UserState> {
    let mut r = Reader { bytes, what: "user" };
    r.version()?;
    let erased = r.u8()? & 1 == 1;
    let erased_at = r.time()?;
    let center = r.f64()?;
    let n = r.u32()? as usize;
    let mut ratings = Vec::with_capacity(n);
    for _ in 0..n {
        let item = r.u32()?;
        let value = r.f64()?;
        ratings.push(RatingEntry {
            item,
            value: (!value.is_nan()).then_some(value),
            at: r.time()?,
            seq: r.u64()?,
        });
    }
    let n = r.u32()? as usize;
    let mut purchases = Vec::with_capacity(n);
    for _ in 0..n {
        purchases.push(PurchaseEntry {
            item: r.u32()?,
            at: r.time()?,
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
    w.time(s.at);
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
        at: r.time()?,
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
    w.time(p.computed_at);
    w.time(p.event_time_watermark.unwrap_or(NONE_TIME));
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
    let computed_at = r.time()?;
    let watermark = r.time()?;
    let n = r.u32()? as usize;
    let mut neighbors = Vec::with_capacity(n);
    for _ in 0..n {
        neighbors.push(Neighbor {
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
    fn rating_pairs_round_trip_in_few_bytes() {
        let typical = RatingPairStats {
            n: 37,
            dot: crate::engine::fixed::to_fixed(-1.234_567_891_234_5),
            s_row: crate::engine::fixed::to_fixed(7.25),
            s_other: 0,
        };
        let extremes = [
            typical,
            RatingPairStats {
                n: i64::MIN + 1,
                dot: i128::MAX,
                s_row: -i128::MAX,
                s_other: 1,
            },
            RatingPairStats {
                n: -1,
                dot: 1 << 120,
                s_row: -(255 << 100),
                s_other: i128::MAX - 255,
            },
            RatingPairStats::default(),
        ];
        for stats in extremes {
            let mut out = Vec::new();
            encode_rating_pair(&stats, &mut out);
            assert!(out.len() <= RATING_PAIR_MAX_LEN);
            assert_eq!(decode_rating_pair(&out).unwrap(), stats);
        }
        let mut out = Vec::new();
        encode_rating_pair(&typical, &mut out);
        assert!(out.len() <= 20, "a typical pair takes {} bytes", out.len());
        assert!(decode_rating_pair(&out[..out.len() - 1]).is_err());
        out.push(0);
        assert!(decode_rating_pair(&out).is_err());
    }

    #[test]
    fn user_round_trip_keeps_withdrawals_and_erasure() {
        let u = UserState {
            center: 3.25,
            erased_at: Some(UnixNanos(77)),
            ratings: vec![
                RatingEntry {
                    item: 1,
                    value: Some(4.0),
                    at: UnixNanos(100),
                    seq: 5,
                },
                RatingEntry {
                    item: 9,
                    value: None,
                    at: UnixNanos(120),
                    seq: 6,
                },
            ],
            purchases: vec![PurchaseEntry {
                item: 2,
                at: UnixNanos(130),
                seq: 7,
            }],
        };
        assert_eq!(decode_user(&encode_user(&u)).unwrap(), u);
        assert!(decode_user(&encode_user(&u)[..20]).is_err());
    }

    #[test]
    fn marks_round_trip() {
        for scope in [DirtyScope::OwnList, DirtyScope::WithNeighbors] {
            let mark = DirtyMark {
                since: UnixNanos(-7),
                scope,
            };
            assert_eq!(decode_dirty_mark(&encode_dirty_mark(&mark)).unwrap(), mark);
        }
        for signal in Signal::ALL {
            assert_eq!(
                split_signal_item_key(&signal_item_key(signal, 9)).unwrap(),
                (signal, 9)
            );
        }
    }

    #[test]
    fn published_round_trip() {
        let p = PublishedList {
            version: 3,
            computed_at: UnixNanos(10),
            event_time_watermark: None,
            neighbors: vec![Neighbor {
                item: 4,
                score: 0.5,
                support: 9,
            }],
        };
        assert_eq!(decode_published(&encode_published(&p)).unwrap(), p);
    }
}
