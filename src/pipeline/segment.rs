//! Batches of decoded events applied to an open segment and written to the store: intern
//! ids, load the states a batch touches, run the engine, and persist everything —
//! including the source positions consumed — in one write. The live service and a topic
//! backfill apply many batches to one [`OpenSegment`] in memory and commit it once, pair
//! sums ingested as sorted table files; a file backfill stages its chunks and runs the
//! engine once per segment ([`OpenSegment::stage`], [`OpenSegment::seal_staged`];
//! docs/design.md, "Bulk backfill", "Live writes"); [`apply_and_commit`] writes a single
//! batch (the live start positions).

use std::collections::{BTreeMap, HashMap};

use anyhow::{bail, Result};

use crate::cluster::ShardSpec;
use crate::decode::RejectReason;
use crate::engine::aggregate::{aggregate_pairs, RowIndex};
use crate::engine::contrib::ContributionSet;
use crate::engine::segment::SegmentEffects;
use crate::engine::tally::EventTally;
use crate::engine::user_state::UserState;
use crate::engine::{
    apply_batch_unsummed, Action, BatchEffects, Deviation, EngineSettings, ItemStatus, RatingPairDelta,
    Sequenced,
};
use crate::event::{Event, EventBody, UnixNanos};
use crate::store::{BatchCommit, ForgottenUser, Ledger, PairWrite, Store};
use crate::timefmt::now_nanos;

/// What one applied batch did.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct BatchSummary {
    /// Accepted events by kind and outcome.
    pub outcomes: EventTally,
    /// Pair contributions added or retracted.
    pub pair_updates: u64,
    /// Users re-centered.
    pub recenterings: u64,
    /// Largest |mean − center| among touched users after the batch.
    pub max_center_gap: f64,
    /// |mean − center| of each touched user with ratings after the batch.
    pub center_gaps: Vec<f64>,
    /// Whether the batch marked any list dirty.
    pub marked_dirty: bool,
}

/// Dense ids of one kind of name (users or items) within a batch: known ones, and the
/// new ones assigned from the store's counter.
struct NameIds {
    /// `user` or `item`, for the error that says the ids ran out.
    kind: &'static str,
    known: HashMap<String, u32>,
    /// The first id this segment gives out: ids below it are the store's.
    first: u32,
    next: u32,
    added: Vec<(u32, String)>,
}

/// The first dense id never given out: ids are u32 and stay below this, so a store that
/// has used them all refuses a new name instead of wrapping round onto id 0.
pub const ID_LIMIT: u32 = u32::MAX;

impl NameIds {
    fn starting_at(kind: &'static str, next: u32) -> NameIds {
        NameIds {
            kind,
            known: HashMap::new(),
            first: next,
            next,
            added: Vec::new(),
        }
    }

    fn id(&mut self, name: &str, stored: impl Fn(&str) -> Option<u32>) -> Result<u32> {
        if let Some(id) = stored(name).or_else(|| self.known.get(name).copied()) {
            return Ok(id);
        }
        let id = self.next;
        if id == ID_LIMIT {
            bail!(
                "the store has given out all {ID_LIMIT} dense {kind} ids and cannot take a new {kind}; \
                 nothing of this batch was applied (simtide_entities{{entity=\"{kind}s\"}} shows the ids in use)",
                kind = self.kind
            );
        }
        self.next += 1;
        self.known.insert(name.to_string(), id);
        self.added.push((id, name.to_string()));
        Ok(id)
    }
}

/// Assigns dense ids to the names a batch uses: stored ids first, then the ones the
/// segment assigned, then new ones from the segment's counters. Notes the users an
/// erasure may leave forgotten (docs/design.md, "Personal data"): the targets of
/// erasures, and names the store forgot, whose new ids start with the erasure time.
struct Interner<'a> {
    store: &'a Store,
    stored_users: HashMap<String, u32>,
    /// Names the store forgot among this batch's unknown names, with their erasure times.
    forgotten_names: HashMap<String, UnixNanos>,
    users: &'a mut NameIds,
    items: &'a mut NameIds,
    forgettable: &'a mut HashMap<u32, String>,
    /// New ids of forgotten names, with the erasure time their history starts with.
    returning: Vec<(u32, UnixNanos)>,
}

