//! Sizes in the configuration file, written as a whole number and a binary unit: `512MiB`,
//! `2GiB`. A unit is required, so `memory_budget = 2` is refused rather than guessed.
//!
//! Hand-written for the same reason as `duration_text`, whose number-and-unit split it
//! shares: exactly the documented syntax, and errors that name the key.

use std::fmt;

use serde::{Deserialize, Serialize};

use super::duration_text::number_and_unit;

const UNITS: [(&str, u64); 4] = [("GiB", 1 << 30), ("MiB", 1 << 20), ("KiB", 1 << 10), ("B", 1)];

/// A number of bytes, read and written with a unit.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(try_from = "String", into = "String")]
pub struct ByteSize(pub u64);

impl ByteSize {
    /// Parses `<digits><unit>` with unit `B`, `KiB`, `MiB` or `GiB`.
    pub fn parse(text: &str) -> Result<ByteSize, String> {
        let (n, unit) = number_and_unit(text, "a size", "512MiB or 2GiB")?;
        let Some((_, bytes_per_unit)) = UNITS.iter().find(|(name, _)| *name == unit) else {
            return Err(format!(
                "\"{text}\" has unknown size unit \"{unit}\" (use B, KiB, MiB or GiB)"
            ));
        };
        n.checked_mul(*bytes_per_unit)
            .map(ByteSize)
            .ok_or_else(|| format!("\"{text}\" is too large a size"))
    }
}

/// Written in the largest unit that represents the size exactly.
impl fmt::Display for ByteSize {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let (name, per) = UNITS
            .iter()
            .find(|(_, per)| self.0.is_multiple_of(*per) && self.0 > 0)
            .unwrap_or(&("B", 1));
        write!(f, "{}{name}", self.0 / per)
    }
}

impl TryFrom<String> for ByteSize {
    type Error = String;

    fn try_from(text: String) -> Result<ByteSize, String> {
        ByteSize::parse(&text)
    }
}

impl From<ByteSize> for String {
    fn from(size: ByteSize) -> String {
        size.to_string()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sizes_read_and_print_back() {
        for (text, bytes) in [
            ("512MiB", 512 << 20),
            ("2GiB", 2 << 30),
            ("3KiB", 3072),
            ("7B", 7),
        ] {
            assert_eq!(ByteSize::parse(text), Ok(ByteSize(bytes)));
            assert_eq!(ByteSize(bytes).to_string(), text);
        }
        assert!(ByteSize::parse("5").unwrap_err().contains("unknown size unit"));
        assert!(ByteSize::parse("5GB").unwrap_err().contains("unknown size unit"));
        assert!(ByteSize::parse("lots").unwrap_err().contains("not a size"));
    }
}
