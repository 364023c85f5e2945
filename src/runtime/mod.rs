//! How the process lives and ends: one shutdown signal for every loop (`shutdown`),
//! retries with back-off (`retry`), exit codes (`exit`), and naming a full disk
//! (`diskspace`).

pub mod diskspace;
pub mod exit;
pub(crate) mod retry;
pub mod shutdown;
