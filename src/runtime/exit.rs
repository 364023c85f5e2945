//! The process exit codes of `simtide`, each named once. Scripts, the container
//! orchestrator and the tests tell outcomes apart by them.

/// Everything asked was done. Orchestrators treat it as a clean stop.
pub const SUCCESS: u8 = 0;

/// The command failed and said why on standard error (bad input, a store that cannot be
/// opened, a broker that refused). Scripts and tests check for it after bad input.
pub const FAILED: u8 = 1;

/// Shutdown took longer than `live.shutdown_timeout` and the watchdog ended the process;
/// committed state is safe and the next start consumes the rest again. The runbook and
/// alerting on restarts tell this apart from a crash.
pub const SHUTDOWN_OVERRAN: i32 = 3;
