//! The evaluation report: a CSV of every setting's metrics and the baselines', one SVG
//! plot per metric and swept setting, and a self-contained HTML page that shows them with
//! the best setting per metric highlighted, every setting that does not beat the
//! baselines marked, and the exact command and configuration behind the numbers.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use plotters::prelude::*;

use crate::config::Config;
use crate::evaluation::evaluate::{EvaluationResult, PointResult};

/// A metric of the report: name, accessor, and whether lower is better.
struct Metric {
    name: &'static str,
    value: fn(&PointResult) -> f64,
    lower_is_better: bool,
}

const fn metric(name: &'static str, value: fn(&PointResult) -> f64, lower_is_better: bool) -> Metric {
    Metric {
        name,
        value,
        lower_is_better,
    }
}

const METRICS: [Metric; 19] = [
    metric("mae", |p| p.mae, true),
    metric("rmse", |p| p.rmse, true),
    metric("predicted_share", |p| p.predicted_share, false),
    metric("user_mean_mae", |p| p.user_mean_mae, true),
    metric("user_mean_rmse", |p| p.user_mean_rmse, true),
    metric("precision_at_5", |p| p.ranking.at(5).precision, false),
    metric("precision_at_10", |p| p.ranking.at(10).precision, false),
    metric("precision_at_20", |p| p.ranking.at(20).precision, false),
    metric("recall_at_5", |p| p.ranking.at(5).recall, false),
    metric("recall_at_10", |p| p.ranking.at(10).recall, false),
    metric("recall_at_20", |p| p.ranking.at(20).recall, false),
    metric("ndcg_at_5", |p| p.ranking.at(5).ndcg, false),
    metric("ndcg_at_10", |p| p.ranking.at(10).ndcg, false),
    metric("ndcg_at_20", |p| p.ranking.at(20).ndcg, false),
    metric("hit_rate_at_5", |p| p.ranking.at(5).hit_rate, false),
    metric("hit_rate_at_10", |p| p.ranking.at(10).hit_rate, false),
    metric("hit_rate_at_20", |p| p.ranking.at(20).hit_rate, false),
    metric("coverage", |p| p.ranking.coverage, false),
    metric("head_share", |p| p.ranking.head_share, true),
];

/// The baselines as a row of the table: the popularity ranking's figures; the rating
/// error columns, which the user-mean columns of each setting carry, are empty.
fn baseline_row(result: &EvaluationResult) -> PointResult {
    let keys = result.points.first().map_or(Vec::new(), |p| p.setting.clone());
    PointResult {
        setting: keys
            .into_iter()
            .map(|(k, _)| (k, "popularity".to_string()))
            .collect(),
        mae: f64::NAN,
        rmse: f64::NAN,
        predicted_share: f64::NAN,
        user_mean_mae: f64::NAN,
        user_mean_rmse: f64::NAN,
        ranking: result.popularity.clone(),
    }
}

/// A cell: the value, or nothing where a row has no such figure.
fn cell(value: f64, digits: usize) -> String {
    if value.is_nan() {
        String::new()
    } else {
        format!("{value:.digits$}")
    }
}

fn best_index(points: &[PointResult], m: &Metric) -> Option<usize> {
    let better = |a: f64, b: f64| if m.lower_is_better { a < b } else { a > b };
    let mut best: Option<usize> = None;
    for (i, p) in points.iter().enumerate() {
        if best.is_none_or(|b| better((m.value)(p), (m.value)(&points[b]))) {
            best = Some(i);
        }
    }
    best
}

fn csv_text(result: &EvaluationResult) -> String {
    let keys: Vec<&str> = result.points.first().map_or(Vec::new(), |p| {
        p.setting.iter().map(|(k, _)| k.as_str()).collect()
    });
    let mut header = vec!["row"];
    header.extend(keys);
    header.extend(METRICS.iter().map(|m| m.name));
    header.push("beats_baselines");
    let mut out = header.join(",") + "\n";
    let baseline = baseline_row(result);
    let rows = std::iter::once((&baseline, "baseline")).chain(result.points.iter().map(|p| (p, "setting")));
    for (p, kind) in rows {
        let mut cells = vec![kind.to_string()];
        cells.extend(p.setting.iter().map(|(_, v)| v.clone()));
        cells.extend(METRICS.iter().map(|m| cell((m.value)(p), 6)));
        cells.push(if kind == "baseline" {
            String::new()
        } else {
            p.beats(&result.popularity).to_string()
        });
        out.push_str(&cells.join(","));
        out.push('\n');
    }
    out
}

