//! Top-N ranking by similarity mass, and the baselines every evaluation reports: a
//! hand-worked example, an independent numpy implementation on MovieLens, and the
//! margin over recommending the most popular items.

use crate::common;

use common::Settings;

use simtide::config::{Config, Ranking};
use simtide::evaluation::evaluate::{evaluate, EvaluationRequest, EvaluationResult, Split, Sweep};
use simtide::evaluation::quality::{RankingQuality, CUTOFFS};
use simtide::store::Store;
use simtide::views::recommend::{recommend_user, StoredLists};

/// Five users of a garden shop, written for this test (ratings 1–5):
///
/// |     | rake | hoe | spade | shears | gloves | mean |
/// |-----|------|-----|-------|--------|--------|------|
/// | u1  | 1    | 5   | 4     | 2      | 3      | 3    |
/// | u2  | 3    | 2   | 3     | 4      | 3      | 3    |
/// | u3  | 2    | 3   | 5     | 3      | 2      | 3    |
/// | u4  | 4    | 5   | 3     | 3      | 5      | 4    |
/// | eve | 5    | 3   |       |        |        | 4    |
///
/// Deviations from the user's mean, d = r − mean:
/// u1 (−2, 2, 1, −1, 0), u2 (0, −1, 0, 1, 0), u3 (−1, 0, 2, 0, −1), u4 (0, 1, −1, −1, 1),
/// eve (1, −1) on rake and hoe.
///
/// Adjusted cosine s(a, b) = Σ d_a·d_b / (√Σd_a² · √Σd_b²) over co-raters (u1–u4 for
/// every pair below):
/// - rake–shears: d_rake = (−2, 0, −1, 0), d_shears = (−1, 1, 0, −1); dot = 2; norms 5
///   and 3; s = 2/√15 = 0.516397779494322.
/// - rake–gloves: d_gloves = (0, 0, −1, 1); dot = 1; norms 5 and 2; s = 1/√10 =
///   0.316227766016838.
/// - hoe–gloves: d_hoe = (2, −1, 0, 1); dot = 1; norms 6 and 2; s = 1/√12 =
///   0.288675134594813.
/// - hoe–spade: d_spade = (1, 0, 2, −1); dot = 2 − 1 = 1; norms 6 and 6; s = 1/6 =
///   0.166666666666667.
/// - every other pair is 0 or negative (rake–hoe, with eve as a fifth co-rater:
///   dot = −4 − 1 = −5), so it is in no list.
///
/// Lists: rake [shears 0.5164, gloves 0.3162]; hoe [gloves 0.2887, spade 0.1667].
fn garden(path: &std::path::Path) {
    let rows: &[(&str, &[(&str, f64)])] = &[
        (
            "u1",
            &[
                ("rake", 1.0),
                ("hoe", 5.0),
                ("spade", 4.0),
                ("shears", 2.0),
                ("gloves", 3.0),
            ],
        ),
        (
            "u2",
            &[
                ("rake", 3.0),
                ("hoe", 2.0),
                ("spade", 3.0),
                ("shears", 4.0),
                ("gloves", 3.0),
            ],
        ),
        (
            "u3",
            &[
                ("rake", 2.0),
                ("hoe", 3.0),
                ("spade", 5.0),
                ("shears", 3.0),
                ("gloves", 2.0),
            ],
        ),
        (
            "u4",
            &[
                ("rake", 4.0),
                ("hoe", 5.0),
                ("spade", 3.0),
                ("shears", 3.0),
                ("gloves", 5.0),
            ],
        ),
        ("eve", &[("rake", 5.0), ("hoe", 3.0)]),
    ];
    common::write_ratings_csv(path, rows, 1_790_000_000);
}

/// eve's ranking, as (item, score), under `config`.
fn eve(store: &Store, config: &Config) -> Vec<(String, f64)> {
    recommend_user(store, &StoredLists, "eve", 10, config)
        .unwrap()
        .unwrap()
        .into_iter()
        .map(|r| (store.item_name(r.item).to_string(), r.score))
        .collect()
}

