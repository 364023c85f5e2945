//! Durations in the configuration file, written as a whole number and a unit: `250ms`,
//! `5s`, `2m`, `1h`. A unit is required, so `interval = 5` is refused rather than guessed.
//!
//! Hand-written on purpose: the accepted syntax is exactly one whole number and one of four
//! units, as the README's table documents; a general duration crate would also accept
//! forms (`1h 30m`, `2days`) that the documentation does not define, and its errors would
//! not say which key was wrong the way these do.

use std::time::Duration;

use serde::{de, Deserialize, Deserializer, Serializer};

/// Splits `<digits><unit>` into the number and the unit; `what` and `examples` word the
/// error ("a duration", "250ms or 5s"). Shared by every quantity with a unit.
pub(super) fn number_and_unit<'t>(
    text: &'t str,
    what: &str,
    examples: &str,
) -> Result<(u64, &'t str), String> {
    let text = text.trim();
    let digits = text.chars().take_while(char::is_ascii_digit).count();
    let (number, unit) = text.split_at(digits);
    let n = number.parse().map_err(|_| {
        format!("\"{text}\" is not {what}: expected a whole number and a unit, e.g. {examples}")
    })?;
    Ok((n, unit.trim()))
}

/// Parses `<digits><unit>` with unit `ms`, `s`, `m` or `h`.
pub fn parse(text: &str) -> Result<Duration, String> {
    let (n, unit) = number_and_unit(text, "a duration", "250ms or 5s")?;
    let millis_per_unit = match unit {
        "ms" => 1,
        "s" => 1000,
        "m" => 60_000,
        "h" => 3_600_000,
        _ => {
            return Err(format!(
                "\"{text}\" has unknown duration unit \"{unit}\" (use ms, s, m or h)"
            ))
        }
    };
    n.checked_mul(millis_per_unit)
        .map(Duration::from_millis)
        .ok_or_else(|| format!("\"{text}\" is too long a duration"))
}

/// Writes a duration in the largest unit that represents it exactly.
pub fn format(d: Duration) -> String {
    let ms = d.as_millis();
    if ms.is_multiple_of(3_600_000) && ms > 0 {
        format!("{}h", ms / 3_600_000)
    } else if ms.is_multiple_of(60_000) && ms > 0 {
        format!("{}m", ms / 60_000)
    } else if ms.is_multiple_of(1000) {
        format!("{}s", ms / 1000)
    } else {
        format!("{ms}ms")
    }
}

/// serde `serialize_with` for duration fields.
pub fn serialize<S: Serializer>(d: &Duration, s: S) -> Result<S::Ok, S::Error> {
    s.serialize_str(&format(*d))
}

/// serde `deserialize_with` for duration fields.
pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<Duration, D::Error> {
    let text = String::deserialize(d)?;
    parse(&text).map_err(de::Error::custom)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn units_parse_and_print_back() {
        for (text, ms) in [("250ms", 250), ("5s", 5000), ("2m", 120_000), ("1h", 3_600_000)] {
            let d = parse(text).unwrap();
            assert_eq!(d, Duration::from_millis(ms));
            assert_eq!(format(d), text);
        }
    }

    #[test]
    fn missing_or_unknown_unit_is_refused() {
        assert!(parse("5").unwrap_err().contains("unknown duration unit"));
        assert!(parse("5 days").unwrap_err().contains("unknown duration unit"));
        assert!(parse("fast").unwrap_err().contains("not a duration"));
    }
}
