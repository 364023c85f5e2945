//! The commands of the `simtide` binary: flags in `args`, one module per command that
//! runs it through the library and formats its output.

pub mod args;
mod backfill;
mod check_config;
mod evaluate;
mod inspect;
mod recommend;
mod reshard;
mod run;
mod snapshot;

use std::io::Write;

use anyhow::Result;

use args::Command;
use simtide::config::Config;

/// Runs a parsed command; `config` is the configuration it loaded (for commands that
/// read one), output goes to `out`.
pub fn dispatch(command: Command, config: Option<Config>, out: &mut dyn Write) -> Result<()> {
    let config = || config.ok_or_else(|| anyhow::anyhow!("this command needs a configuration"));
    match command {
        Command::Backfill(args) => backfill::run(args, config()?, out),
        Command::Run(args) => run::run(args, config()?, out),
        Command::Status(args) => simtide::observability::status::show_status(&args.url, args.window, out),
        Command::CheckConfig(_) => check_config::run(&config()?, out),
        Command::Demo(args) => simtide::service::demo::run_demo(args.store, out),
        Command::Neighbors(args) => inspect::neighbors(args, out),
        Command::Explain(args) => inspect::explain(args, &config()?, out),
        Command::Export(args) => inspect::export(args, out),
        Command::Recommend(args) => recommend::run(args, &config()?, out),
        Command::Evaluate(args) => evaluate::run(args, config()?, out),
        Command::Reshard(args) => reshard::run(args, config()?, out),
        Command::Snapshot(args) => snapshot::run(args, out),
    }
}
