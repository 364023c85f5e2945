//! `simtide status`: one screen an on-call engineer reads in five seconds. Two scrapes of
//! a running service's `/metrics`, a window apart, plus its `/readyz`: readiness first,
//! then freshness, lag per partition, throughput, dead letters in the window, drift and
//! store health. Colour only on a terminal that wants it.

use std::fmt::Write as _;
use std::io::{IsTerminal, Write};
use std::time::Duration;

use anyhow::{bail, Context, Result};

use crate::observability::metrics::names;
use crate::observability::scrape::Scrape;

/// The HTTP client of the screen: every status is an answer (a 503 from `/readyz` is what
/// the screen shows), and nothing waits longer than 10 s.
fn client() -> ureq::Agent {
    ureq::Agent::config_builder()
        .timeout_global(Some(Duration::from_secs(10)))
        .http_status_as_error(false)
        .build()
        .into()
}

/// `(status, body)` of a GET of `path` on `base` (`http://HOST:PORT`).
fn get(agent: &ureq::Agent, base: &str, path: &str) -> Result<(u16, String)> {
    let url = format!("{}{path}", base.trim_end_matches('/'));
    let mut answer = agent
        .get(&url)
        .call()
        .with_context(|| format!("cannot reach simtide at {base}"))?;
    let body = answer
        .body_mut()
        .read_to_string()
        .with_context(|| format!("{url}: unreadable answer"))?;
    Ok((answer.status().as_u16(), body))
}

/// Whether to colour: a terminal, `NO_COLOR` unset, `TERM` not `dumb`.
fn colour_wanted() -> bool {
    std::io::stdout().is_terminal()
        && std::env::var_os("NO_COLOR").is_none()
        && std::env::var("TERM").map_or(true, |t| t != "dumb")
}

fn paint(text: &str, good: bool, colour: bool) -> String {
    match (colour, good) {
        (false, _) => text.to_string(),
        (true, true) => format!("\x1b[32m{text}\x1b[0m"),
        (true, false) => format!("\x1b[1;31m{text}\x1b[0m"),
    }
}

fn bytes(n: f64) -> String {
    let units = ["B", "KB", "MB", "GB", "TB"];
    let mut v = n;
    let mut u = 0;
    while v >= 1000.0 && u + 1 < units.len() {
        v /= 1000.0;
        u += 1;
    }
    format!("{v:.1} {}", units[u])
}

