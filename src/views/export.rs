//! `simtide export`: every non-empty published list as one JSON line, the same record the
//! output topic carries.

use std::io::Write;

use anyhow::Result;

use crate::observability::meter::{Display, Meter, Unit};
use crate::store::Store;
use crate::views::record::NeighborRecord;

/// Writes the records and returns how many were written.
pub fn export_lists(store: &Store, out: &mut dyn Write, show_progress: bool) -> Result<u64> {
    let mut meter = Meter::new(
        "export",
        2 * store.item_count() as u64,
        Unit::Items,
        Display::when(show_progress),
    );
    let (mut seen, mut written) = (0u64, 0u64);
    for entry in store.all_published() {
        let (signal, item, list) = entry?;
        seen += 1;
        if !list.neighbors.is_empty() {
            serde_json::to_writer(
                &mut *out,
                &NeighborRecord::from_stored(store, signal, item, &list),
            )?;
            out.write_all(b"\n")?;
            written += 1;
        }
        if seen % 1024 == 0 {
            meter.update(seen, "lists");
        }
    }
    out.flush()?;
    meter.finish();
    Ok(written)
}
