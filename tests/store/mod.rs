//! Backfill and the store.

mod bad_input;
mod crash_resume;
mod full_disk;
mod rules;
mod shards;
mod snapshots;
mod upgrades;
mod whole_copies;
