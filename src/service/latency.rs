//! Event-to-publication latency: from a message's record timestamp to the end of the
//! first publication cycle after its batch was committed, kept in fixed buckets so a
//! long run costs constant memory.

use crate::event::UnixMillis;

/// Bucket upper bounds grow by this factor (about 5% resolution).
const GROWTH: f64 = 1.05;
/// Number of buckets: 1 ms · 1.05^400 is far beyond any latency worth telling apart.
const BUCKETS: usize = 400;

/// A histogram of latencies in milliseconds.
#[derive(Debug, Clone)]
pub struct LatencyRecorder {
    counts: Vec<u64>,
    total: u64,
    max_ms: i64,
}

impl Default for LatencyRecorder {
    fn default() -> Self {
        LatencyRecorder {
            counts: vec![0; BUCKETS],
            total: 0,
            max_ms: 0,
        }
    }
}

fn bucket_of(ms: i64) -> usize {
    if ms <= 1 {
        return 0;
    }
    ((ms as f64).ln() / GROWTH.ln()).ceil().min((BUCKETS - 1) as f64) as usize
}

fn upper_bound(bucket: usize) -> f64 {
    GROWTH.powi(bucket as i32)
}

impl LatencyRecorder {
    /// Records the latency of every timestamp against the publication time `done_ms`.
    pub fn record_all(&mut self, timestamps: &[UnixMillis], done: UnixMillis) {
        for &t in timestamps {
            let ms = (done.0 - t.0).max(0);
            self.counts[bucket_of(ms)] += 1;
            self.total += 1;
            self.max_ms = self.max_ms.max(ms);
        }
    }

    /// The `q` quantile (0–1) in milliseconds, as the upper bound of its bucket (never
    /// above the largest latency seen); `None` before anything was recorded.
    pub fn quantile_ms(&self, q: f64) -> Option<f64> {
        if self.total == 0 {
            return None;
        }
        let rank = ((q * self.total as f64).ceil() as u64).clamp(1, self.total);
        let mut seen = 0;
        for (bucket, &n) in self.counts.iter().enumerate() {
            seen += n;
            if seen >= rank {
                return Some(upper_bound(bucket).min(self.max_ms as f64));
            }
        }
        Some(self.max_ms as f64)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quantiles_land_within_one_bucket_of_the_exact_value() {
        let mut r = LatencyRecorder::default();
        let stamps: Vec<UnixMillis> = (0..1000).map(|i| UnixMillis(10_000 - (i + 1))).collect();
        r.record_all(&stamps, UnixMillis(10_000)); // latencies 1..=1000 ms
        let p50 = r.quantile_ms(0.5).unwrap();
        let p99 = r.quantile_ms(0.99).unwrap();
        assert!((500.0..=500.0 * GROWTH).contains(&p50), "{p50}");
        assert!((990.0..=1000.0).contains(&p99), "{p99}");
        assert_eq!(r.quantile_ms(1.0), Some(1000.0), "the largest is exact");
    }
}
