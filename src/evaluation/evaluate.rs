//! Offline evaluation: split a team's own events by time, build similarities on the
//! training part with the real engine, and score the held-out ratings for every setting
//! of a sweep, each read against the baselines on the same split: the user's mean for
//! rating error, the most popular items for top-N (`quality`).

use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::{bail, Context, Result};
use rustc_hash::FxHashSet;

use crate::backfill::source::{Decoded, InputFile, RecordReader};
use crate::config::{Config, Neighborhood, Ranking};
use crate::decode::Limits;
use crate::evaluation::quality::{Popularity, RankingQuality, TopLists, TrainingCounts};
use crate::event::{Event, EventBody, UnixNanos};
use crate::observability::meter::{Display, Meter, Unit};
use crate::pipeline::publish::{compute_list, name_order};
use crate::pipeline::segment::apply_and_commit;
use crate::predict::{user_history, NeighborIndex, Predictor, ScoreTable, UserHistory};
use crate::ranking::{best_first, score_candidates, CandidateLists, Scorer};
use crate::score::ListSettings;
use crate::signal::Signal;
use crate::store::{StatsFingerprint, Store};
use crate::topk::{Exclusions, NameOrder};

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
    /// Length of the recommendation lists that catalogue coverage and head share count
    /// (precision, recall, nDCG and hit rate are at every one of `quality::CUTOFFS`).
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
    /// The baseline: MAE of predicting each user's mean training rating, on the same
    /// held-out ratings as `mae`.
    pub user_mean_mae: f64,
    /// RMSE of the same baseline.
    pub user_mean_rmse: f64,
    /// Top-N quality of `recommend.ranking` under this setting.
    pub ranking: RankingQuality,
}

impl PointResult {
    /// Whether the setting beats both baselines: a lower MAE than the user's mean on the
    /// same ratings, and a higher precision at 10 than the popularity ranking.
    pub fn beats(&self, popularity: &RankingQuality) -> bool {
        self.mae < self.user_mean_mae && self.ranking.at(10).precision > popularity.at(10).precision
    }
}

/// The outcome of a sweep.
#[derive(Debug, Clone)]
pub struct EvaluationResult {
    /// One row per setting, in sweep order.
    pub points: Vec<PointResult>,
    /// The popularity baseline on the same split: each user's most-rated training items
    /// that the user does not have yet.
    pub popularity: RankingQuality,
    /// The list length coverage and head share were counted at.
    pub top_n: usize,
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

/// Per user of the held-out set: the training history (dense ids).
type Histories = HashMap<String, UserHistory>;

fn histories(store: &Store, test: &[HeldOut]) -> Result<Histories> {
    let mut out = Histories::new();
    for h in test {
        if out.contains_key(&h.user) {
            continue;
        }
        let history = match store.user_state(&h.user)? {
            None => UserHistory::default(),
            Some(state) => user_history(&state, store.fingerprint().max_items_per_user),
        };
        out.insert(h.user.clone(), history);
    }
    Ok(out)
}

/// What one training store gives every setting built on it, read once.
struct Trained {
    store: Store,
    histories: Histories,
    /// Each user's mean training rating (the rating-error baseline).
    means: HashMap<String, Option<f64>>,
    names: NameOrder,
    unavailable: FxHashSet<u32>,
    /// The store's items in popularity order, and the head.
    popularity: Popularity,
    /// Each evaluated user's relevant held-out items.
    relevant: BTreeMap<String, FxHashSet<u32>>,
}

impl Trained {
    fn new(store: Store, test: &[HeldOut], relevant_rating: f64, counts: &TrainingCounts) -> Result<Trained> {
        let histories = histories(&store, test)?;
        let means = histories
            .iter()
            .map(|(u, h)| (u.clone(), h.mean_rating()))
            .collect();
        let mut relevant: BTreeMap<String, FxHashSet<u32>> = BTreeMap::new();
        for h in test.iter().filter(|h| h.value >= relevant_rating) {
            if let Some(item) = store.item_id(&h.item) {
                relevant.entry(h.user.clone()).or_default().insert(item);
            }
        }
        Ok(Trained {
            names: name_order(&store),
            unavailable: store.unavailable_items()?,
            popularity: counts.by_id(&store),
            store,
            histories,
            means,
            relevant,
        })
    }

    /// Every item's `signal` list under `settings`, as publication computes it.
    fn lists(&self, signal: Signal, settings: &ListSettings) -> Result<NeighborIndex> {
        let excluded = Exclusions {
            unavailable: &self.unavailable,
        };
        let mut lists = HashMap::new();
        for item in 0..self.store.item_count() as u32 {
            let row = compute_list(&self.store, signal, item, settings, &excluded, &self.names)?;
            lists.insert(item, row.neighbors.iter().map(|n| (n.item, n.score)).collect());
        }
        Ok(NeighborIndex::from_lists(lists))
    }

    /// Top lists of the popularity ranking for every evaluated user.
    fn popular_lists(&self, length: usize) -> TopLists {
        self.relevant
            .keys()
            .map(|user| {
                let owned = &self.histories[user].owned;
                let has = |i: u32| owned.contains(&i) || self.unavailable.contains(&i);
                (user.clone(), self.popularity.top_for(length, has))
            })
            .collect()
    }