fn assert_ranking(got: &[(String, f64)], want: &[(&str, f64)]) {
    assert_eq!(got.len(), want.len(), "{got:?}");
    for ((item, score), (w_item, w_score)) in got.iter().zip(want) {
        assert_eq!(item, w_item, "{got:?}");
        assert!((score - w_score).abs() < 1e-12, "{item}: {score} vs {w_score}");
    }
}

#[test]
fn similarity_mass_ranks_the_hand_worked_example_digit_by_digit() {
    let dir = tempfile::tempdir().unwrap();
    let csv = dir.path().join("garden.csv");
    garden(&csv);
    let store_dir = dir.path().join("store");
    common::backfill(&store_dir, &[&csv], &common::config(Settings::EXACT));
    let store = Store::open_read_only(&store_dir).unwrap();
    let mut config = Config::default();
    assert_eq!(
        config.recommend.ranking,
        Ranking::SimilarityMass,
        "the default ranking"
    );
    assert!(config.recommend.normalise_lists, "normalised by default");

    // Similarity mass, eve's candidates (she has rake and hoe):
    //   gloves: in rake's and hoe's lists: 0.316227766016838 + 0.288675134594813
    //           = 0.604902900611651
    //   shears: in rake's list only: 0.516397779494322
    //   spade:  in hoe's list only:  0.166666666666667
    // gloves, liked a little by the fans of both of eve's items, comes first.
    config.recommend.normalise_lists = false;
    assert_ranking(
        &eve(&store, &config),
        &[
            ("gloves", 0.604_902_900_611_651),
            ("shears", 0.516_397_779_494_322),
            ("spade", 0.166_666_666_666_667),
        ],
    );

    // Normalised lists: rake's weights sum to 0.516397779494322 + 0.316227766016838 =
    // 0.832625545511160, hoe's to 0.288675134594813 + 0.166666666666667 =
    // 0.455341801261480.
    //   gloves: 0.316227766016838 / 0.832625545511160 + 0.288675134594813 / 0.455341801261480
    //           = 0.379795897113271 + 0.633974596215561 = 1.013770493328832
    //   shears: 0.516397779494322 / 0.832625545511160 = 0.620204102886729
    //   spade:  0.166666666666667 / 0.455341801261480 = 0.366025403784439
    config.recommend.normalise_lists = true;
    assert_ranking(
        &eve(&store, &config),
        &[
            ("gloves", 1.013_770_493_328_832),
            ("shears", 0.620_204_102_886_729),
            ("spade", 0.366_025_403_784_439),
        ],
    );

    // The weighted-sum predicted rating ranks otherwise: shears has one neighbor eve
    // rated, rake (5), so p = 5; gloves has rake (5) and hoe (3):
    //   p = (0.316227766016838·5 + 0.288675134594813·3) / (0.316227766016838 + 0.288675134594813)
    //     = (1.581138830084190 + 0.866025403784439) / 0.604902900611651
    //     = 2.447164233868629 / 0.604902900611651 = 4.045548849896678;
    // spade has hoe (3): p = 3.
    config.recommend.ranking = Ranking::PredictedRating;
    assert_ranking(
        &eve(&store, &config),
        &[("shears", 5.0), ("gloves", 4.045_548_849_896_678), ("spade", 3.0)],
    );
}

/// Evaluates MovieLens (seeded random 80/20 split per user, seed 7, relevant = held-out
/// rating ≥ 4) under `config` with `sweep`.
fn movielens(config: Config, sweep: &str) -> EvaluationResult {
    let dir = tempfile::tempdir().unwrap();
    let request = EvaluationRequest {
        inputs: vec![common::movielens_csv()],
        config,
        sweeps: vec![Sweep::parse(sweep).unwrap()],
        split: Split::Random {
            fraction: 0.2,
            seed: 7,
        },
        top_n: 10,
        relevant_rating: 4.0,
        show_progress: false,
    };
    evaluate(&request, dir.path()).unwrap()
}