impl<'a> Interner<'a> {
    fn new(
        store: &'a Store,
        events: &[Event],
        users: &'a mut NameIds,
        items: &'a mut NameIds,
        forgettable: &'a mut HashMap<u32, String>,
    ) -> Result<Self> {
        let mut names: Vec<&str> = events
            .iter()
            .filter_map(Event::user)
            .filter(|n| !users.known.contains_key(*n))
            .collect();
        names.sort_unstable();
        names.dedup();
        let known = store.user_ids(&names)?;
        let unknown: Vec<&str> = names
            .iter()
            .zip(&known)
            .filter_map(|(n, id)| id.is_none().then_some(*n))
            .collect();
        let forgotten_names = if store.ledger().erasure_tombstones && !unknown.is_empty() {
            unknown
                .iter()
                .zip(store.erasure_times(&unknown)?)
                .filter_map(|(n, at)| at.map(|at| (n.to_string(), at)))
                .collect()
        } else {
            HashMap::new()
        };
        let stored_users = names
            .iter()
            .zip(known)
            .filter_map(|(n, id)| id.map(|id| (n.to_string(), id)))
            .collect();
        Ok(Interner {
            store,
            stored_users,
            forgotten_names,
            users,
            items,
            forgettable,
            returning: Vec::new(),
        })
    }

    fn user(&mut self, name: &str) -> Result<u32> {
        let stored = &self.stored_users;
        let id = self.users.id(name, |n| stored.get(n).copied())?;
        if let Some(erased_at) = self.forgotten_names.remove(name) {
            self.returning.push((id, erased_at));
            self.forgettable.insert(id, name.to_string());
        }
        Ok(id)
    }

    fn erased_user(&mut self, name: &str) -> Result<u32> {
        let id = self.user(name)?;
        self.forgettable.entry(id).or_insert_with(|| name.to_string());
        Ok(id)
    }

    fn item(&mut self, name: &str) -> Result<u32> {
        let store = self.store;
        self.items.id(name, |n| store.item_id(n))
    }

    fn action(&mut self, body: &EventBody) -> Result<Action> {
        Ok(match body {
            EventBody::Rating { user, item, value } => Action::Rate {
                user: self.user(user)?,
                item: self.item(item)?,
                value: *value,
            },
            EventBody::Unrating { user, item } => Action::Unrate {
                user: self.user(user)?,
                item: self.item(item)?,
            },
            EventBody::Purchase { user, item } => Action::Purchase {
                user: self.user(user)?,
                item: self.item(item)?,
            },
            EventBody::EraseUser { user } => Action::Erase {
                user: self.erased_user(user)?,
            },
            EventBody::ItemStatus { item, available } => Action::ItemStatus {
                item: self.item(item)?,
                available: *available,
            },
        })
    }
}

/// Bytes a pending rating pair delta and a purchase pair delta hold, with room for the
/// merge of two runs and the both-orders index the commit builds (measured against peak
/// RSS in `make bench`).
const PENDING_RATING_PAIR_BYTES: usize =
    2 * std::mem::size_of::<(u32, u32, crate::engine::RatingPairDelta)>() + 32;
const PENDING_PURCHASE_PAIR_BYTES: usize = 2 * std::mem::size_of::<(u32, u32, i64)>() + 32;
/// Bytes one applied event may add to the pending user histories and ids (rounded up).
const PENDING_EVENT_STATE_BYTES: usize = 96;
/// Bytes a staged event holds, with its part of the two contribution sides and their
/// index at the engine's run (measured against peak RSS in `make bench`).
const STAGED_EVENT_BYTES: usize = std::mem::size_of::<Sequenced>() + 2 * 96;
/// Bytes of contribution sides and index per byte of loaded history, at the engine's run.
const STAGED_SIDES_PER_STATE_BYTE: usize = 2;

