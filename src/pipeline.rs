//! One micro-batch from decoded events to a committed store write: intern ids, load the
//! states the batch touches, run the engine, and persist everything — including the source
//! position the batch consumed — in one WriteBatch. Backfill and the live consumer both
//! feed batches through here.

use std::collections::{BTreeMap, HashMap};

use anyhow::Result;

use crate::decode::RejectReason;
use crate::engine::tally::EventTally;
use crate::engine::{apply_batch, Action, EngineSettings, Sequenced};
use crate::event::{Event, EventBody};
use crate::store::{BatchCommit, Ledger, Store};
use crate::timefmt::now_nanos;

/// What one committed batch did.
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
    known: HashMap<String, u32>,
    next: u32,
    added: Vec<(u32, String)>,
}

impl NameIds {
    fn id(&mut self, name: &str, stored: impl Fn(&str) -> Option<u32>) -> u32 {
        if let Some(id) = stored(name).or_else(|| self.known.get(name).copied()) {
            return id;
        }
        let id = self.next;
        self.next += 1;
        self.known.insert(name.to_string(), id);
        self.added.push((id, name.to_string()));
        id
    }
}

/// Assigns dense ids to the names a batch uses, remembering the new ones.
struct Interner<'a> {
    store: &'a Store,
    users: NameIds,
    items: NameIds,
}

impl<'a> Interner<'a> {
    fn new(store: &'a Store, events: &[Event]) -> Result<Interner<'a>> {
        let p = store.ledger();
        let mut names: Vec<&str> = events.iter().filter_map(Event::user).collect();
        names.sort_unstable();
        names.dedup();
        let known = store.user_ids(&names)?;
        let users = names
            .iter()
            .zip(known)
            .filter_map(|(n, id)| id.map(|id| (n.to_string(), id)))
            .collect();
        Ok(Interner {
            store,
            users: NameIds {
                known: users,
                next: p.next_user,
                added: Vec::new(),
            },
            items: NameIds {
                known: HashMap::new(),
                next: p.next_item,
                added: Vec::new(),
            },
        })
    }

    fn user(&mut self, name: &str) -> u32 {
        self.users.id(name, |_| None)
    }

    fn item(&mut self, name: &str) -> u32 {
        let store = self.store;
        self.items.id(name, |n| store.item_id(n))
    }

    fn action(&mut self, body: &EventBody) -> Action {
        match body {
            EventBody::Rating { user, item, value } => Action::Rate {
                user: self.user(user),
                item: self.item(item),
                value: *value,
            },
            EventBody::Unrating { user, item } => Action::Unrate {
                user: self.user(user),
                item: self.item(item),
            },
            EventBody::Purchase { user, item } => Action::Purchase {
                user: self.user(user),
                item: self.item(item),
            },
            EventBody::EraseUser { user } => Action::Erase {
                user: self.user(user),
            },
            EventBody::ItemStatus { item, available } => Action::ItemStatus {
                item: self.item(item),
                available: *available,
            },
        }
    }
}

/// Applies one micro-batch and commits it. `rejects` counts the records of the same batch
/// that failed validation; `advance` records the source position the batch consumed in
/// the ledger that is written with it.
pub fn apply_and_commit(
    store: &mut Store,
    settings: &EngineSettings,
    events: &[Event],
    rejects: &BTreeMap<RejectReason, u64>,
    advance: impl FnOnce(&mut Ledger),
) -> Result<BatchSummary> {
    let mut interner = Interner::new(store, events)?;
    let mut next_seq = store.ledger().next_seq;
    let sequenced: Vec<Sequenced> = events
        .iter()
        .map(|e| {
            let seq = next_seq;
            next_seq += 1;
            Sequenced {
                seq,
                at: e.at,
                action: interner.action(&e.body),
            }
        })
        .collect();
    let Interner {
        users: user_ids_table,
        items: item_ids_table,
        ..
    } = interner;

    let mut user_ids: Vec<u32> = sequenced.iter().filter_map(|s| s.action.user()).collect();
    user_ids.sort_unstable();
    user_ids.dedup();
    let status_items: Vec<u32> = sequenced
        .iter()
        .filter_map(|s| match s.action {
            Action::ItemStatus { item, .. } => Some(item),
            _ => None,
        })
        .collect();
    let mut users = store.load_users(&user_ids)?;
    let mut statuses = store.load_statuses(&status_items)?;
    let effects = apply_batch(settings, &sequenced, &mut users, &mut statuses);

    let mut ledger = store.ledger().clone();
    ledger.next_seq = next_seq;
    ledger.next_user = user_ids_table.next;
    ledger.next_item = item_ids_table.next;
    ledger.buyers += effects.buyers_delta;
    ledger.recenterings += effects.recenterings;
    ledger.pair_updates += effects.pair_updates;
    if let Some(t) = effects.newest_event_at {
        ledger.event_time_watermark = Some(ledger.event_time_watermark.map_or(t, |w| w.max(t)));
    }
    for (&(kind, outcome), &n) in effects.outcomes.iter() {
        *ledger.events.entry(EventTally::key(kind, outcome)).or_default() += n;
    }
    for (reason, &n) in rejects {
        *ledger.rejects.entry(reason.code().to_string()).or_default() += n;
    }
    advance(&mut ledger);

    let changed_users: Vec<_> = effects
        .touched_users
        .iter()
        .map(|u| (*u, users.get(u).expect("touched users are loaded")))
        .collect();
    store.commit(BatchCommit {
        new_users: user_ids_table.added,
        new_items: item_ids_table.added,
        users: changed_users,
        effects: &effects,
        ledger,
        dirty_since: now_nanos(),
    })?;
    Ok(BatchSummary {
        outcomes: effects.outcomes.clone(),
        pair_updates: effects.pair_updates,
        recenterings: effects.recenterings,
        max_center_gap: effects.max_center_gap,
        center_gaps: effects.center_gaps.clone(),
        marked_dirty: !effects.dirty_rating.is_empty() || !effects.dirty_purchase.is_empty(),
    })
}