/// Every figure of a ranking, by the names the report and the oracle use.
fn figures(q: &RankingQuality) -> Vec<(String, f64)> {
    let mut out = Vec::new();
    for n in CUTOFFS {
        let at = q.at(n);
        out.push((format!("precision_at_{n}"), at.precision));
        out.push((format!("recall_at_{n}"), at.recall));
        out.push((format!("ndcg_at_{n}"), at.ndcg));
        out.push((format!("hit_rate_at_{n}"), at.hit_rate));
    }
    out.push(("coverage".into(), q.coverage));
    out.push(("head_share".into(), q.head_share));
    out
}

/// The whole MovieLens snapshot at exact statistics (tolerance 0, no cut, at least 3
/// co-raters, 30 neighbors, undamped): simtide's similarity-mass and popularity figures
/// equal those of an independent numpy implementation written from the definitions
/// (scripts/oracle_ranking.py: Deshpande and Karypis 2004 for the mass, Järvelin and
/// Kekäläinen 2002 for nDCG) on the same split, plain and normalised: precision, recall,
/// nDCG and hit rate at 5, 10 and 20, coverage and head share, to 1e-9.
#[test]
fn movielens_similarity_mass_and_popularity_match_numpy() {
    let mut config = common::config(Settings {
        min_common_users: 3,
        batch_events: 50_000,
        ..Settings::EXACT
    });
    config.similarity.neighbors = 30;
    let ours = movielens(config, "normalise_lists=false,true");
    for (point, flag) in ours.points.iter().zip([None, Some("--normalise")]) {
        let numpy: serde_json::Value = serde_json::from_str(&common::movielens_oracle(
            "scripts/oracle_ranking.py",
            &flag.into_iter().collect::<Vec<_>>(),
        ))
        .unwrap();
        eprintln!(
            "{:?}\nsimtide: {:?}\nnumpy:   {numpy}",
            point.setting, point.ranking
        );
        assert!(numpy["users"].as_u64().unwrap() > 600, "{numpy}");
        for (ranking, what) in [(&point.ranking, "mass"), (&ours.popularity, "popularity")] {
            for (name, value) in figures(ranking) {
                let want = numpy[what][&name].as_f64().unwrap();
                assert!(
                    (value - want).abs() < 1e-9,
                    "{what} {name} ({flag:?}): simtide {value}, numpy {want}"
                );
            }
        }
    }
}

/// As a new user would run it (every setting at its default), on the whole MovieLens
/// snapshot: the default ranking's precision at 10 is at least 1.2 times the popularity
/// baseline's on the same split, and the weighted-sum predicted rating, ranked as a
/// top-N list, does worse than both (Cremonesi, Koren and Turrin, RecSys 2010: methods
/// tuned for rating error do poorly at top-N, and popularity is a strong baseline). The
/// 1.2 floor is the project's own bar, not a published figure: a margin over "merely
/// ties popularity" that a ranking no better than popularity fails, set below the ratio
/// this test prints so that it does not hang on one split.
#[test]
fn default_ranking_beats_the_popularity_baseline_on_movielens() {
    let mut config = Config::default();
    config.similarity.rating_min = 0.5;
    config.backfill.batch_events = 50_000;
    let result = movielens(config, "ranking=similarity_mass,predicted_rating");
    let popular = result.popularity.at(10).precision;
    let mass = result.points[0].ranking.at(10).precision;
    let predicted = result.points[1].ranking.at(10).precision;
    eprintln!(
        "precision@10: similarity mass {mass:.4}, predicted rating {predicted:.4}, popularity {popular:.4} ({:.2}×)",
        mass / popular
    );
    for p in &result.points {
        eprintln!("{:?}: {:?}", p.setting, p.ranking);
    }
    eprintln!("popularity: {:?}", result.popularity);
    assert!(mass >= 1.2 * popular, "{mass} < 1.2 × {popular}");
    assert!(predicted < popular, "{predicted} vs {popular}");
    assert!(result.points[0].beats(&result.popularity));
    assert!(!result.points[1].beats(&result.popularity));
}
