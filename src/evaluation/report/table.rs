//! The report's numbers: every metric of every setting and of the baselines in
//! `results.csv`, and the narrower HTML table a team reads in the browser (the figures at
//! N = 10, which fit a 1280-pixel window; the other cut-offs stay in the CSV).

use std::fmt::Write as _;

use crate::evaluation::evaluate::{EvaluationResult, PointResult};

/// A metric of the report: CSV name, table heading (`None`: CSV only), accessor, and
/// whether lower is better.
struct Metric {
    name: &'static str,
    heading: Option<&'static str>,
    value: fn(&PointResult) -> f64,
    lower_is_better: bool,
}

const fn metric(
    name: &'static str,
    heading: Option<&'static str>,
    value: fn(&PointResult) -> f64,
    lower_is_better: bool,
) -> Metric {
    Metric {
        name,
        heading,
        value,
        lower_is_better,
    }
}

const METRICS: [Metric; 19] = [
    metric("mae", Some("MAE"), |p| p.mae, true),
    metric("rmse", Some("RMSE"), |p| p.rmse, true),
    metric(
        "predicted_share",
        Some("share predicted"),
        |p| p.predicted_share,
        false,
    ),
    metric(
        "user_mean_mae",
        Some("MAE of user mean"),
        |p| p.user_mean_mae,
        true,
    ),
    metric("user_mean_rmse", None, |p| p.user_mean_rmse, true),
    metric("precision_at_5", None, |p| p.ranking.at(5).precision, false),
    metric(
        "precision_at_10",
        Some("precision @10"),
        |p| p.ranking.at(10).precision,
        false,
    ),
    metric("precision_at_20", None, |p| p.ranking.at(20).precision, false),
    metric("recall_at_5", None, |p| p.ranking.at(5).recall, false),
    metric(
        "recall_at_10",
        Some("recall @10"),
        |p| p.ranking.at(10).recall,
        false,
    ),
    metric("recall_at_20", None, |p| p.ranking.at(20).recall, false),
    metric("ndcg_at_5", None, |p| p.ranking.at(5).ndcg, false),
    metric("ndcg_at_10", Some("nDCG @10"), |p| p.ranking.at(10).ndcg, false),
    metric("ndcg_at_20", None, |p| p.ranking.at(20).ndcg, false),
    metric("hit_rate_at_5", None, |p| p.ranking.at(5).hit_rate, false),
    metric(
        "hit_rate_at_10",
        Some("hit rate @10"),
        |p| p.ranking.at(10).hit_rate,
        false,
    ),
    metric("hit_rate_at_20", None, |p| p.ranking.at(20).hit_rate, false),
    metric("coverage", Some("coverage"), |p| p.ranking.coverage, false),
    metric("head_share", Some("head share"), |p| p.ranking.head_share, true),
];

/// The baselines as a row of the table: the popularity ranking's figures; the rating
/// error columns, which the user-mean columns of each setting carry, are empty.
fn baseline_row(result: &EvaluationResult) -> PointResult {
    PointResult {
        setting: swept_keys(result)
            .into_iter()
            .map(|k| (k, "popularity".to_string()))
            .collect(),
        mae: f64::NAN,
        rmse: f64::NAN,
        predicted_share: f64::NAN,
        user_mean_mae: f64::NAN,
        user_mean_rmse: f64::NAN,
        ranking: result.popularity.clone(),
    }
}

/// The swept keys, in the order of each point's setting.
pub(super) fn swept_keys(result: &EvaluationResult) -> Vec<String> {
    result
        .points
        .first()
        .map_or(Vec::new(), |p| p.setting.iter().map(|(k, _)| k.clone()).collect())
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
    let mut best: Option<usize> = None;
    for (i, p) in points.iter().enumerate() {
        if best.is_none_or(|b| super::beats((m.value)(p), (m.value)(&points[b]), m.lower_is_better)) {
            best = Some(i);
        }
    }
    best
}

/// `results.csv`: the baseline row, then one row per setting, every metric.
pub(super) fn csv_text(result: &EvaluationResult) -> String {
    let keys = swept_keys(result);
    let mut header: Vec<&str> = vec!["row"];
    header.extend(keys.iter().map(String::as_str));
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

/// Escapes text for HTML.
pub(super) fn escape(text: &str) -> String {
    text.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
}

/// The HTML table: the baseline row first, then each setting, the best value of each
/// column highlighted and the settings that do not beat the baselines marked.
pub(super) fn html_table(result: &EvaluationResult) -> String {
    let shown: Vec<&Metric> = METRICS.iter().filter(|m| m.heading.is_some()).collect();
    let mut html = String::from("<table><thead><tr>");
    for k in swept_keys(result) {
        let _ = write!(html, "<th>{}</th>", escape(&k));
    }
    for m in &shown {
        let _ = write!(html, "<th>{}</th>", m.heading.unwrap_or(m.name));
    }
    html.push_str("<th>beats baselines</th></tr></thead><tbody>\n");
    let baseline = baseline_row(result);
    html.push_str("<tr class=\"baseline\">");
    for (_, v) in &baseline.setting {
        let _ = write!(html, "<td>{}</td>", escape(v));
    }
    for m in &shown {
        let _ = write!(html, "<td>{}</td>", cell((m.value)(&baseline), 4));
    }
    html.push_str("<td>baseline</td></tr>\n");
    let best: Vec<Option<usize>> = shown.iter().map(|m| best_index(&result.points, m)).collect();
    for (i, p) in result.points.iter().enumerate() {
        let beats = p.beats(&result.popularity);
        let _ = write!(html, "<tr{}>", if beats { "" } else { " class=\"behind\"" });
        for (_, v) in &p.setting {
            let _ = write!(html, "<td>{}</td>", escape(v));
        }
        for (m, b) in shown.iter().zip(&best) {
            let class = if *b == Some(i) { " class=\"best\"" } else { "" };
            let _ = write!(html, "<td{class}>{}</td>", cell((m.value)(p), 4));
        }
        let _ = writeln!(html, "<td>{}</td></tr>", if beats { "yes" } else { "no" });
    }
    html.push_str("</tbody></table>\n");
    html
}