/// Batches applied in memory and not yet committed: the ids they assigned, the current
/// state of every user and item status they touched, their summed effects, and the ledger
/// to write with them. Nothing of it is in the store until [`OpenSegment::commit`].
pub struct OpenSegment {
    users: NameIds,
    items: NameIds,
    states: HashMap<u32, UserState>,
    /// Names of the users an erasure may leave forgotten, by id.
    forgettable: HashMap<u32, String>,
    statuses: HashMap<u32, ItemStatus>,
    effects: SegmentEffects,
    ledger: Ledger,
    state_bytes: usize,
    /// The store's shard, and whether it owns each item this segment named first, in the
    /// order of their ids.
    shard: ShardSpec,
    new_owned: Vec<bool>,
    /// Events of a file backfill's segment, sequenced and waiting for the engine
    /// ([`OpenSegment::stage`]).
    staged: Vec<Sequenced>,
}

impl OpenSegment {
    /// An empty segment starting from the store's committed state.
    pub fn new(store: &Store) -> OpenSegment {
        let ledger = store.ledger().clone();
        OpenSegment {
            users: NameIds::starting_at("user", ledger.next_user),
            items: NameIds::starting_at("item", ledger.next_item),
            states: HashMap::new(),
            forgettable: HashMap::new(),
            statuses: HashMap::new(),
            effects: SegmentEffects::default(),
            ledger,
            state_bytes: 0,
            shard: store.shard(),
            new_owned: Vec::new(),
            staged: Vec::new(),
        }
    }

    /// Extends [`OpenSegment::new_owned`] to every item this segment named first (the store
    /// knows the owner of the items it holds).
    fn note_new_owners(&mut self) {
        for (_, name) in &self.items.added[self.new_owned.len()..] {
            self.new_owned.push(self.shard.owns(name));
        }
    }

    /// The ledger as it will be committed; the caller records source positions in it.
    pub fn ledger_mut(&mut self) -> &mut Ledger {
        &mut self.ledger
    }

    /// The store-wide position after the last applied event.
    pub fn next_seq(&self) -> u64 {
        self.ledger.next_seq
    }

    /// Memory the segment holds, estimated from its pair deltas, user histories and
    /// staged events. A staged event will also take its part of the two contribution
    /// sides the engine forms for its user and of their index; a loaded history, both.
    pub fn estimated_bytes(&self) -> usize {
        let (rating, purchase) = self.effects.pair_entries();
        let staged = if self.staged.is_empty() {
            0
        } else {
            self.staged.len() * STAGED_EVENT_BYTES + self.state_bytes * STAGED_SIDES_PER_STATE_BYTE
        };
        rating * PENDING_RATING_PAIR_BYTES
            + purchase * PENDING_PURCHASE_PAIR_BYTES
            + self.state_bytes
            + staged
    }

    /// Applies one batch after the ones already pending. `rejects` counts the records of
    /// the same batch that failed validation.
    pub fn apply(
        &mut self,
        store: &Store,
        settings: &EngineSettings,
        events: &[Event],
        rejects: &BTreeMap<RejectReason, u64>,
    ) -> Result<BatchSummary> {
        let sequenced = self.intern_and_load(store, events, rejects)?;
        let (mut effects, rating_sides) = self.run_engine(store, settings, &sequenced);
        {
            let owns = owner_test(store, self.shard.is_sharded(), &self.new_owned);
            let (rating_pairs, updates) = aggregate_pairs::<Deviation, RatingPairDelta>(&rating_sides, &owns);
            effects.rating_pairs = rating_pairs;
            effects.pair_updates += updates;
            if self.shard.is_sharded() {
                effects.keep_shard(&owns);
            }
        }
        let summary = self.record(&effects);
        self.effects.absorb(effects);
        Ok(summary)
    }

    /// Stages one chunk of a file backfill: names, histories, positions and rejects as
    /// [`OpenSegment::apply`] does, the engine deferred to [`OpenSegment::seal_staged`], which
    /// runs it once over the whole segment (docs/design.md, "Bulk backfill").
    pub fn stage(
        &mut self,
        store: &Store,
        events: &[Event],
        rejects: &BTreeMap<RejectReason, u64>,
    ) -> Result<()> {
        let sequenced = self.intern_and_load(store, events, rejects)?;
        self.staged.extend(sequenced);
        Ok(())
    }

