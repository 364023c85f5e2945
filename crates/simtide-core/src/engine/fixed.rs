//! Fixed-point pair sums, so that RocksDB may add merge operands in any grouping and a
//! retraction cancels its addition to the last bit.
//!
//! Each contribution (d_a·d_b, d_a², d_b²) is computed in f64 as usual, then scaled by
//! 2^80 and stored as an i128. Scaling by a power of two is exact, and any product of
//! magnitude ≥ 2^-27 is then already a whole number, so the conversion loses nothing
//! (smaller ones lose under 2^-80). Sums of such integers are exact and associative:
//! a rebuild, a resumed run and an uninterrupted run agree bit for bit, and a pair whose
//! contributions were all retracted reads back as exactly zero instead of rounding dust.
//!
//! Range: |sum| < 2^127 / 2^80 = 2^47 ≈ 1.4e14. With |d| ≤ 1000 (`config::MAX_RATING_RANGE`)
//! each contribution is at most 1e6, so a pair holds more than 1e8 co-raters; on a 1–5
//! scale (|d| ≤ 4) more than 8e12.

/// Fractional bits of a stored sum.
pub const FRACTION_BITS: i32 = 80;

fn scale() -> f64 {
    f64::from(2u32).powi(FRACTION_BITS)
}

/// One contribution in fixed point.
pub fn to_fixed(x: f64) -> i128 {
    (x * scale()) as i128
}

/// A stored sum as a real number.
pub fn to_f64(sum: i128) -> f64 {
    sum as f64 / scale()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn round_trip_is_exact_for_ordinary_products() {
        for x in [-16.0, -0.123456789, 1.0 / 3.0, 3.999, 1e-7] {
            assert_eq!(to_f64(to_fixed(x)), x);
        }
    }

    #[test]
    fn sums_are_associative() {
        let xs = [0.1, 0.2, 0.3, 1e-3, -0.7];
        let forward: i128 = xs.iter().map(|&x| to_fixed(x)).sum();
        let backward: i128 = xs.iter().rev().map(|&x| to_fixed(x)).sum();
        assert_eq!(forward, backward);
        assert_eq!(forward - xs.iter().map(|&x| to_fixed(x)).sum::<i128>(), 0);
    }
}