/// Renders the screen from a readiness answer and two scrapes `window` apart. Long by
/// design: the screen top to bottom, one block per section.
pub fn render(
    base: &str,
    readiness: &serde_json::Value,
    before: &Scrape,
    after: &Scrape,
    window: Duration,
    colour: bool,
) -> String {
    let secs = window.as_secs_f64().max(1e-9);
    let mut out = String::new();
    let ready = readiness["ready"].as_bool().unwrap_or(false);
    let failing: Vec<String> = readiness["checks"]
        .as_array()
        .into_iter()
        .flatten()
        .filter(|c| c["ok"] == false)
        .map(|c| {
            format!(
                "{}: {}",
                c["name"].as_str().unwrap_or("?"),
                c["detail"].as_str().unwrap_or("")
            )
        })
        .collect();
    let verdict = if ready {
        paint("READY", true, colour)
    } else {
        paint("NOT READY", false, colour)
    };
    let place = match (
        readiness["shard"]["index"].as_u64(),
        readiness["shard"]["of"].as_u64(),
    ) {
        (Some(index), Some(of)) => format!(" (shard {index} of {of})"),
        _ => String::new(),
    };
    let _ = writeln!(out, "simtide at {base}{place}: {verdict}");
    for f in &failing {
        let _ = writeln!(out, "  ! {f}");
    }
    if readiness["publishing"] == false {
        let _ = writeln!(
            out,
            "  standby      another instance of this shard holds the lease and publishes; this one keeps its store current"
        );
    }
    let staleness = after.sum(names::STALENESS_SECONDS, "");
    let since_publish = after.sum(names::LAST_PUBLISH_TIMESTAMP_SECONDS, "");
    let now = crate::timefmt::now_nanos().as_secs_f64();
    let _ = writeln!(
        out,
        "  freshness    staleness {}  ·  event-time lag {:.1} s  ·  last publication {:.1} s ago",
        paint(&format!("{staleness:.1} s"), staleness < 60.0, colour),
        after.sum(names::EVENT_TIME_LAG_SECONDS, ""),
        (now - since_publish).max(0.0)
    );
    let stalled = after.sum(names::BATCH_STALLED_SECONDS, "");
    if stalled > 0.0 {
        let _ = writeln!(
            out,
            "  {}",
            paint(
                &format!("batch stalled for {stalled:.0} s: it cannot be committed (see the failing checks); consumption waits"),
                false,
                colour
            )
        );
    }
    let lags: Vec<String> = after
        .series(names::CONSUMER_LAG_MESSAGES)
        .map(|(labels, v)| format!("{} {v:.0}", labels.replace("partition=", "p").replace('"', "")))
        .collect();
    let lag_now = after.sum(names::CONSUMER_LAG_MESSAGES, "");
    let lag_rate = (lag_now - before.sum(names::CONSUMER_LAG_MESSAGES, "")) / secs;
    let _ = writeln!(
        out,
        "  lag          {}  (total {lag_now:.0}, {lag_rate:+.0}/s)",
        if lags.is_empty() {
            "-".to_string()
        } else {
            lags.join(" · ")
        }
    );
    let rate = |outcome: &str| {
        let f = format!("outcome=\"{outcome}\"");
        (after.sum(names::EVENTS_TOTAL, &f) - before.sum(names::EVENTS_TOTAL, &f)) / secs
    };
    let _ = writeln!(
        out,
        "  throughput   {:.0} events/s applied  ·  {:.0} stale/s  ·  {:.0} duplicate/s",
        rate("applied"),
        rate("stale"),
        rate("duplicate")
    );
    let mut letters: Vec<String> = Vec::new();
    let mut total = 0.0;
    for (labels, v) in after.series(names::DEAD_LETTERS_TOTAL) {
        let previous = before
            .series(names::DEAD_LETTERS_TOTAL)
            .find(|(l, _)| *l == labels)
            .map_or(0.0, |(_, p)| p);
        if v - previous > 0.0 {
            total += v - previous;
            letters.push(format!(
                "{} {:.0}",
                labels.trim_start_matches("reason=").replace('"', ""),
                v - previous
            ));
        }
    }
    let _ = writeln!(
        out,
        "  dead letters {} in the last {:.0} s{}",
        paint(&format!("{total:.0}"), total == 0.0, colour),
        secs,
        if letters.is_empty() {
            String::new()
        } else {
            format!(" ({})", letters.join(", "))
        }
    );
    for signal in ["rating", "purchase"] {
        let f = format!("signal=\"{signal}\"");
        let count = after.sum(&format!("{}_count", names::LIST_DRIFT_RATIO), &f);
        if count > 0.0 {
            let _ = writeln!(
                out,
                "  drift        {signal}: {:.3} of neighbors replaced per changed list, RBO {:.3}, over {count:.0} changes",
                after.sum(&format!("{}_sum", names::LIST_DRIFT_RATIO), &f) / count,
                after.sum(&format!("{}_sum", names::LIST_RANK_BIASED_OVERLAP_RATIO), &f) / count
            );
        }
    }
    let size = after.sum(names::STORE_SIZE_BYTES, "");
    let free = after.sum(names::STORE_DISK_AVAILABLE_BYTES, "");
    let free_share = if size + free > 0.0 {
        free / (size + free)
    } else {
        1.0
    };
    let _ = writeln!(
        out,
        "  store        {}  ·  compaction debt {}  ·  disk free {}  ·  center gap max {:.3}",
        bytes(size),
        bytes(after.sum(names::STORE_PENDING_COMPACTION_BYTES, "")),
        paint(&format!("{:.0}%", free_share * 100.0), free_share > 0.1, colour),
        after.sum(names::CENTER_GAP_MAX, "")
    );
    out
}

