//! The evaluation report a team reads when choosing settings: `results.csv` with every
//! metric of every setting and of the baselines, a few figures per swept numeric setting
//! (`figures`), and a self-contained `report.html` that fits a 1280-pixel window: the
//! table at N = 10 (`table`) with the best value of each column highlighted and every
//! setting that does not beat the baselines marked, the figures, and the exact command
//! and configuration behind the numbers.

mod figures;
mod table;

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use anyhow::{Context, Result};

use crate::config::Config;
use crate::evaluation::evaluate::EvaluationResult;

use table::escape;

/// Whether `a` beats `b` for a figure where lower (or higher) is better: the one rule the
/// table's highlight and the figures' best lines share.
fn beats(a: f64, b: f64, lower_is_better: bool) -> bool {
    if lower_is_better {
        a < b
    } else {
        a > b
    }
}

const STYLE: &str = "body{font-family:sans-serif;margin:2em;max-width:1200px}\
table{border-collapse:collapse;font-size:14px}\
td,th{border:1px solid #ccc;padding:3px 6px;text-align:right}\
th{vertical-align:bottom;max-width:7em}\
td.best{background:#cfe8cf;font-weight:bold}\
tr.baseline td{background:#eef}\
tr.behind td{color:#a00}\
.figures{display:grid;grid-template-columns:repeat(2,minmax(0,1fr));gap:12px}\
.figures img{width:100%;height:auto;border:1px solid #eee}\
pre{background:#f4f4f4;padding:1em;white-space:pre-wrap}";

/// Writes `results.csv`, the figures and `report.html` into `dir`; returns the HTML path.
pub fn write_report(
    dir: &Path,
    result: &EvaluationResult,
    config: &Config,
    command: &str,
) -> Result<PathBuf> {
    std::fs::create_dir_all(dir)
        .with_context(|| format!("cannot create report directory {}", dir.display()))?;
    std::fs::write(dir.join("results.csv"), table::csv_text(result))?;
    let keys = table::swept_keys(result);
    let figures = figures::draw_all(result, &keys, dir)?;
    let mut html = String::new();
    writeln!(
        html,
        "<!doctype html><html><head><meta charset=\"utf-8\"><title>simtide evaluation</title><style>{STYLE}</style></head><body>"
    )?;
    writeln!(html, "<h1>simtide evaluation</h1>")?;
    writeln!(
        html,
        "<p>{} training ratings, {} held-out ratings, {} settings, {:.1} s. MAE and RMSE are over the held-out ratings a neighbor-based prediction could rate (their share is \"share predicted\"); the user-mean baseline predicts each user's mean training rating on the same ratings. Precision, recall, nDCG and hit rate are over users with a relevant held-out item; coverage and head share (the share of recommendations among the 10 % most-rated training items) at N = {}. The table shows N = 10; results.csv holds every figure at 5, 10 and 20.</p>",
        result.train_ratings,
        result.test_ratings,
        result.points.len(),
        result.seconds,
        result.top_n
    )?;
    html.push_str(&table::html_table(result));
    writeln!(
        html,
        "<p>Highlighted: the best setting for each column. First row: the popularity baseline (each user's most-rated training items not yet had). In red, marked \"no\": a setting that does not beat the baselines, that is whose MAE is not below the user mean's or whose precision at 10 is not above the popularity baseline's.</p>"
    )?;
    if !figures.is_empty() {
        writeln!(
            html,
            "<h2>Figures</h2><p>Each solid line is the best setting at each swept value; the dashed line of the same colour is the baseline it must beat. Every y-axis starts at zero.</p><div class=\"figures\">"
        )?;
        for name in &figures {
            writeln!(html, "<img src=\"{name}\" alt=\"{name}\">")?;
        }
        writeln!(html, "</div>")?;
    }
    writeln!(html, "<h2>Reproduce</h2><pre>{}</pre>", escape(command))?;
    writeln!(
        html,
        "<h2>Base configuration</h2><pre>{}</pre>",
        escape(&toml::to_string(config)?)
    )?;
    writeln!(html, "</body></html>")?;
    let path = dir.join("report.html");
    std::fs::write(&path, html)?;
    Ok(path)
}
