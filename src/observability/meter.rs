//! Progress display for long work (backfill, publication, export): a live bar on a
//! terminal, and a plain line every few seconds otherwise (CI logs, job runners).

use std::io::IsTerminal;
use std::time::{Duration, Instant};

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

/// How often the plain-line fallback reports.
const LINE_EVERY: Duration = Duration::from_secs(5);

/// What a meter counts, which decides how amounts are shown.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Unit {
    /// Bytes of input (shown as KiB, MiB…).
    Bytes,
    /// Records, lists or settings (shown as plain counts).
    Items,
}

/// Whether a meter draws anything.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Display {
    /// A bar on a terminal, plain lines otherwise.
    Shown,
    /// Nothing at all (library use, tests, `--quiet`).
    Hidden,
}

impl Display {
    /// [`Display::Shown`] when `show` is true.
    pub fn when(show: bool) -> Display {
        if show {
            Display::Shown
        } else {
            Display::Hidden
        }
    }
}

/// One progress display.
pub struct Meter {
    bar: Option<ProgressBar>,
    label: &'static str,
    started: Instant,
    last_line: Instant,
    total: u64,
}

impl Meter {
    /// A meter over `total` amounts of `unit`.
    pub fn new(label: &'static str, total: u64, unit: Unit, display: Display) -> Meter {
        let enabled = display == Display::Shown;
        let bar = (enabled && std::io::stderr().is_terminal()).then(|| {
            let bar = ProgressBar::with_draw_target(Some(total), ProgressDrawTarget::stderr());
            let template = if unit == Unit::Bytes {
                "{prefix:>10} [{bar:30}] {bytes}/{total_bytes} {msg} eta {eta}"
            } else {
                "{prefix:>10} [{bar:30}] {pos}/{len} {msg} eta {eta}"
            };
            bar.set_style(
                ProgressStyle::with_template(template)
                    .unwrap_or_else(|_| ProgressStyle::default_bar())
                    .progress_chars("=> "),
            );
            bar.set_prefix(label);
            bar
        });
        let now = Instant::now();
        Meter {
            bar,
            label: if enabled { label } else { "" },
            started: now,
            // Report the first plain line after one interval.
            last_line: now,
            total,
        }
    }

    /// Moves to `position` with a short status message (e.g. events/s).
    pub fn update(&mut self, position: u64, message: &str) {
        if let Some(bar) = &self.bar {
            bar.set_position(position);
            bar.set_message(message.to_string());
        } else if !self.label.is_empty() && self.last_line.elapsed() >= LINE_EVERY {
            self.last_line = Instant::now();
            let pct = if self.total > 0 {
                100.0 * position as f64 / self.total as f64
            } else {
                0.0
            };
            eprintln!(
                "{}: {pct:.1}% after {:.0}s, {message}",
                self.label,
                self.started.elapsed().as_secs_f64()
            );
        }
    }

    /// Changes the total, for work whose size is known only once it has started.
    pub fn set_total(&mut self, total: u64) {
        self.total = total;
        if let Some(bar) = &self.bar {
            bar.set_length(total);
        }
    }

    /// Clears the bar.
    pub fn finish(self) {
        if let Some(bar) = self.bar {
            bar.finish_and_clear();
        }
    }
}
