//! The two similarity signals: explicit ratings and implicit purchases.

/// Which statistics a list is computed from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Signal {
    /// Adjusted cosine over co-raters.
    Rating,
    /// Co-purchase score (cosine, Jaccard or log-likelihood ratio).
    Purchase,
}

impl Signal {
    /// Both signals, in key order.
    pub const ALL: [Signal; 2] = [Signal::Rating, Signal::Purchase];

    /// Name used in JSON records and on the command line.
    pub fn as_str(self) -> &'static str {
        match self {
            Signal::Rating => "rating",
            Signal::Purchase => "purchase",
        }
    }

    /// Inverse of [`Signal::as_str`].
    pub fn parse(name: &str) -> Option<Signal> {
        Signal::ALL.into_iter().find(|s| s.as_str() == name)
    }
}
