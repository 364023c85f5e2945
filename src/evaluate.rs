//! Offline evaluation: split a team's own events by time, build similarities on the
//! training part with the real engine, and score the held-out ratings for every setting
//! of a sweep.

use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::{bail, Context, Result};
use rustc_hash::FxHashSet;

use crate::config::{Config, Neighborhood};
use crate::decode::Limits;
use crate::event::{Event, EventBody, UnixNanos};
use crate::meter::{Display, Meter, Unit};
use crate::pipeline::apply_and_commit;
use crate::predict::{recommend_for, user_history, NeighborIndex, Predictor, ScoreTable, UserView};
use crate::publish::{compute_list, name_order};
use crate::score::ListSettings;
use crate::signal::Signal;
use crate::source::{Decoded, InputFile, RecordReader};
use crate::store::{StatsFingerprint, Store};
use crate::topk::Exclusions;

/// How held-out ratings are chosen.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Split {
    /// The most recent fraction of each user's ratings (by time, then input order).
    LastFraction(f64),
    /// Every rating at or after this time.
    Cutoff(UnixNanos),
    /// A pseudo-random fraction of each user's ratings, the same for the same seed (the
    /// protocol of published figures that do not split by time).
    Random {
        /// Share held out.
        fraction: f64,
        /// Seed of the selection.
        seed: u64,
    },
}