/// Fetches and prints the screen.
pub fn show_status(base: &str, window: Duration, out: &mut dyn Write) -> Result<()> {
    if !base.starts_with("http://") {
        bail!("--url {base:?}: expected http://HOST:PORT");
    }
    let agent = client();
    let (_, ready_body) = get(&agent, base, "/readyz")?;
    let readiness: serde_json::Value =
        serde_json::from_str(&ready_body).with_context(|| format!("{base}/readyz did not answer JSON"))?;
    let (status, first) = get(&agent, base, "/metrics")?;
    if status != 200 {
        bail!("{base}/metrics answered {status}");
    }
    std::thread::sleep(window);
    let (_, second) = get(&agent, base, "/metrics")?;
    write!(
        out,
        "{}",
        render(
            base,
            &readiness,
            &Scrape::parse(&first),
            &Scrape::parse(&second),
            window,
            colour_wanted()
        )
    )?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn screen_reports_rates_over_the_window_and_failing_checks() {
        let before = Scrape::parse(
            "# HELP x\nsimtide_events_total{kind=\"rating\",outcome=\"applied\"} 100\nsimtide_dead_letters_total{reason=\"bad_json\"} 1\nsimtide_consumer_lag_messages{partition=\"0\"} 10\n",
        );
        let after = Scrape::parse(
            "simtide_events_total{kind=\"rating\",outcome=\"applied\"} 300\nsimtide_dead_letters_total{reason=\"bad_json\"} 4\nsimtide_consumer_lag_messages{partition=\"0\"} 30\nsimtide_staleness_seconds 2.5\nsimtide_batch_stalled_seconds 42\n",
        );
        let readiness: serde_json::Value = serde_json::from_str(
            r#"{"ready":false,"checks":[{"name":"broker","ok":false,"detail":"no broker answered"}]}"#,
        )
        .unwrap();
        let screen = render(
            "http://x:1",
            &readiness,
            &before,
            &after,
            Duration::from_secs(2),
            false,
        );
        assert!(screen.contains("NOT READY"), "{screen}");
        assert!(screen.contains("! broker: no broker answered"), "{screen}");
        assert!(screen.contains("100 events/s applied"), "{screen}");
        assert!(
            screen.contains("dead letters 3 in the last 2 s (bad_json 3)"),
            "{screen}"
        );
        assert!(screen.contains("p0 30") && screen.contains("+10/s"), "{screen}");
        assert!(screen.contains("staleness 2.5 s"), "{screen}");
        assert!(screen.contains("batch stalled for 42 s"), "{screen}");
        assert!(!screen.contains('\x1b'), "no colour when not asked");
    }

    #[test]
    fn a_shard_is_named_and_its_label_does_not_split_the_series() {
        let scrape = |applied: u32| {
            Scrape::parse(&format!(
                "simtide_events_total{{kind=\"rating\",outcome=\"applied\",shard=\"2\"}} {applied}\nsimtide_consumer_lag_messages{{partition=\"1\",shard=\"2\"}} 5\nsimtide_staleness_seconds{{shard=\"2\"}} 1.5\n"
            ))
        };
        let readiness: serde_json::Value = serde_json::from_str(
            r#"{"ready":true,"shard":{"index":2,"of":3},"publishing":false,"checks":[]}"#,
        )
        .unwrap();
        let screen = render(
            "http://x:1",
            &readiness,
            &scrape(0),
            &scrape(50),
            Duration::from_secs(1),
            false,
        );
        assert!(
            screen.starts_with("simtide at http://x:1 (shard 2 of 3): READY"),
            "{screen}"
        );
        assert!(screen.contains("lag          p1 5 "), "{screen}");
        assert!(screen.contains("50 events/s applied"), "{screen}");
        assert!(screen.contains("staleness 1.5 s"), "{screen}");
    }
}
