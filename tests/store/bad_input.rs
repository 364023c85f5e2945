//! Malformed records: the valid ones are applied exactly, each bad one is reported with
//! its line, field and reason, and nothing already stored is lost.

use crate::common;

use common::Settings;
use simtide::engine::user_state::Outcome;
use simtide::event::EventKind;

use std::collections::BTreeMap;

use simtide::decode::RejectReason;

fn rating(user: &str, item: &str, value: f64, minute: u32) -> String {
    format!(
        r#"{{"kind":"rating","user":"{user}","item":"{item}","value":{value},"at":"2026-04-01T10:{minute:02}:00Z"}}"#
    )
}

#[test]
fn json_lines_apply_only_valid_records() {
    let dir = tempfile::tempdir().unwrap();
    let long_id = "x".repeat(300);
    let mut valid = Vec::new();
    // rake and hoe rise and fall together across users; spade goes the other way.
    let ratings = [
        ("ann", "rake", 5.0),
        ("ann", "hoe", 4.0),
        ("ann", "spade", 2.0),
        ("bo", "rake", 4.0),
        ("bo", "hoe", 5.0),
        ("bo", "spade", 1.0),
        ("cy", "rake", 2.0),
        ("cy", "hoe", 3.0),
        ("cy", "spade", 5.0),
    ];
    for (n, (u, i, v)) in ratings.into_iter().enumerate() {
        valid.push(rating(u, i, v, n as u32));
    }
    let bad: Vec<(String, &str, RejectReason)> = vec![
        ("{not json".into(), "(record)", RejectReason::BadJson),
        (
            r#"{"kind":"rating","user":"ann","item":"rake","value":"NaN","at":"2026-04-01T11:00:00Z"}"#
                .into(),
            "value",
            RejectReason::WrongType,
        ),
        (
            r#"{"kind":"rating","user":"ann","item":"rake","value":NaN,"at":"2026-04-01T11:00:00Z"}"#.into(),
            "(record)",
            RejectReason::BadJson,
        ),
        (rating("ann", "rake", 7.0, 30), "value", RejectReason::OutOfScale),
        (rating("", "rake", 3.0, 31), "user", RejectReason::EmptyId),
        (rating(&long_id, "rake", 3.0, 32), "user", RejectReason::IdTooLong),
        (
            r#"{"kind":"review","user":"ann","item":"rake","at":"2026-04-01T11:00:00Z"}"#.into(),
            "kind",
            RejectReason::UnknownKind,
        ),
        (
            r#"{"kind":"purchase","user":"ann","item":"rake","at":"last tuesday"}"#.into(),
            "at",
            RejectReason::BadTime,
        ),
        // Far past the clock (input.max_future_skew, 1 hour): it would pin ann's rake.
        (
            r#"{"kind":"rating","user":"ann","item":"rake","value":1,"at":"2261-01-01T00:00:00Z"}"#.into(),
            "at",
            RejectReason::TooFarAhead,
        ),
    ];
    // Interleave: valid, bad, valid, bad, …, then the remaining valid lines.
    let mut lines = Vec::new();
    let mut expected_bad = Vec::new();
    let mut v = valid.iter();
    for (text, field, reason) in &bad {
        lines.push(v.next().cloned().unwrap_or_default());
        lines.push(text.clone());
        expected_bad.push((lines.len() as u64, *field, *reason));
    }
    lines.extend(v.cloned());
    let mixed = dir.path().join("mixed.jsonl");
    std::fs::write(&mixed, lines.join("\n") + "\n").unwrap();
    let clean = dir.path().join("clean.jsonl");
    std::fs::write(&clean, valid.join("\n") + "\n").unwrap();

    let config = common::config(Settings {
        batch_events: 4,
        ..Settings::EXACT
    });
    let mixed_store = dir.path().join("mixed-store");
    let summary = common::backfill(&mixed_store, &[&mixed], &config);
    assert_eq!(
        summary.events.count(EventKind::Rating, Outcome::Applied),
        valid.len() as u64
    );
    let mut by_reason: BTreeMap<RejectReason, u64> = BTreeMap::new();
    for (_, _, r) in &expected_bad {
        *by_reason.entry(*r).or_default() += 1;
    }
    assert_eq!(summary.rejects, by_reason);
    let text = summary.to_string();
    assert!(text.contains("bad_time") && text.contains("rejected"), "{text}");

    let rejects = std::fs::read_to_string(mixed_store.join("rejects.jsonl")).unwrap();
    let reported: Vec<serde_json::Value> = rejects
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert_eq!(reported.len(), expected_bad.len());
    for (r, (line, field, reason)) in reported.iter().zip(&expected_bad) {
        assert_eq!(r["line"], *line, "{r}");
        assert_eq!(r["field"], *field, "{r}");
        assert_eq!(r["reason"], reason.code(), "{r}");
        assert!(r.get("raw").is_none(), "no record text by default: {r}");
    }

    let clean_store = dir.path().join("clean-store");
    common::backfill(&clean_store, &[&clean], &config);
    let a = common::export_without_times(&mixed_store, &dir.path().join("a.jsonl"));
    let b = common::export_without_times(&clean_store, &dir.path().join("b.jsonl"));
    assert!(!a.is_empty());
    assert_eq!(a, b, "the mixed file must give exactly the valid records' result");

    // A second bad file later: nothing already stored is lost.
    let worse = dir.path().join("worse.jsonl");
    std::fs::write(&worse, "garbage\n{\"kind\":\"rating\"}\n").unwrap();
    let again = common::backfill(&mixed_store, &[&mixed, &worse], &config);
    assert_eq!(again.skipped_files.len(), 1);
    assert_eq!(again.rejects.values().sum::<u64>(), 2);
    let all_rejects = std::fs::read_to_string(mixed_store.join("rejects.jsonl")).unwrap();
    assert_eq!(
        all_rejects.lines().count(),
        expected_bad.len() + 2,
        "rejects are appended, not overwritten"
    );
    assert!(all_rejects.starts_with(&rejects));
    let c = common::export_without_times(&mixed_store, &dir.path().join("c.jsonl"));
    assert_eq!(a, c);
}

#[test]
fn csv_reports_not_finite_and_short_records() {
    let dir = tempfile::tempdir().unwrap();
    let csv = dir.path().join("events.csv");
    std::fs::write(
        &csv,
        "user,item,value,at\nann,rake,5,1775037600\nann,hoe,NaN,1775037601\nbo,rake\nbo,hoe,,2026-04-01T10:00:00Z\nbo,rake,3,soon\n",
    )
    .unwrap();
    let store = dir.path().join("store");
    let summary = common::backfill(&store, &[&csv], &common::config(Settings::EXACT));
    assert_eq!(summary.events.count(EventKind::Rating, Outcome::Applied), 1);
    assert_eq!(summary.events.count(EventKind::Purchase, Outcome::Applied), 1);
    let reasons: Vec<serde_json::Value> = std::fs::read_to_string(store.join("rejects.jsonl"))
        .unwrap()
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    let got: Vec<(u64, String, String)> = reasons
        .iter()
        .map(|r| {
            (
                r["line"].as_u64().unwrap(),
                r["field"].as_str().unwrap().into(),
                r["reason"].as_str().unwrap().into(),
            )
        })
        .collect();
    assert_eq!(
        got,
        vec![
            (3, "value".into(), "not_finite".into()),
            (4, "(record)".into(), "bad_csv".into()),
            (6, "at".into(), "bad_time".into()),
        ]
    );
}
