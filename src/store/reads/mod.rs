//! Reading a store, one file per part of it: users and items (`entities`), pair sums
//! (`pairs`), the state publication keeps (`publication`), and size figures and
//! compaction (`size`).

mod entities;
mod pairs;
mod publication;
mod size;

pub use size::StoreStats;
