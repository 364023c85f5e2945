//! The validated events of the input contract (docs/design.md, "Events"), independent of
//! their wire format.

use serde::{Deserialize, Serialize};

/// A point in time as nanoseconds since the Unix epoch (UTC): event times and the
/// wall-clock stamps of lists and dirty marks. A type of its own so that it is never
/// mixed up with the milliseconds of Kafka record timestamps ([`UnixMillis`]) or with a
/// count.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(transparent)]
pub struct UnixNanos(pub i64);

/// A point in time as milliseconds since the Unix epoch, as Kafka record timestamps and
/// offset-by-time lookups give it.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct UnixMillis(pub i64);

impl UnixNanos {
    /// Seconds since the epoch, as Prometheus timestamps are given.
    pub fn as_secs_f64(self) -> f64 {
        self.0 as f64 / crate::timefmt::NANOS_PER_SECOND as f64
    }

    /// The same instant in whole milliseconds (rounded toward negative infinity).
    pub fn to_millis(self) -> UnixMillis {
        UnixMillis(self.0.div_euclid(crate::timefmt::NANOS_PER_MILLI))
    }
}

/// What an event does; field names follow the JSON contract.
#[derive(Debug, Clone, PartialEq)]
pub enum EventBody {
    /// Sets or replaces the user's rating of the item.
    Rating {
        /// Who rated.
        user: String,
        /// What was rated.
        item: String,
        /// The rating, finite and inside the configured scale.
        value: f64,
    },
    /// Withdraws the user's rating of the item.
    Unrating {
        /// Whose rating.
        user: String,
        /// Of which item.
        item: String,
    },
    /// Marks the item bought by the user (implicit signal).
    Purchase {
        /// The buyer.
        user: String,
        /// What was bought.
        item: String,
    },
    /// Removes every contribution and the stored history of the user.
    EraseUser {
        /// The user to forget.
        user: String,
    },
    /// Sets whether the item may appear in published lists.
    ItemStatus {
        /// The item.
        item: String,
        /// False keeps its statistics but leaves it out of published lists.
        available: bool,
    },
}

/// One decoded, validated event.
#[derive(Debug, Clone, PartialEq)]
pub struct Event {
    /// When it happened, per its `at` field.
    pub at: UnixNanos,
    /// What it does.
    pub body: EventBody,
}

/// Event kinds, as named in the contract and in counters.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum EventKind {
    /// `rating`
    Rating,
    /// `unrating`
    Unrating,
    /// `purchase`
    Purchase,
    /// `erase_user`
    EraseUser,
    /// `item_status`
    ItemStatus,
}

impl EventKind {
    /// Every kind, in contract order.
    pub const ALL: [EventKind; 5] = [
        EventKind::Rating,
        EventKind::Unrating,
        EventKind::Purchase,
        EventKind::EraseUser,
        EventKind::ItemStatus,
    ];

    /// The contract's name of the kind.
    pub fn as_str(self) -> &'static str {
        match self {
            EventKind::Rating => "rating",
            EventKind::Unrating => "unrating",
            EventKind::Purchase => "purchase",
            EventKind::EraseUser => "erase_user",
            EventKind::ItemStatus => "item_status",
        }
    }

    /// Looks a kind up by its contract name.
    pub fn parse(name: &str) -> Option<EventKind> {
        EventKind::ALL.into_iter().find(|k| k.as_str() == name)
    }
}

impl Event {
    /// The kind of this event.
    pub fn kind(&self) -> EventKind {
        match self.body {
            EventBody::Rating { .. } => EventKind::Rating,
            EventBody::Unrating { .. } => EventKind::Unrating,
            EventBody::Purchase { .. } => EventKind::Purchase,
            EventBody::EraseUser { .. } => EventKind::EraseUser,
            EventBody::ItemStatus { .. } => EventKind::ItemStatus,
        }
    }

    /// The user the event concerns, if any (item_status concerns no user).
    pub fn user(&self) -> Option<&str> {
        match &self.body {
            EventBody::Rating { user, .. }
            | EventBody::Unrating { user, .. }
            | EventBody::Purchase { user, .. }
            | EventBody::EraseUser { user } => Some(user),
            EventBody::ItemStatus { .. } => None,
        }
    }

    /// The item the event concerns, if any (erase_user concerns no single item).
    pub fn item(&self) -> Option<&str> {
        match &self.body {
            EventBody::Rating { item, .. }
            | EventBody::Unrating { item, .. }
            | EventBody::Purchase { item, .. }
            | EventBody::ItemStatus { item, .. } => Some(item),
            EventBody::EraseUser { .. } => None,
        }
    }
}
