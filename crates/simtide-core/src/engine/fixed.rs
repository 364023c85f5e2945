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

/// One contribution in fixed point: `(x · 2^80) as i128`, truncated toward zero.
///
/// Computed from the double's bits — the 53-bit significand shifted by the exponent plus
/// 80 — because Rust's float-to-i128 conversion is a library call that cost more than the
/// rest of a pair update (profiled on the 5-million-rating set). Equal to the plain
/// conversion for every input (tested below); infinities, NaN and magnitudes at or beyond
/// 2^47 take the plain conversion.
pub fn to_fixed(x: f64) -> i128 {
    const SIGNIFICAND_BITS: i32 = 52;
    const EXPONENT_BIAS: i32 = 1023;
    let bits = x.to_bits();
    let biased = ((bits >> SIGNIFICAND_BITS) & 0x7FF) as i32;
    if biased == 0 {
        // Zero or subnormal: below 2^-1022, far below one unit of 2^-80.
        return 0;
    }
    // x = significand · 2^(biased − bias − 52), so x · 2^80 = significand · 2^shift.
    let shift = biased - EXPONENT_BIAS - SIGNIFICAND_BITS + FRACTION_BITS;
    if biased == 0x7FF || shift > 127 - 53 {
        return (x * scale()) as i128;
    }
    let significand = (bits & ((1u64 << SIGNIFICAND_BITS) - 1)) | (1u64 << SIGNIFICAND_BITS);
    let magnitude = if shift >= 0 {
        i128::from(significand) << shift
    } else if shift > -64 {
        i128::from(significand >> -shift)
    } else {
        0
    };
    if x.is_sign_negative() {
        -magnitude
    } else {
        magnitude
    }
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
    fn bit_conversion_equals_the_plain_one() {
        let plain = |x: f64| (x * scale()) as i128;
        let mut cases = vec![
            0.0,
            -0.0,
            1.0,
            -1.0,
            0.5,
            1e-30,
            -3e-25,
            f64::MIN_POSITIVE,
            5e-324,
            1e14,
            -1.4e14,
            2f64.powi(46),
            2f64.powi(47),
            -2f64.powi(47),
            1e20,
            f64::MAX,
            f64::INFINITY,
            f64::NEG_INFINITY,
            f64::NAN,
        ];
        // A deterministic spread of products of deviations on rating scales.
        let mut state = 12345u64;
        for _ in 0..100_000 {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            let a = (state >> 11) as f64 / (1u64 << 53) as f64 * 9.0 - 4.5;
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            let b = (state >> 11) as f64 / (1u64 << 53) as f64 * 2e3 - 1e3;
            cases.extend([a * a, a * b, b * b, -a * b, a * 1e-9]);
        }
        for x in cases {
            assert_eq!(to_fixed(x), plain(x), "x = {x:e}");
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
