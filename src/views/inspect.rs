//! Human-readable views of a store for the on-call engineer: an item's published lists
//! (`simtide neighbors`) and how one pair's score follows from its sums (`simtide explain`).

use std::fmt::Write as _;

use anyhow::{bail, Result};

use crate::cluster::owner;
use crate::config::PurchaseScore;
use crate::score::{
    damp, purchase_list_score, purchase_raw_score, rating_list_score, ListSettings, RatingSums,
};
use crate::signal::Signal;
use crate::store::Store;
use crate::timefmt::format_rfc3339;

fn item_or_fail(store: &Store, name: &str) -> Result<u32> {
    match store.item_id(name) {
        Some(id) => Ok(id),
        None => bail!("item {name:?} is not in store {}", store.dir().display()),
    }
}

/// Refuses, naming the owner, when none of `names` belongs to the store's shard: their
/// lists and sums are kept by another shard (docs/design.md, "Shards").
fn owned_here_or_fail(store: &Store, names: &[&str]) -> Result<()> {
    let shard = store.shard();
    if !shard.is_sharded() || names.iter().any(|n| shard.owns(n)) {
        return Ok(());
    }
    let owners: Vec<String> = names
        .iter()
        .map(|n| format!("{n:?} belongs to shard {}", owner(n, shard.shards)))
        .collect();
    bail!(
        "{}; store {} holds {}: ask that shard's store",
        owners.join(", "),
        store.dir().display(),
        shard
    )
}

/// A table of the item's published lists, one per signal (or only `only`).
pub fn neighbors_table(store: &Store, item_name: &str, only: Option<Signal>) -> Result<String> {
    owned_here_or_fail(store, &[item_name])?;
    let item = item_or_fail(store, item_name)?;
    let mut out = String::new();
    for signal in Signal::ALL.into_iter().filter(|s| only.is_none_or(|o| o == *s)) {
        let Some(list) = store.published(signal, item)? else {
            writeln!(
                out,
                "{item_name} ({} signal): nothing published yet",
                signal.as_str()
            )?;
            continue;
        };
        writeln!(
            out,
            "{item_name} ({} signal) version {}, computed {}, events up to {}",
            signal.as_str(),
            list.version,
            format_rfc3339(list.computed_at),
            list.event_time_watermark.map_or("-".into(), format_rfc3339)
        )?;
        if list.neighbors.is_empty() {
            writeln!(
                out,
                "  (empty: no neighbor passes min_common_users and min_score, or the item is unavailable)"
            )?;
            continue;
        }
        writeln!(
            out,
            "  {:>4}  {:<36} {:>9} {:>9}",
            "rank", "item", "score", "support"
        )?;
        for (rank, n) in list.neighbors.iter().enumerate() {
            writeln!(
                out,
                "  {:>4}  {:<36} {:>9.4} {:>9}",
                rank + 1,
                store.item_name(n.item),
                n.score,
                n.support
            )?;
        }
    }
    Ok(out)
}

fn published_rank(store: &Store, signal: Signal, a: u32, b: u32) -> Result<String> {
    Ok(match store.published(signal, a)? {
        None => "nothing published yet for this item".to_string(),
        Some(list) => match list.neighbors.iter().position(|n| n.item == b) {
            Some(i) => format!(
                "rank {} of {} in the published list (version {})",
                i + 1,
                list.neighbors.len(),
                list.version
            ),
            None => format!(
                "not in the published list (version {}, {} entries)",
                list.version,
                list.neighbors.len()
            ),
        },
    })
}

