//! What the command line and HTTP show of a store: an item's neighbors and why two
//! items are similar (`inspect`), recommendations for a user (`recommend`), the stored
//! lists as records (`record`) and as a file (`export`).

pub mod export;
pub mod inspect;
pub mod recommend;
pub mod record;
