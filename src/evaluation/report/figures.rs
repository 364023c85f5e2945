//! The report's figures, a few per swept numeric setting: rating error, then precision,
//! recall, nDCG and hit rate at each cut-off N. Each line is drawn beside the baseline it
//! must beat (dashed, same colour), on a y-axis that starts at zero so a small difference
//! looks small, with x-axis ticks at exactly the swept values (an integer setting gets
//! integer ticks).

use std::ops::Range;
use std::path::Path;

use anyhow::Result;
use plotters::coord::ranged1d::{DefaultFormatting, KeyPointHint, Ranged};
use plotters::element::DashedPathElement;
use plotters::prelude::*;

use crate::evaluation::evaluate::{EvaluationResult, PointResult};
use crate::evaluation::quality::{AtCutoff, CUTOFFS};

/// One line of a figure: the setting's best value at each swept value, and the baseline
/// it is compared with at the same swept values.
struct Line {
    label: String,
    reference_label: String,
    colour: RGBColor,
    points: Vec<(f64, f64)>,
    reference: Vec<(f64, f64)>,
}

/// One figure: file stem, title, y-axis description, its lines, and whether the y-axis
/// may run past 1 (an error can; a share cannot).
struct Figure {
    stem: &'static str,
    title: String,
    y_desc: &'static str,
    lines: Vec<Line>,
    share: bool,
}

const COLOURS: [RGBColor; 3] = [
    RGBColor(31, 119, 180),
    RGBColor(214, 39, 40),
    RGBColor(44, 160, 44),
];

/// A ranking measure: a figure of its own, one line per cut-off.
struct RankingMeasure {
    stem: &'static str,
    title: &'static str,
    of: fn(&AtCutoff) -> f64,
}

const RANKING: [RankingMeasure; 4] = [
    RankingMeasure {
        stem: "precision",
        title: "Precision",
        of: |c| c.precision,
    },
    RankingMeasure {
        stem: "recall",
        title: "Recall",
        of: |c| c.recall,
    },
    RankingMeasure {
        stem: "ndcg",
        title: "nDCG",
        of: |c| c.ndcg,
    },
    RankingMeasure {
        stem: "hit-rate",
        title: "Hit rate",
        of: |c| c.hit_rate,
    },
];

/// The swept value of each point for key number `k`, when every value is a number.
fn swept_values(result: &EvaluationResult, k: usize) -> Option<Vec<f64>> {
    result
        .points
        .iter()
        .map(|p| p.setting[k].1.parse::<f64>().ok())
        .collect()
}

/// For each distinct swept value, ascending, the point whose `value` is best there (other
/// swept keys vary among the points that share it).
fn best_per_value<'a>(
    points: &'a [PointResult],
    xs: &[f64],
    value: impl Fn(&PointResult) -> f64,
    lower_is_better: bool,
) -> Vec<(f64, &'a PointResult)> {
    let mut best: Vec<(f64, &PointResult)> = Vec::new();
    for (p, &x) in points.iter().zip(xs) {
        match best.iter_mut().find(|(bx, _)| *bx == x) {
            Some(slot) if super::beats(value(p), value(slot.1), lower_is_better) => slot.1 = p,
            Some(_) => {}
            None => best.push((x, p)),
        }
    }
    best.sort_by(|a, b| a.0.total_cmp(&b.0));
    best
}

/// A line of `value`, with `reference` taken from the same best point at each x.
fn line(
    label: String,
    reference_label: String,
    colour: RGBColor,
    best: &[(f64, &PointResult)],
    value: impl Fn(&PointResult) -> f64,
    reference: impl Fn(&PointResult) -> f64,
) -> Line {
    Line {
        label,
        reference_label,
        colour,
        points: best.iter().map(|(x, p)| (*x, value(p))).collect(),
        reference: best.iter().map(|(x, p)| (*x, reference(p))).collect(),
    }
}

/// The figures for swept key number `k` with values `xs`.
fn figures_for(result: &EvaluationResult, key: &str, xs: &[f64]) -> Vec<Figure> {
    let by_mae = best_per_value(&result.points, xs, |p| p.mae, true);
    let error = Figure {
        stem: "rating-error",
        title: format!("Rating error by {key} (lower is better)"),
        y_desc: "error (rating points)",
        share: false,
        lines: vec![
            line(
                "MAE".into(),
                "MAE of user mean".into(),
                COLOURS[0],
                &by_mae,
                |p| p.mae,
                |p| p.user_mean_mae,
            ),
            line(
                "RMSE".into(),
                "RMSE of user mean".into(),
                COLOURS[1],
                &by_mae,
                |p| p.rmse,
                |p| p.user_mean_rmse,
            ),
        ],
    };
    let mut figures = vec![error];
    for RankingMeasure {
        stem,
        title,
        of: measure,
    } in RANKING
    {
        let lines = CUTOFFS
            .iter()
            .zip(COLOURS)
            .map(|(&n, colour)| {
                let value = |p: &PointResult| measure(&p.ranking.at(n));
                let best = best_per_value(&result.points, xs, value, false);
                let popular = measure(&result.popularity.at(n));
                line(
                    format!("at {n}"),
                    format!("popularity at {n}"),
                    colour,
                    &best,
                    value,
                    |_| popular,
                )
            })
            .collect();
        figures.push(Figure {
            stem,
            title: format!("{title} at N by {key} (higher is better)"),
            y_desc: "share (0 to 1)",
            share: true,
            lines,
        });
    }
    figures
}

/// An x-axis whose ticks are exactly the swept values: plotters' own axes pick "nice"
/// numbers, which puts ticks at 22.5 for a setting swept over 10, 20 and 40.
struct SweptAxis {
    span: Range<f64>,
    ticks: Vec<f64>,
}