/// Draws metric `m` against swept key number `k`: every point, and a line through the
/// best value at each x.
fn plot(result: &EvaluationResult, k: usize, m: &Metric, path: &Path) -> Result<()> {
    let key = &result.points[0].setting[k].0;
    let xs: Vec<(f64, f64)> = result
        .points
        .iter()
        .filter_map(|p| p.setting[k].1.parse::<f64>().ok().map(|x| (x, (m.value)(p))))
        .collect();
    let (xmin, xmax) = xs
        .iter()
        .fold((f64::MAX, f64::MIN), |(a, b), (x, _)| (a.min(*x), b.max(*x)));
    let (ymin, ymax) = xs
        .iter()
        .fold((f64::MAX, f64::MIN), |(a, b), (_, y)| (a.min(*y), b.max(*y)));
    let pad = |lo: f64, hi: f64| {
        let d = ((hi - lo) * 0.1).max(1e-6);
        (lo - d)..(hi + d)
    };
    let mut best_per_x: Vec<(f64, f64)> = Vec::new();
    for &(x, y) in &xs {
        match best_per_x.iter_mut().find(|(bx, _)| *bx == x) {
            Some(b) if (m.lower_is_better && y < b.1) || (!m.lower_is_better && y > b.1) => b.1 = y,
            Some(_) => {}
            None => best_per_x.push((x, y)),
        }
    }
    best_per_x.sort_by(|a, b| a.0.total_cmp(&b.0));
    let root = SVGBackend::new(path, (480, 320)).into_drawing_area();
    let draw = || -> Result<(), Box<dyn std::error::Error + '_>> {
        root.fill(&WHITE)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(format!("{} by {key}", m.name), ("sans-serif", 18))
            .margin(12)
            .x_label_area_size(36)
            .y_label_area_size(56)
            .build_cartesian_2d(pad(xmin, xmax), pad(ymin, ymax))?;
        chart
            .configure_mesh()
            .x_desc(key.as_str())
            .y_desc(m.name)
            .draw()?;
        chart.draw_series(LineSeries::new(best_per_x.clone(), &BLUE))?;
        chart.draw_series(xs.iter().map(|&(x, y)| Circle::new((x, y), 3, BLUE.filled())))?;
        root.present()?;
        Ok(())
    };
    draw().map_err(|e| anyhow::anyhow!("cannot draw {}: {e}", path.display()))
}

fn escape(text: &str) -> String {
    text.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
}

/// Writes `results.csv`, the plots and `report.html` into `dir`; returns the HTML path.
pub fn write_report(
    dir: &Path,
    result: &EvaluationResult,
    config: &Config,
    command: &str,
) -> Result<PathBuf> {
    std::fs::create_dir_all(dir)
        .with_context(|| format!("cannot create report directory {}", dir.display()))?;
    std::fs::write(dir.join("results.csv"), csv_text(result))?;
    let keys: Vec<String> = result
        .points
        .first()
        .map_or(Vec::new(), |p| p.setting.iter().map(|(k, _)| k.clone()).collect());
    let mut plots = Vec::new();
    for (k, key) in keys.iter().enumerate() {
        let numeric = result
            .points
            .iter()
            .all(|p| p.setting[k].1.parse::<f64>().is_ok());
        if !numeric {
            continue;
        }
        for m in &METRICS {
            let name = format!("{}-by-{key}.svg", m.name);
            plot(result, k, m, &dir.join(&name))?;
            plots.push(name);
        }
    }
    let mut html = String::new();
    writeln!(
        html,
        "<!doctype html><html><head><meta charset=\"utf-8\"><title>simtide evaluation</title>"
    )?;
    writeln!(html, "<style>body{{font-family:sans-serif;margin:2em}}table{{border-collapse:collapse}}td,th{{border:1px solid #ccc;padding:4px 8px;text-align:right}}td.best{{background:#cfe8cf;font-weight:bold}}tr.baseline td{{background:#eef}}tr.behind td{{color:#a00}}pre{{background:#f4f4f4;padding:1em}}</style></head><body>")?;
    writeln!(html, "<h1>simtide evaluation</h1>")?;
    writeln!(
        html,
        "<p>{} training ratings, {} held-out ratings, {} settings, {:.1} s. MAE and RMSE are over held-out ratings with a neighbor-based prediction (their share is predicted_share); user_mean_mae and user_mean_rmse predict each user's mean training rating on the same ratings. Precision, recall, nDCG and hit rate at 5, 10 and 20 are over users with a relevant held-out item; coverage and head share (the share of recommendations among the 10 % most-rated training items) at N = {}.</p>",
        result.train_ratings,
        result.test_ratings,
        result.points.len(),
        result.seconds,
        result.top_n
    )?;
    writeln!(html, "<table><tr>")?;
    for k in &keys {
        write!(html, "<th>{}</th>", escape(k))?;
    }
    for m in &METRICS {
        write!(html, "<th>{}</th>", m.name)?;
    }
    writeln!(html, "<th>beats baselines</th></tr>")?;
    let baseline = baseline_row(result);
    write!(html, "<tr class=\"baseline\">")?;
    for (_, v) in &baseline.setting {
        write!(html, "<td>{}</td>", escape(v))?;
    }
    for m in &METRICS {
        write!(html, "<td>{}</td>", cell((m.value)(&baseline), 4))?;
    }
    writeln!(html, "<td>baseline</td></tr>")?;
    let best: Vec<Option<usize>> = METRICS.iter().map(|m| best_index(&result.points, m)).collect();
    for (i, p) in result.points.iter().enumerate() {
        let beats = p.beats(&result.popularity);
        write!(html, "<tr{}>", if beats { "" } else { " class=\"behind\"" })?;
        for (_, v) in &p.setting {
            write!(html, "<td>{}</td>", escape(v))?;
        }
        for (m, b) in METRICS.iter().zip(&best) {
            let class = if *b == Some(i) { " class=\"best\"" } else { "" };
            write!(html, "<td{class}>{}</td>", cell((m.value)(p), 4))?;
        }
        writeln!(html, "<td>{}</td></tr>", if beats { "yes" } else { "no" })?;
    }
    writeln!(
        html,
        "</table><p>Highlighted: the best setting for each metric. First row: the popularity baseline (each user's most-rated training items not yet had). In red, marked \"no\": a setting that does not beat the baselines, that is whose MAE is not below user_mean_mae or whose precision_at_10 is not above the popularity baseline's.</p>"
    )?;
    for name in &plots {
        writeln!(html, "<img src=\"{name}\" alt=\"{name}\">")?;
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