    /// Runs the engine once over every staged event and seals the segment with its rating
    /// pairs unsummed: the returned index sums them row by row under both orders. The
    /// rating pair updates are counted by whoever sums them
    /// ([`SealedSegment::note_rating_rows`]).
    pub fn seal_staged(
        mut self,
        store: &Store,
        settings: &EngineSettings,
    ) -> (SealedSegment, RowIndex<Deviation>, BatchSummary) {
        let staged = std::mem::take(&mut self.staged);
        let (mut effects, rating_sides) = self.run_engine(store, settings, &staged);
        drop(staged);
        let index = {
            let owns = owner_test(store, self.shard.is_sharded(), &self.new_owned);
            if self.shard.is_sharded() {
                effects.keep_shard(&owns);
            }
            RowIndex::both_orders(&rating_sides, &owns)
        };
        drop(rating_sides);
        let summary = self.record(&effects);
        (self.into_sealed(effects), index, summary)
    }

    /// Gives the batch's names ids, loads the histories and statuses it touches and
    /// sequences its events after the ones already pending; counts its rejects.
    fn intern_and_load(
        &mut self,
        store: &Store,
        events: &[Event],
        rejects: &BTreeMap<RejectReason, u64>,
    ) -> Result<Vec<Sequenced>> {
        let mut interner = Interner::new(
            store,
            events,
            &mut self.users,
            &mut self.items,
            &mut self.forgettable,
        )?;
        let mut next_seq = self.ledger.next_seq;
        let sequenced: Vec<Sequenced> = events
            .iter()
            .map(|e| {
                let seq = next_seq;
                next_seq += 1;
                Ok(Sequenced {
                    seq,
                    at: e.at,
                    action: interner.action(&e.body)?,
                })
            })
            .collect::<Result<_>>()?;
        for (user, erased_at) in std::mem::take(&mut interner.returning) {
            let state = UserState {
                erased_at: Some(erased_at),
                ..UserState::default()
            };
            self.state_bytes += state.approx_bytes();
            self.states.insert(user, state);
        }
        let mut unloaded: Vec<u32> = sequenced
            .iter()
            .filter_map(|s| s.action.user())
            .filter(|u| !self.states.contains_key(u))
            .collect();
        unloaded.sort_unstable();
        unloaded.dedup();
        let status_items: Vec<u32> = sequenced
            .iter()
            .filter_map(|s| match s.action {
                Action::ItemStatus { item, .. } => Some(item),
                _ => None,
            })
            .filter(|i| !self.statuses.contains_key(i))
            .collect();
        let loaded = store.load_users(&unloaded)?;
        self.state_bytes += loaded.values().map(UserState::approx_bytes).sum::<usize>();
        self.states.extend(loaded);
        self.statuses.extend(store.load_statuses(&status_items)?);
        if self.shard.is_sharded() {
            self.note_new_owners();
        }
        // Each event adds at most one entry to a history (plus its share of a new user).
        self.state_bytes += sequenced.len() * PENDING_EVENT_STATE_BYTES;
        let ledger = &mut self.ledger;
        ledger.next_seq = next_seq;
        ledger.next_user = self.users.next;
        ledger.next_item = self.items.next;
        for (reason, &n) in rejects {
            *ledger.rejects.entry(reason.code().to_string()).or_default() += n;
        }
        Ok(sequenced)
    }

    /// Runs the engine over sequenced events, rating pairs left unsummed.
    fn run_engine(
        &mut self,
        store: &Store,
        settings: &EngineSettings,
        sequenced: &[Sequenced],
    ) -> (BatchEffects, Vec<ContributionSet<Deviation>>) {
        let owns = owner_test(store, self.shard.is_sharded(), &self.new_owned);
        apply_batch_unsummed(settings, sequenced, &mut self.states, &mut self.statuses, &owns)
    }

