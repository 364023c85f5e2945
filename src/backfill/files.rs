//! File backfill: batches whose boundaries are fixed multiples of `backfill.batch_events`
//! from the start of each file, so a resumed run cuts the same batches; the file position
//! is committed with every batch.

use anyhow::Result;

use super::writer::{BatchWriter, ReadBatch, RecordOrigin};
use super::{BackfillRequest, BackfillSummary};
use crate::backfill::source::{Decoded, InputFile, RecordReader};
use crate::observability::meter::{Display, Meter, Unit};
use crate::store::{FilePosition, PairWrite};

/// One chunk as the reading thread hands it over, with where the file stands after it.
struct ReadChunk {
    batch: ReadBatch,
    /// Whether the file ended with it.
    at_end: bool,
    /// Ordinal of the next record.
    next_record: u64,
    /// Bytes of the file read so far.
    bytes_read: u64,
}

/// Reads records up to the ordinal `boundary` (or the end of the file) into a batch; true
/// with it when the file ended.
fn read_batch(
    reader: &mut RecordReader,
    boundary: u64,
    source: &str,
    keep_text: bool,
) -> Result<(ReadBatch, bool)> {
    let mut batch = ReadBatch::default();
    while reader.ordinal() < boundary {
        let Some(record) = reader.next_record()? else {
            return Ok((batch, true));
        };
        match record.decoded {
            Decoded::Event(e) => {
                batch.events.push(e);
                batch.records += 1;
            }
            Decoded::Blank => {}
            Decoded::Rejected(rejection, raw) => {
                let origin = RecordOrigin::File {
                    line: record.line,
                    record: record.ordinal,
                };
                batch.reject(source, origin, &rejection, keep_text.then_some(raw.as_str()));
                batch.records += 1;
            }
        }
    }
    Ok((batch, false))
}

/// Replays the request's files to their end, then publishes.
pub fn backfill_files(request: &BackfillRequest) -> Result<BackfillSummary> {
    let inputs = request
        .inputs
        .iter()
        .map(|p| InputFile::describe(p))
        .collect::<Result<Vec<_>>>()?;
    let limits = request.config.limits();
    let batch_len = request.config.backfill.batch_events;
    let mut writer = BatchWriter::open(request, PairWrite::Ingested)?;
    let done =
        |w: &BatchWriter, f: &InputFile| w.store().ledger().files.get(&f.canonical).is_some_and(|p| p.done);
    let pending_bytes: u64 = inputs.iter().filter(|f| !done(&writer, f)).map(|f| f.size).sum();
    let mut meter = Meter::new(
        "backfill",
        pending_bytes,
        Unit::Bytes,
        Display::when(request.show_progress),
    );
    let mut skipped = Vec::new();
    let mut bytes_before = 0;
    for input in &inputs {
        let position = writer
            .store()
            .ledger()
            .files
            .get(&input.canonical)
            .copied()
            .unwrap_or_default();
        if position.done {
            skipped.push(input.canonical.clone());
            continue;
        }
        let mut reader = RecordReader::open(input, limits)?;
        reader.skip_to(position.next_record)?;
        let keep_text = request.config.backfill.rejects_keep_text;
        // One thread reads and decodes the next chunk while this one stages the last.
        std::thread::scope(|scope| -> Result<()> {
            let (chunks, received) = std::sync::mpsc::sync_channel::<Result<ReadChunk>>(2);
            let source = input.canonical.as_str();
            scope.spawn(move || loop {
                let boundary = (reader.ordinal() / batch_len + 1) * batch_len;
                let read =
                    read_batch(&mut reader, boundary, source, keep_text).map(|(batch, at_end)| ReadChunk {
                        batch,
                        at_end,
                        next_record: reader.ordinal(),
                        bytes_read: reader.bytes_read(),
                    });
                let last = !matches!(&read, Ok(chunk) if !chunk.at_end);
                // A send fails when the writer stopped on an error: reading stops too.
                if chunks.send(read).is_err() || last {
                    break;
                }
            });
            for chunk in received {
                let ReadChunk {
                    batch,
                    at_end,
                    next_record,
                    bytes_read,
                } = chunk?;
                // A file that ends exactly on a boundary is only known to be done on the
                // next read, which then commits an empty batch that marks it done.
                let canonical = input.canonical.clone();
                writer.apply(batch, |p| {
                    p.files.insert(
                        canonical,
                        FilePosition {
                            next_record,
                            done: at_end,
                        },
                    );
                })?;
                meter.update(
                    bytes_before + bytes_read,
                    &format!("{:.0} events/s", writer.records_per_second()),
                );
                if at_end {
                    break;
                }
            }
            Ok(())
        })?;
        bytes_before += input.size;
    }
    meter.finish();
    let mut summary = writer.finish()?;
    summary.skipped_files = skipped;
    Ok(summary)
}
