//! One scrape of a service's `/metrics` in the Prometheus text format, for `simtide
//! status` and the tests that read a running service's counters.
//!
//! Hand-written on purpose. The crates that parse this format were weighed: one splits
//! label values on `,` and `=` (a value holding either is cut) and brings a date library
//! for timestamps we never read; another is LGPL-3.0, which this Apache-2.0 binary does
//! not take on. The format's sample line is small (name, optional labels with quoted and
//! escaped values, value, optional timestamp), and the tests below cover each part.

use std::collections::BTreeMap;

/// One scrape: series (name with labels, in exposition order, without `shard`) → value.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Scrape(BTreeMap<String, f64>);

impl Scrape {
    /// Parses the Prometheus text format; comments, blank lines and lines that are not a
    /// sample are skipped. A shard's `shard` label is dropped: one scrape is one
    /// instance, and the status screen names the shard from `/readyz`.
    pub fn parse(text: &str) -> Scrape {
        Scrape(
            text.lines()
                .filter(|l| !l.starts_with('#') && !l.trim().is_empty())
                .filter_map(parse_sample)
                .map(|sample| (series_key(sample.name, &sample.labels), sample.value))
                .collect(),
        )
    }

    /// The value of one series, written as exposed (`name{a="x",b="y"}`, labels in
    /// exposition order, `shard` left out).
    pub fn value(&self, series: &str) -> Option<f64> {
        self.0.get(series).copied()
    }

    /// Every series of a metric, with its label text (`partition="0"`) and value.
    pub fn series<'a>(&'a self, name: &'a str) -> impl Iterator<Item = (&'a str, f64)> + 'a {
        self.0.iter().filter_map(move |(s, v)| {
            let labels = s.strip_prefix(name)?;
            match labels.strip_prefix('{') {
                Some(rest) => Some((rest.trim_end_matches('}'), *v)),
                None if labels.is_empty() => Some(("", *v)),
                None => None,
            }
        })
    }

    /// Sum over a metric's series whose label text contains `filter` (empty: all).
    pub fn sum(&self, name: &str, filter: &str) -> f64 {
        self.series(name)
            .filter(|(l, _)| l.contains(filter))
            .map(|(_, v)| v)
            .sum()
    }
}

/// `name{labels}` with the labels re-quoted in their order, `shard` left out.
fn series_key(name: &str, labels: &[(&str, String)]) -> String {
    let kept: Vec<String> = labels
        .iter()
        .filter(|(k, _)| *k != "shard")
        .map(|(k, v)| format!("{k}=\"{}\"", v.replace('\\', "\\\\").replace('"', "\\\"")))
        .collect();
    if kept.is_empty() {
        name.to_string()
    } else {
        format!("{name}{{{}}}", kept.join(","))
    }
}

/// One sample line: metric name, labels (values unescaped) in their order, value.
struct Sample<'a> {
    name: &'a str,
    labels: Vec<(&'a str, String)>,
    value: f64,
}

/// A sample line, or `None` when the line is not a well-formed sample.
fn parse_sample(line: &str) -> Option<Sample<'_>> {
    let line = line.trim();
    let name_end = line.find(['{', ' ', '\t']).unwrap_or(line.len());
    let (name, mut rest) = line.split_at(name_end);
    let mut labels = Vec::new();
    if let Some(after) = rest.strip_prefix('{') {
        rest = after;
        loop {
            rest = rest.trim_start_matches([' ', ',']);
            if let Some(after) = rest.strip_prefix('}') {
                rest = after;
                break;
            }
            let (key, after) = rest.split_once('=')?;
            let (value, after) = quoted(after.trim_start())?;
            labels.push((key.trim(), value));
            rest = after;
        }
    }
    let value = rest.split_whitespace().next()?.parse().ok()?;
    (!name.is_empty()).then_some(Sample { name, labels, value })
}

/// A double-quoted label value at the start of `text`, unescaped, and the text after it.
fn quoted(text: &str) -> Option<(String, &str)> {
    let mut chars = text.strip_prefix('"')?.char_indices();
    let mut value = String::new();
    while let Some((i, c)) = chars.next() {
        match c {
            '"' => return Some((value, &text[i + 2..])),
            '\\' => match chars.next()?.1 {
                'n' => value.push('\n'),
                other => value.push(other),
            },
            c => value.push(c),
        }
    }
    None
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_labels_values_and_timestamps() {
        let scrape = Scrape::parse(
            "# HELP simtide_x help text\n# TYPE simtide_x counter\nsimtide_x 3\n\
             simtide_y{a=\"1\",b=\"two\"} 4.5 1712345678000\n\
             simtide_z_bucket{le=\"+Inf\"} 7\nsimtide_nan NaN\nnot a sample line\n",
        );
        assert_eq!(scrape.value("simtide_x"), Some(3.0));
        assert_eq!(scrape.value("simtide_y{a=\"1\",b=\"two\"}"), Some(4.5));
        assert_eq!(scrape.value("simtide_z_bucket{le=\"+Inf\"}"), Some(7.0));
        assert!(scrape.value("simtide_nan").unwrap().is_nan());
        assert_eq!(scrape.sum("simtide_y", "b=\"two\""), 4.5);
        assert_eq!(scrape.0.len(), 4, "the line that is not a sample is skipped");
    }

    #[test]
    fn label_values_may_hold_commas_equals_quotes_and_braces() {
        let scrape = Scrape::parse("m{reason=\"a,b=c\",detail=\"say \\\"hi\\\" }\",shard=\"1\"} 2\n");
        let (labels, value) = scrape.series("m").next().unwrap();
        assert_eq!(value, 2.0);
        assert_eq!(labels, "reason=\"a,b=c\",detail=\"say \\\"hi\\\" }\"");
    }

    #[test]
    fn the_shard_label_does_not_split_a_series() {
        let scrape = Scrape::parse("m{shard=\"2\"} 1\nn{partition=\"0\",shard=\"2\"} 5\n");
        assert_eq!(scrape.value("m"), Some(1.0));
        assert_eq!(scrape.value("n{partition=\"0\"}"), Some(5.0));
    }
}