    /// Records a batch's counters in the ledger the segment will commit, and describes it.
    fn record(&mut self, effects: &BatchEffects) -> BatchSummary {
        let ledger = &mut self.ledger;
        ledger.buyers += effects.buyers_delta;
        ledger.recenterings += effects.recenterings;
        ledger.pair_updates += effects.pair_updates;
        if let Some(t) = effects.newest_event_at {
            ledger.event_time_watermark = Some(ledger.event_time_watermark.map_or(t, |w| w.max(t)));
        }
        for (&(kind, outcome), &n) in effects.outcomes.iter() {
            *ledger.events.entry(EventTally::key(kind, outcome)).or_default() += n;
        }
        BatchSummary {
            outcomes: effects.outcomes.clone(),
            pair_updates: effects.pair_updates,
            recenterings: effects.recenterings,
            max_center_gap: effects.max_center_gap,
            center_gaps: effects.center_gaps.clone(),
            marked_dirty: !effects.dirty_rating.is_empty() || !effects.dirty_purchase.is_empty(),
        }
    }

    /// Sums the segment's pair deltas and sorts them: what [`SealedSegment::write`] persists.
    pub fn seal(mut self) -> SealedSegment {
        let started = std::time::Instant::now();
        let effects = std::mem::take(&mut self.effects).into_effects();
        tracing::debug!(
            rating_pairs = effects.rating_pairs.len(),
            purchase_pairs = effects.purchase_pairs.len(),
            users = effects.touched_users.len(),
            sum_seconds = started.elapsed().as_secs_f64(),
            "segment sealed"
        );
        self.into_sealed(effects)
    }

    /// The segment with its effects, ready to be written: the users an erasure left
    /// forgotten are found here.
    fn into_sealed(self, effects: BatchEffects) -> SealedSegment {
        let forgotten = forgotten_users(&self.forgettable, &self.states, self.users.first);
        SealedSegment {
            new_users: self.users.added,
            new_items: self.items.added,
            states: self.states,
            forgotten,
            effects,
            ledger: self.ledger,
        }
    }

    /// Seals and writes the segment ([`OpenSegment::seal`], [`SealedSegment::write`]); returns its
    /// effects, pair deltas summed and sorted.
    pub fn commit(self, store: &mut Store, pairs: PairWrite) -> Result<BatchEffects> {
        let sealed = self.seal();
        sealed.write(store, pairs)?;
        Ok(sealed.effects)
    }
}

/// Whether a store keeps the pairs of an item: every item unless `sharded`, else its own
/// (the store knows the owner of the items it holds; `new_owned` says it of the ones the
/// segment named first, in the order of their ids).
fn owner_test<'s>(store: &'s Store, sharded: bool, new_owned: &'s [bool]) -> impl Fn(u32) -> bool + 's {
    let stored = store.item_count() as u32;
    move |item: u32| {
        !sharded
            || match item.checked_sub(stored) {
                None => store.owns(item),
                Some(new) => new_owned[new as usize],
            }
    }
}

/// A segment whose pair deltas are summed: ready to be written, and kept whole when a
/// write fails so that it can be tried again.
pub struct SealedSegment {
    new_users: Vec<(u32, String)>,
    new_items: Vec<(u32, String)>,
    states: HashMap<u32, UserState>,
    forgotten: Vec<ForgottenUser>,
    effects: BatchEffects,
    ledger: Ledger,
}

/// The users among `forgettable` whose history is empty after an erasure: the write
/// forgets them (docs/design.md, "Personal data"). Ids below `first_new` are stored.
fn forgotten_users(
    forgettable: &HashMap<u32, String>,
    states: &HashMap<u32, UserState>,
    first_new: u32,
) -> Vec<ForgottenUser> {
    let mut forgotten: Vec<ForgottenUser> = forgettable
        .iter()
        .filter_map(|(&id, name)| {
            let state = states.get(&id)?;
            let erased_at = state.erased_at?;
            (state.ratings.is_empty() && state.purchases.is_empty()).then(|| ForgottenUser {
                id,
                name: name.clone(),
                erased_at,
                stored: id < first_new,
            })
        })
        .collect();
    forgotten.sort_unstable_by_key(|f| f.id);
    forgotten
}