/// The pair's sums and the arithmetic from them to the published score. Long by design:
/// the explanation is written in the order a reader checks it.
pub fn explain_pair(store: &Store, a_name: &str, b_name: &str, settings: &ListSettings) -> Result<String> {
    owned_here_or_fail(store, &[a_name, b_name])?;
    let a = item_or_fail(store, a_name)?;
    let b = item_or_fail(store, b_name)?;
    let fp = store.fingerprint();
    let mut out = String::new();
    writeln!(out, "pair {a_name} ~ {b_name}")?;
    writeln!(out, "rating signal (adjusted cosine over co-raters)")?;
    match store.rating_pair(a, b)? {
        None => writeln!(out, "  no user has rated both")?,
        Some(stats) => {
            let s = RatingSums::from_stats(&stats);
            writeln!(out, "  co-raters            n   = {}", s.n)?;
            writeln!(out, "  Σ d_a·d_b            dot = {:.6}", s.dot)?;
            writeln!(out, "  Σ d_a² (co-raters)   sa  = {:.6}", s.norm_a)?;
            writeln!(out, "  Σ d_b² (co-raters)   sb  = {:.6}", s.norm_b)?;
            writeln!(
                out,
                "  d = rating − the user's applied center c_u; |mean − c_u| ≤ {} after every event{}",
                fp.recenter_tolerance,
                if fp.recenter_tolerance == 0.0 {
                    " (exact)"
                } else {
                    ""
                }
            )?;
            match s.adjusted_cosine() {
                None => writeln!(out, "  a co-rater norm is zero: the pair has no score")?,
                Some(raw) => {
                    writeln!(
                        out,
                        "  score = dot / (√sa · √sb) = {:.6} / ({:.6} × {:.6}) = {:.6}",
                        s.dot,
                        s.norm_a.sqrt(),
                        s.norm_b.sqrt(),
                        raw
                    )?;
                    if settings.damping > 0.0 {
                        writeln!(
                            out,
                            "  damping λ = {}: {raw:.6} × {}/({} + {}) = {:.6}",
                            settings.damping,
                            s.n,
                            s.n,
                            settings.damping,
                            damp(raw, s.n as u64, settings.damping)
                        )?;
                    }
                }
            }
            let verdict = match rating_list_score(&stats, settings) {
                Some(score) => format!("publishable with score {score:.6}"),
                None => format!(
                    "not publishable (needs n ≥ min_common_users {}, a score, and score > min_score {})",
                    settings.min_common_users, settings.min_score
                ),
            };
            writeln!(
                out,
                "  {verdict}; {}",
                published_rank(store, Signal::Rating, a, b)?
            )?;
        }
    }
    writeln!(
        out,
        "purchase signal ({})",
        purchase_name(settings.purchase_score)
    )?;
    let co = store.purchase_pair(a, b)?;
    if co == 0 {
        writeln!(out, "  no user has bought both")?;
    } else {
        let (na, nb, total) = (
            store.purchase_pair(a, a)?,
            store.purchase_pair(b, b)?,
            store.ledger().buyers,
        );
        writeln!(
            out,
            "  co-buyers co = {co}, buyers n_a = {na}, n_b = {nb}, all buyers N = {total}"
        )?;
        let formula = match settings.purchase_score {
            PurchaseScore::Cosine => "co / √(n_a·n_b)",
            PurchaseScore::Jaccard => "co / (n_a + n_b − co)",
            PurchaseScore::LogLikelihood => "G² of the table [[co, n_a−co], [n_b−co, N−n_a−n_b+co]]",
        };
        match purchase_raw_score(settings.purchase_score, co, na, nb, total) {
            Some(raw) => writeln!(out, "  score = {formula} = {raw:.6}")?,
            None => writeln!(
                out,
                "  no score ({formula} undefined, or purchased by the same users less often than chance)"
            )?,
        }
        let verdict = match purchase_list_score(co, na, nb, total, settings) {
            Some(score) => format!("publishable with score {score:.6}"),
            None => format!(
                "not publishable (needs co ≥ min_common_users {} and score > min_score {})",
                settings.min_common_users, settings.min_score
            ),
        };
        writeln!(
            out,
            "  {verdict}; {}",
            published_rank(store, Signal::Purchase, a, b)?
        )?;
    }
    Ok(out)
}

fn purchase_name(kind: PurchaseScore) -> &'static str {
    match kind {
        PurchaseScore::Cosine => "cosine of buyer sets",
        PurchaseScore::Jaccard => "Jaccard of buyer sets",
        PurchaseScore::LogLikelihood => "log-likelihood ratio",
    }
}
