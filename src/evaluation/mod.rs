//! Offline evaluation of settings: replaying a split of the history into temporary
//! stores (`evaluate`), rating error and ranking quality (`quality`), and the HTML report
//! with its plots (`report`).

pub mod evaluate;
pub mod quality;
pub mod report;
