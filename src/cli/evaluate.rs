//! `simtide evaluate`: the held-out split, the sweep, the report files and one line per
//! setting.

use std::io::Write;

use anyhow::{Context, Result};

use super::args::EvaluateArgs;
use simtide::config::cluster::ClusterConfig;
use simtide::config::Config;
use simtide::evaluation::evaluate::{evaluate, EvaluationRequest, Split, Sweep};
use simtide::evaluation::report::write_report;
use simtide::timefmt::parse_event_time;

/// The split the flags ask for.
fn split_of(args: &EvaluateArgs) -> Result<Split> {
    if let Some(text) = &args.cutoff {
        let at = parse_event_time(text).with_context(|| format!("--cutoff {text:?}: expected RFC 3339"))?;
        return Ok(Split::Cutoff(at));
    }
    if !(args.holdout > 0.0 && args.holdout < 1.0) {
        anyhow::bail!(
            "--holdout must lie strictly between 0 and 1, got {}",
            args.holdout
        );
    }
    Ok(match args.random_split {
        Some(seed) => Split::Random {
            fraction: args.holdout,
            seed,
        },
        None => Split::LastFraction(args.holdout),
    })
}

/// Runs the evaluation, writes the report and prints one line per setting.
pub fn run(args: EvaluateArgs, mut config: Config, out: &mut dyn Write) -> Result<()> {
    // Settings are judged on the whole catalogue: the training stores are never shards.
    config.cluster = ClusterConfig::default();
    let request = EvaluationRequest {
        split: split_of(&args)?,
        inputs: args.input,
        config: config.clone(),
        sweeps: args
            .sweep
            .iter()
            .map(|s| Sweep::parse(s))
            .collect::<Result<_>>()?,
        top_n: args.top_n,
        relevant_rating: args.relevant,
        show_progress: !args.quiet,
    };
    let work = args.report.join("training-stores");
    let result = evaluate(&request, &work);
    std::fs::remove_dir_all(&work).ok();
    let result = result?;
    let command: Vec<String> = std::env::args().collect();
    let html = write_report(&args.report, &result, &config, &command.join(" "))?;
    let line = |name: &str, mae: String, p: &simtide::evaluation::quality::RankingQuality| {
        let at = |n: usize| p.at(n);
        format!(
            "{name:<32} {mae}  P@10 {:.4}  R@10 {:.4}  nDCG@10 {:.4}  hit@10 {:.3}  coverage {:.3}  head {:.3}",
            at(10).precision,
            at(10).recall,
            at(10).ndcg,
            at(10).hit_rate,
            p.coverage,
            p.head_share
        )
    };
    writeln!(
        out,
        "{}",
        line("baseline: popularity", " ".repeat(46), &result.popularity)
    )?;
    for p in &result.points {
        let setting: Vec<String> = p.setting.iter().map(|(k, v)| format!("{k}={v}")).collect();
        let mae = format!(
            "MAE {:.4} (user mean {:.4})  RMSE {:.4}",
            p.mae, p.user_mean_mae, p.rmse
        );
        let behind = if p.beats(&result.popularity) {
            ""
        } else {
            "  [does not beat the baselines]"
        };
        writeln!(out, "{}{behind}", line(&setting.join(" "), mae, &p.ranking))?;
    }
    writeln!(
        out,
        "{} held out, {} for training, {:.1}s; report: {}",
        result.test_ratings,
        result.train_ratings,
        result.seconds,
        html.display()
    )?;
    Ok(())
}
