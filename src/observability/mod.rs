//! What the program says about itself: the Prometheus metrics (`metrics`), the one place
//! that turns an event of the program into metric writes and log lines (`observe`), log
//! rate limiting (`log_limit`), the progress meter of long commands (`meter`), the
//! reading of a scrape (`scrape`), and the status screen that reads a running service's
//! metrics (`status`).

pub(crate) mod log_limit;
pub(crate) mod meter;
pub mod metrics;
pub(crate) mod observe;
pub mod scrape;
pub mod status;