    /// Top-N quality of `ranked` against the evaluated users' relevant items.
    fn quality(&self, ranked: &TopLists, top_n: usize) -> RankingQuality {
        RankingQuality::measure(
            ranked,
            &self.relevant,
            self.store.item_count(),
            &self.popularity,
            top_n,
        )
    }
}

fn score_point(
    trained: &Trained,
    index: &NeighborIndex,
    purchase: &NeighborIndex,
    test: &[HeldOut],
    request: &EvaluationRequest,
    config: &Config,
) -> Result<PointResult> {
    let store = &trained.store;
    let rc = &config.recommend;
    let rho = rc.amplification;
    let table = match rc.neighborhood {
        Neighborhood::List => ScoreTable::default(),
        Neighborhood::Rated => {
            let rows = (0..store.item_count() as u32)
                .map(|item| Ok((item, store.rating_row(item)?)))
                .collect::<Result<Vec<_>>>()?;
            ScoreTable::from_rows(rows, &config.list_settings())
        }
    };
    let predictor = || match rc.neighborhood {
        Neighborhood::List => Predictor::List(index),
        Neighborhood::Rated => Predictor::Rated(&table),
    };
    let (mut abs, mut sq, mut base_abs, mut base_sq, mut predicted) = (0.0, 0.0, 0.0, 0.0, 0u64);
    for h in test {
        let Some(item) = store.item_id(&h.item) else {
            continue;
        };
        let ratings = &trained.histories[&h.user].ratings;
        if let (Some(p), Some(mean)) = (predictor().predict(ratings, item, rho), trained.means[&h.user]) {
            abs += (p - h.value).abs();
            sq += (p - h.value).powi(2);
            base_abs += (mean - h.value).abs();
            base_sq += (mean - h.value).powi(2);
            predicted += 1;
        }
    }
    let lists = CandidateLists {
        rating: index,
        purchase: (rc.purchase_weight > 0.0).then_some((purchase, rc.purchase_weight)),
    };
    let scorer = match rc.ranking {
        Ranking::SimilarityMass => Scorer::Mass {
            normalised: rc.normalise_lists,
        },
        Ranking::PredictedRating => Scorer::Predicted(predictor()),
    };
    let length = quality_length(request.top_n);
    let ranked: TopLists = trained
        .relevant
        .keys()
        .map(|user| {
            let scored = score_candidates(
                &lists,
                &scorer,
                &trained.histories[user],
                &trained.unavailable,
                rho,
            );
            let best = best_first(scored, length, |a, b| {
                trained.names.rank(a).cmp(&trained.names.rank(b))
            });
            (user.clone(), best.into_iter().map(|r| r.item).collect())
        })
        .collect();
    let n = predicted.max(1) as f64;
    Ok(PointResult {
        setting: Setting::new(),
        mae: abs / n,
        rmse: (sq / n).sqrt(),
        predicted_share: predicted as f64 / test.len().max(1) as f64,
        user_mean_mae: base_abs / n,
        user_mean_rmse: (base_sq / n).sqrt(),
        ranking: trained.quality(&ranked, request.top_n),
    })
}

/// How long the ranked lists must be for every cut-off and for `top_n`.
fn quality_length(top_n: usize) -> usize {
    crate::evaluation::quality::CUTOFFS
        .iter()
        .copied()
        .max()
        .unwrap_or(0)
        .max(top_n)
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
    let popularity = TrainingCounts::of_training(&train);
    let mut stores: Vec<(StatsFingerprint, Trained)> = Vec::new();
    let mut baseline = None;
    let mut results = Vec::with_capacity(points.len());
    for (done, (setting, config)) in points.into_iter().enumerate() {
        let fingerprint = StatsFingerprint::from_config(&config);
        let position = match stores.iter().position(|(f, _)| *f == fingerprint) {
            Some(p) => p,
            None => {
                let store = train_store(&work_dir.join(format!("train-{}", stores.len())), &config, &train)?;
                stores.push((
                    fingerprint,
                    Trained::new(store, &test, request.relevant_rating, &popularity)?,
                ));
                stores.len() - 1
            }
        };
        let (_, trained) = &stores[position];
        if baseline.is_none() {
            let lists = trained.popular_lists(quality_length(request.top_n));
            baseline = Some(trained.quality(&lists, request.top_n));
        }
        let settings = config.list_settings();
        let index = trained.lists(Signal::Rating, &settings)?;
        let purchase = if config.recommend.purchase_weight > 0.0 {
            trained.lists(Signal::Purchase, &settings)?
        } else {
            NeighborIndex::default()
        };
        let scored = score_point(trained, &index, &purchase, &test, request, &config)?;
        results.push(PointResult { setting, ..scored });
        meter.update(done as u64 + 1, "settings");
    }
    meter.finish();
    Ok(EvaluationResult {
        points: results,
        popularity: baseline.context("no setting was evaluated")?,
        top_n: request.top_n,
        train_ratings,
        test_ratings: test.len() as u64,
        seconds: started.elapsed().as_secs_f64(),
    })
}