impl SealedSegment {
    /// What the store writes for this segment.
    fn commit(&self, pairs: PairWrite) -> BatchCommit<'_> {
        let changed_users: Vec<_> = self
            .effects
            .touched_users
            .iter()
            .filter(|u| self.forgotten.binary_search_by_key(*u, |f| f.id).is_err())
            .map(|u| (*u, self.states.get(u).expect("touched users are loaded")))
            .collect();
        BatchCommit {
            new_users: &self.new_users,
            new_items: &self.new_items,
            users: changed_users,
            forgotten: &self.forgotten,
            effects: &self.effects,
            pairs,
            ledger: &self.ledger,
            dirty_since: now_nanos(),
        }
    }

    /// The segment's effects, pair deltas summed and sorted.
    pub fn effects(&self) -> &BatchEffects {
        &self.effects
    }

    /// Names of the items the segment named first, in the order of their ids.
    pub fn new_item_names(&self) -> impl Iterator<Item = &str> {
        self.new_items.iter().map(|(_, name)| name.as_str())
    }

    /// Records the rating rows a one-pass writer summed for this staged segment: the
    /// pair contributions, and whether it wrote any row (the store then holds pairs).
    pub fn note_rating_rows(&mut self, updates: u64, rows_written: bool) {
        self.effects.pair_updates += updates;
        self.ledger.pair_updates += updates;
        self.ledger.pair_keys_written |= rows_written;
    }

    /// The store-wide position after the segment's last event.
    pub fn end(&self) -> u64 {
        self.ledger.next_seq
    }

    /// Persists the segment: in one WriteBatch (`PairWrite::InBatch`), or with pair sums
    /// ingested as sorted files first and everything else in one WriteBatch after
    /// (`PairWrite::Ingested`, `PairWrite::RatingsIngested`). A failed write may be tried
    /// again: files already ingested are not ingested twice.
    pub fn write(&self, store: &mut Store, pairs: PairWrite) -> Result<()> {
        let started = std::time::Instant::now();
        store.commit(self.commit(pairs))?;
        tracing::debug!(
            rating_pairs = self.effects.rating_pairs.len(),
            purchase_pairs = self.effects.purchase_pairs.len(),
            pairs = ?pairs,
            write_seconds = started.elapsed().as_secs_f64(),
            "segment written"
        );
        Ok(())
    }
}

#[cfg(test)]
impl SealedSegment {
    /// The first step of a `PairWrite::RatingsIngested` write alone: what a process
    /// killed between ingesting the rating table files and writing the rest leaves.
    pub(crate) fn ingest_ratings_only(&self, store: &Store) -> Result<()> {
        store.ingest_rating_pairs_only(self.commit(PairWrite::RatingsIngested))
    }
}

/// Applies one micro-batch and commits it in one WriteBatch. `rejects` counts the records
/// of the same batch that failed validation; `advance` records the source position the
/// batch consumed in the ledger that is written with it.
pub fn apply_and_commit(
    store: &mut Store,
    settings: &EngineSettings,
    events: &[Event],
    rejects: &BTreeMap<RejectReason, u64>,
    advance: impl FnOnce(&mut Ledger),
) -> Result<BatchSummary> {
    let mut segment = OpenSegment::new(store);
    let summary = segment.apply(store, settings, events, rejects)?;
    advance(segment.ledger_mut());
    segment.commit(store, PairWrite::InBatch)?;
    Ok(summary)
}

#[cfg(test)]
mod tests {
    use super::{NameIds, ID_LIMIT};

    #[test]
    fn the_last_dense_id_is_given_then_new_names_are_refused_not_wrapped() {
        let mut ids = NameIds::starting_at("item", ID_LIMIT - 1);
        assert_eq!(ids.id("rake", |_| None).unwrap(), ID_LIMIT - 1);
        assert_eq!(
            ids.id("rake", |_| None).unwrap(),
            ID_LIMIT - 1,
            "a known name keeps its id"
        );
        assert_eq!(
            ids.id("hoe", |n| (n == "hoe").then_some(7)).unwrap(),
            7,
            "a stored one too"
        );
        let refused = ids.id("trowel", |_| None).unwrap_err().to_string();
        assert!(
            refused.contains("all 4294967295 dense item ids") && refused.contains("cannot take a new item"),
            "{refused}"
        );
        assert_eq!(ids.next, ID_LIMIT, "nothing wrapped round to 0");
    }
}