impl Ranged for SweptAxis {
    type FormatOption = DefaultFormatting;
    type ValueType = f64;

    fn map(&self, value: &f64, limit: (i32, i32)) -> i32 {
        let share = (value - self.span.start) / (self.span.end - self.span.start);
        limit.0 + (share * f64::from(limit.1 - limit.0)).round() as i32
    }

    fn key_points<Hint: KeyPointHint>(&self, _hint: Hint) -> Vec<f64> {
        self.ticks.clone()
    }

    fn range(&self) -> Range<f64> {
        self.span.clone()
    }
}

/// The smallest round number (1, 1.5, 2, 2.5, 3, 4, 5, 6 or 8 times a power of ten) that
/// is at least `v`: the top of a y-axis.
fn round_up(v: f64) -> f64 {
    if v <= 0.0 || !v.is_finite() {
        return 1.0;
    }
    let scale = 10f64.powf(v.log10().floor());
    [1.0, 1.5, 2.0, 2.5, 3.0, 4.0, 5.0, 6.0, 8.0, 10.0]
        .iter()
        .map(|m| m * scale)
        .find(|c| *c >= v * (1.0 - 1e-12))
        .unwrap_or(10.0 * scale)
}

/// A swept value as its tick label: integers without a fraction, others as written.
fn tick_label(x: f64, integers: bool) -> String {
    if integers {
        format!("{x:.0}")
    } else {
        format!("{x}")
    }
}

/// Draws `figure` into `path`: the plot on the left, its legend on the right.
fn draw(figure: &Figure, key: &str, xs: &[f64], path: &Path) -> Result<()> {
    let mut ticks: Vec<f64> = xs.to_vec();
    ticks.sort_by(f64::total_cmp);
    ticks.dedup();
    let integers = ticks.iter().all(|x| x.fract() == 0.0);
    let (lo, hi) = (ticks[0], ticks[ticks.len() - 1]);
    let pad = ((hi - lo) * 0.08).max(if integers { 0.5 } else { lo.abs().max(1e-3) * 0.1 });
    let highest = figure
        .lines
        .iter()
        .flat_map(|l| l.points.iter().chain(&l.reference))
        .map(|(_, y)| *y)
        .filter(|y| y.is_finite())
        .fold(0.0, f64::max);
    let top = if figure.share {
        round_up(highest * 1.1).min(1.0)
    } else {
        round_up(highest * 1.1)
    };
    let y_digits = if top >= 0.5 { 2 } else { 3 };
    let root = SVGBackend::new(path, (640, 340)).into_drawing_area();
    let render = || -> Result<(), Box<dyn std::error::Error + '_>> {
        root.fill(&WHITE)?;
        let (plot_area, legend) = root.split_horizontally(470);
        let mut chart = ChartBuilder::on(&plot_area)
            .caption(&figure.title, ("sans-serif", 15))
            .margin(10)
            .x_label_area_size(40)
            .y_label_area_size(52)
            .build_cartesian_2d(
                SweptAxis {
                    span: (lo - pad)..(hi + pad),
                    ticks: ticks.clone(),
                },
                0f64..top,
            )?;
        chart
            .configure_mesh()
            .x_desc(key)
            .y_desc(figure.y_desc)
            .x_label_formatter(&|x| tick_label(*x, integers))
            .y_label_formatter(&|y| format!("{y:.y_digits$}"))
            .y_labels(6)
            .light_line_style(WHITE)
            .draw()?;
        for l in &figure.lines {
            let solid = l.colour.stroke_width(2);
            chart.draw_series(DashedLineSeries::new(l.reference.clone(), 6, 4, solid))?;
            chart.draw_series(LineSeries::new(l.points.clone(), solid))?;
            chart.draw_series(l.points.iter().map(|&p| Circle::new(p, 3, l.colour.filled())))?;
        }
        let mut y = 46;
        for l in &figure.lines {
            let solid = l.colour.stroke_width(2);
            legend.draw(&PathElement::new(vec![(6, y), (34, y)], solid))?;
            legend.draw(&Text::new(l.label.clone(), (40, y - 7), ("sans-serif", 13)))?;
            y += 20;
            legend.draw(&DashedPathElement::new(vec![(6, y), (34, y)], 6, 4, solid))?;
            legend.draw(&Text::new(
                l.reference_label.clone(),
                (40, y - 7),
                ("sans-serif", 13),
            ))?;
            y += 26;
        }
        root.present()?;
        Ok(())
    };
    render().map_err(|e| anyhow::anyhow!("cannot draw {}: {e}", path.display()))
}

/// Draws every figure for every numeric swept key into `dir`; returns the file names in
/// the order the page shows them.
pub(super) fn draw_all(result: &EvaluationResult, keys: &[String], dir: &Path) -> Result<Vec<String>> {
    let mut names = Vec::new();
    for (k, key) in keys.iter().enumerate() {
        let Some(xs) = swept_values(result, k) else {
            continue;
        };
        for figure in figures_for(result, key, &xs) {
            let name = format!("{}-by-{key}.svg", figure.stem);
            draw(&figure, key, &xs, &dir.join(&name))?;
            names.push(name);
        }
    }
    Ok(names)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn axis_tops_are_round_and_reach_the_data() {
        assert_eq!(round_up(0.83), 1.0);
        assert_eq!(round_up(0.21), 0.25);
        assert_eq!(round_up(0.031), 0.04);
        assert_eq!(round_up(1.28), 1.5);
        assert_eq!(round_up(0.0), 1.0);
    }

    #[test]
    fn integer_settings_get_integer_ticks() {
        assert_eq!(tick_label(20.0, true), "20");
        assert_eq!(tick_label(0.05, false), "0.05");
    }
}