/// SplitMix64: a fixed, well-mixed hash of an event's position for random splits.
fn mix(mut x: u64) -> u64 {
    x = x.wrapping_add(0x9E37_79B9_7F4A_7C15);
    x = (x ^ (x >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    x = (x ^ (x >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    x ^ (x >> 31)
}

/// One swept configuration key and its values, e.g. `neighbors=10,20,30`.
#[derive(Debug, Clone, PartialEq)]
pub struct Sweep {
    /// Key name inside `[similarity]` or `[recommend]`.
    pub key: String,
    /// Values as written.
    pub values: Vec<String>,
}

impl Sweep {
    /// Parses `key=v1,v2,…`.
    pub fn parse(text: &str) -> Result<Sweep> {
        let Some((key, values)) = text.split_once('=') else {
            bail!("--sweep {text:?}: expected KEY=V1,V2,… (e.g. neighbors=10,20,30)");
        };
        let values: Vec<String> = values
            .split(',')
            .map(|v| v.trim().to_string())
            .filter(|v| !v.is_empty())
            .collect();
        if values.is_empty() {
            bail!("--sweep {text:?}: no values");
        }
        Ok(Sweep {
            key: key.trim().to_string(),
            values,
        })
    }
}

/// What to evaluate.
#[derive(Debug, Clone)]
pub struct EvaluationRequest {
    /// Event files, in order.
    pub inputs: Vec<PathBuf>,
    /// Base configuration; sweeps override keys of it.
    pub config: Config,
    /// Swept keys (cartesian product).
    pub sweeps: Vec<Sweep>,
    /// Held-out selection.
    pub split: Split,
    /// Length of recommendation lists for precision and recall.
    pub top_n: usize,
    /// Held-out ratings at or above this count as relevant for precision and recall.
    pub relevant_rating: f64,
    /// Show progress on stderr.
    pub show_progress: bool,
}

/// The swept (key, value) pairs that define one point of a sweep.
pub type Setting = Vec<(String, String)>;

/// Metrics of one setting.
#[derive(Debug, Clone, PartialEq)]
pub struct PointResult {
    /// The swept values of this point, in sweep order.
    pub setting: Setting,
    /// Mean absolute error over held-out ratings with a neighbor-based prediction.
    pub mae: f64,
    /// Root mean squared error over the same ratings.
    pub rmse: f64,
    /// Share of held-out ratings that had a neighbor-based prediction.
    pub predicted_share: f64,
    /// Mean precision at N over users with a relevant held-out item.
    pub precision: f64,
    /// Mean recall at N over the same users.
    pub recall: f64,
    /// Share of training items recommended to at least one user.
    pub coverage: f64,
}

/// The outcome of a sweep.
#[derive(Debug, Clone)]
pub struct EvaluationResult {
    /// One row per setting, in sweep order.
    pub points: Vec<PointResult>,
    /// Ratings used for training and held out.
    pub train_ratings: u64,
    /// Held-out ratings.
    pub test_ratings: u64,
    /// Wall time of the whole evaluation in seconds.
    pub seconds: f64,
}

/// A held-out rating, by name.
struct HeldOut {
    user: String,
    item: String,
    value: f64,
}

fn read_events(inputs: &[PathBuf], limits: Limits) -> Result<Vec<Event>> {
    let mut events = Vec::new();
    for path in inputs {
        let mut reader = RecordReader::open(&InputFile::describe(path)?, limits)?;
        while let Some(record) = reader.next_record()? {
            if let Decoded::Event(e) = record.decoded {
                events.push(e);
            }
        }
    }
    Ok(events)
}

/// Indices of the last `fraction` of each user's ratings, ordered by `order(at, index)`
/// then input position.
fn last_of_each_user(
    events: &[Event],
    fraction: f64,
    order: impl Fn(UnixNanos, usize) -> i64,
) -> FxHashSet<usize> {
    let mut by_user: BTreeMap<&str, Vec<(i64, usize)>> = BTreeMap::new();
    for (i, e) in events.iter().enumerate() {
        if let EventBody::Rating { user, .. } = &e.body {
            by_user.entry(user).or_default().push((order(e.at, i), i));
        }
    }
    by_user
        .into_values()
        .flat_map(|mut v| {
            v.sort_unstable();
            let keep = v.len() - (v.len() as f64 * fraction).floor() as usize;
            v.into_iter().skip(keep).map(|(_, i)| i)
        })
        .collect()
}

/// Splits ratings into training events and held-out ratings; every other event kind
/// stays in training.
fn split_events(events: Vec<Event>, split: Split) -> (Vec<Event>, Vec<HeldOut>) {
    let held: FxHashSet<usize> = match split {
        Split::Cutoff(t) => events
            .iter()
            .enumerate()
            .filter(|(_, e)| matches!(e.body, EventBody::Rating { .. }) && e.at >= t)
            .map(|(i, _)| i)
            .collect(),
        Split::LastFraction(f) => last_of_each_user(&events, f, |at, _| at.0),
        Split::Random { fraction, seed } => {
            last_of_each_user(&events, fraction, |_, i| mix(seed ^ i as u64) as i64)
        }
    };
    let mut train = Vec::with_capacity(events.len());
    let mut test = Vec::new();
    for (i, e) in events.into_iter().enumerate() {
        match (&e.body, held.contains(&i)) {
            (EventBody::Rating { user, item, value }, true) => test.push(HeldOut {
                user: user.clone(),
                item: item.clone(),
                value: *value,
            }),
            _ => train.push(e),
        }
    }
    (train, test)
}

/// The configuration of every point of the cartesian product of the sweeps.
fn sweep_points(base: &Config, sweeps: &[Sweep]) -> Result<Vec<(Setting, Config)>> {
    let mut points = vec![(Vec::new(), base.clone())];
    for sweep in sweeps {
        let mut next = Vec::new();
        for (setting, config) in &points {
            for value in &sweep.values {
                let mut s = setting.clone();
                s.push((sweep.key.clone(), value.clone()));
                next.push((s, with_override(config, &sweep.key, value)?));
            }
        }
        points = next;
    }
    Ok(points)
}

/// A copy of `config` with `[similarity]` or `[recommend]` key `key` set to `value`.
fn with_override(config: &Config, key: &str, value: &str) -> Result<Config> {
    let mut table = toml::Table::try_from(config)?;
    let section = ["similarity", "recommend"]
        .into_iter()
        .find(|s| table.get(*s).and_then(|t| t.get(key)).is_some())
        .with_context(|| format!("--sweep {key}: not a key of [similarity] or [recommend]"))?;
    let parsed: toml::Value = toml::from_str::<toml::Table>(&format!("v = {value}"))
        .ok()
        .and_then(|mut t| t.remove("v"))
        .unwrap_or_else(|| toml::Value::String(value.to_string()));
    table
        .get_mut(section)
        .and_then(|t| t.as_table_mut())
        .expect("section is a table")
        .insert(key.to_string(), parsed);
    let out: Config = toml::Value::Table(table)
        .try_into()
        .map_err(|e: toml::de::Error| anyhow::anyhow!("--sweep {key}={value}: {}", e.message()))?;
    out.validate().with_context(|| format!("--sweep {key}={value}"))?;
    Ok(out)
}

fn train_store(dir: &Path, config: &Config, events: &[Event]) -> Result<Store> {
    let mut store = Store::open(dir, config)?;
    let settings = config.engine_settings();
    for batch in events.chunks(config.backfill.batch_events as usize) {
        apply_and_commit(&mut store, &settings, batch, &BTreeMap::new(), |_| {})?;
    }
    Ok(store)
}

fn lists_for(store: &Store, settings: &ListSettings) -> Result<NeighborIndex> {
    let unavailable = store.unavailable_items()?;
    let excluded = Exclusions {
        unavailable: &unavailable,
    };
    let names = name_order(store);
    let mut lists = HashMap::new();
    for item in 0..store.item_count() as u32 {
        let row = compute_list(store, Signal::Rating, item, settings, &excluded, &names)?;
        lists.insert(item, row.neighbors.iter().map(|n| (n.item, n.score)).collect());
    }
    Ok(NeighborIndex::from_lists(lists))
}

/// Per user of the held-out set: training ratings (dense ids) and everything owned.
type Histories = HashMap<String, (HashMap<u32, f64>, FxHashSet<u32>)>;

fn histories(store: &Store, test: &[HeldOut]) -> Result<Histories> {
    let mut out = Histories::new();
    for h in test {
        if out.contains_key(&h.user) {
            continue;
        }
        let history = match store.user_state(&h.user)? {
            None => (HashMap::new(), FxHashSet::default()),
            Some(state) => user_history(&state, store.fingerprint().max_items_per_user),
        };
        out.insert(h.user.clone(), history);
    }
    Ok(out)
}

fn score_point(
    store: &Store,
    index: &NeighborIndex,
    histories: &Histories,
    test: &[HeldOut],
    request: &EvaluationRequest,
    config: &Config,
) -> Result<PointResult> {
    let rho = config.recommend.amplification;
    let table = match config.recommend.neighborhood {
        Neighborhood::List => ScoreTable::default(),
        Neighborhood::Rated => {
            let rows = (0..store.item_count() as u32)
                .map(|item| Ok((item, store.rating_row(item)?)))
                .collect::<Result<Vec<_>>>()?;
            ScoreTable::from_rows(rows, &config.list_settings())
        }
    };
    let predictor = match config.recommend.neighborhood {
        Neighborhood::List => Predictor::List(index),
        Neighborhood::Rated => Predictor::Rated(&table),
    };
    let (mut abs, mut sq, mut predicted) = (0.0, 0.0, 0u64);
    let mut relevant: BTreeMap<&str, FxHashSet<u32>> = BTreeMap::new();
    for h in test {
        let Some(item) = store.item_id(&h.item) else {
            continue;
        };
        let (ratings, _) = &histories[&h.user];
        if let Some(p) = predictor.predict(ratings, item, rho) {
            abs += (p - h.value).abs();
            sq += (p - h.value).powi(2);
            predicted += 1;
        }
        if h.value >= request.relevant_rating {
            relevant.entry(&h.user).or_default().insert(item);
        }
    }
    let unavailable = store.unavailable_items()?;
    let (mut precision, mut recall, mut recommended) = (0.0, 0.0, FxHashSet::default());
    for (user, wanted) in &relevant {
        let (ratings, owned) = &histories[*user];
        let view = UserView { ratings, owned };
        let recs = recommend_for(index, &predictor, &view, &unavailable, request.top_n, rho);
        let hits = recs.iter().filter(|r| wanted.contains(&r.item)).count() as f64;
        precision += hits / request.top_n as f64;
        recall += hits / wanted.len() as f64;
        recommended.extend(recs.iter().map(|r| r.item));
    }
    let users = relevant.len().max(1) as f64;
    let n = predicted.max(1) as f64;
    Ok(PointResult {
        setting: Setting::new(),
        mae: abs / n,
        rmse: (sq / n).sqrt(),
        predicted_share: predicted as f64 / test.len().max(1) as f64,
        precision: precision / users,
        recall: recall / users,
        coverage: recommended.len() as f64 / store.item_count().max(1) as f64,
    })
}

/// Runs the sweep. Stores for each distinct statistics setting live in `work_dir`.
pub fn evaluate(request: &EvaluationRequest, work_dir: &Path) -> Result<EvaluationResult> {
    let started = Instant::now();
    let events = read_events(&request.inputs, request.config.limits())?;
    let (train, test) = split_events(events, request.split);
    if test.is_empty() {
        bail!("the split holds out no ratings: lower the cut-off time or raise the fraction");
    }
    let train_ratings = train
        .iter()
        .filter(|e| matches!(e.body, EventBody::Rating { .. }))
        .count() as u64;
    let points = sweep_points(&request.config, &request.sweeps)?;
    let mut meter = Meter::new(
        "evaluate",
        points.len() as u64,
        Unit::Items,
        Display::when(request.show_progress),
    );
    let mut stores: Vec<(StatsFingerprint, Store, Histories)> = Vec::new();
    let mut results = Vec::with_capacity(points.len());
    for (done, (setting, config)) in points.into_iter().enumerate() {
        let fingerprint = StatsFingerprint::from_config(&config);
        let position = match stores.iter().position(|(f, _, _)| *f == fingerprint) {
            Some(p) => p,
            None => {
                let store = train_store(&work_dir.join(format!("train-{}", stores.len())), &config, &train)?;
                let h = histories(&store, &test)?;
                stores.push((fingerprint, store, h));
                stores.len() - 1
            }
        };
        let (_, store, hist) = &stores[position];
        let index = lists_for(store, &config.list_settings())?;
        let scored = score_point(store, &index, hist, &test, request, &config)?;
        results.push(PointResult { setting, ..scored });
        meter.update(done as u64 + 1, "settings");
    }
    meter.finish();
    Ok(EvaluationResult {
        points: results,
        train_ratings,
        test_ratings: test.len() as u64,
        seconds: started.elapsed().as_secs_f64(),
    })
}
