//! `simtide check-config`: the effective configuration, secrets masked.

use std::io::Write;

use anyhow::Result;

use simtide::config::secrets::masked;
use simtide::config::Config;

/// Prints the configuration as it will be used.
pub fn run(config: &Config, out: &mut dyn Write) -> Result<()> {
    writeln!(
        out,
        "# effective configuration (file, then SIMTIDE_* environment; secrets masked)"
    )?;
    write!(out, "{}", toml::to_string(&masked(config))?)?;
    Ok(())
}
