//! Historical input files for backfill: JSON lines or CSV, plain or gzip, read record by
//! record with the line number each record came from.

use std::fs::File;
use std::io::{self, BufRead, BufReader, Read};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

use anyhow::{Context, Result};
use flate2::read::MultiGzDecoder;

use crate::decode::csv_records::CsvColumns;
use crate::decode::json::decode_json_line;
use crate::decode::{refuse_if_ahead, Limits, RejectReason, Rejection};
use crate::event::Event;
use crate::timefmt::now_nanos;

/// How a file's records are written, decided by its name (`.csv` or `.csv.gz` is CSV,
/// anything else JSON lines); gzip is recognised by its magic bytes, not its name.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum InputFormat {
    /// One JSON object per line.
    JsonLines,
    /// Header row, then one event per record.
    Csv,
}

/// An input file named on the command line.
#[derive(Debug, Clone)]
pub struct InputFile {
    /// As given.
    pub path: PathBuf,
    /// Absolute, symlinks resolved: the key under which its position is stored.
    pub canonical: String,
    /// Its record format.
    pub format: InputFormat,
    /// Its size on disk in bytes (compressed size for gzip), for progress and ETA.
    pub size: u64,
}

impl InputFile {
    /// Checks that the file exists and works out its format.
    pub fn describe(path: &Path) -> Result<InputFile> {
        let canonical =
            std::fs::canonicalize(path).with_context(|| format!("input {}: cannot open", path.display()))?;
        let size = std::fs::metadata(&canonical)
            .with_context(|| format!("input {}: cannot stat", path.display()))?
            .len();
        let name = canonical.to_string_lossy().to_ascii_lowercase();
        let stem = name.strip_suffix(".gz").unwrap_or(&name);
        let format = if stem.ends_with(".csv") {
            InputFormat::Csv
        } else {
            InputFormat::JsonLines
        };
        Ok(InputFile {
            path: path.to_path_buf(),
            canonical: canonical.to_string_lossy().into_owned(),
            format,
            size,
        })
    }
}

/// What one record of a file turned out to be.
#[derive(Debug)]
pub enum Decoded {
    /// A valid event.
    Event(Event),
    /// A refused record, with its raw text for the rejects file.
    Rejected(Rejection, String),
    /// An empty line: neither an event nor an error.
    Blank,
}

/// One record and where it came from.
#[derive(Debug)]
pub struct InputRecord {
    /// 0-based record index: the resumable position.
    pub ordinal: u64,
    /// 1-based line number where the record starts, for people.
    pub line: u64,
    /// The decoded content.
    pub decoded: Decoded,
}

/// Counts bytes read from the file on disk, so progress can be shown for gzip too.
struct CountingReader {
    inner: File,
    count: Arc<AtomicU64>,
}

impl Read for CountingReader {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        let n = self.inner.read(buf)?;
        self.count.fetch_add(n as u64, Ordering::Relaxed);
        Ok(n)
    }
}

enum Records {
    Json {
        reader: Box<dyn BufRead + Send>,
        buf: Vec<u8>,
        line: u64,
    },
    Csv {
        reader: Box<csv::Reader<Box<dyn Read + Send>>>,
        columns: CsvColumns,
        record: csv::ByteRecord,
    },
}

/// Reads an input file record by record.
pub struct RecordReader {
    records: Records,
    ordinal: u64,
    limits: Limits,
    bytes_read: Arc<AtomicU64>,
}

impl RecordReader {
    /// Opens the file, detecting gzip, and reads the CSV header if any.
    pub fn open(file: &InputFile, limits: Limits) -> Result<RecordReader> {
        let bytes_read = Arc::new(AtomicU64::new(0));
        let raw =
            File::open(&file.path).with_context(|| format!("input {}: cannot open", file.path.display()))?;
        let mut buffered = BufReader::with_capacity(
            1 << 16,
            CountingReader {
                inner: raw,
                count: bytes_read.clone(),
            },
        );
        let is_gzip = buffered.fill_buf()?.starts_with(&[0x1f, 0x8b]);
        let stream: Box<dyn Read + Send> = if is_gzip {
            Box::new(MultiGzDecoder::new(buffered))
        } else {
            Box::new(buffered)
        };
        let records = match file.format {
            InputFormat::JsonLines => Records::Json {
                reader: Box::new(BufReader::with_capacity(1 << 16, stream)),
                buf: Vec::with_capacity(256),
                line: 0,
            },
            InputFormat::Csv => {
                let mut reader = csv::ReaderBuilder::new()
                    .flexible(true)
                    .has_headers(true)
                    .from_reader(stream);
                let header = reader
                    .headers()
                    .with_context(|| format!("input {}: cannot read the CSV header", file.path.display()))?
                    .clone();
                let columns = CsvColumns::from_header(&header)
                    .with_context(|| format!("input {}", file.path.display()))?;
                Records::Csv {
                    reader: Box::new(reader),
                    columns,
                    record: csv::ByteRecord::new(),
                }
            }
        };
        Ok(RecordReader {
            records,
            ordinal: 0,
            limits,
            bytes_read,
        })
    }

    /// Bytes of the file on disk consumed so far.
    pub fn bytes_read(&self) -> u64 {
        self.bytes_read.load(Ordering::Relaxed)
    }

    /// Index of the next record to be returned.
    pub fn ordinal(&self) -> u64 {
        self.ordinal
    }

    /// Reads the next record; `Ok(None)` at the end of the file. I/O and decompression
    /// errors are returned as errors: they concern the file, not one record.
    pub fn next_record(&mut self) -> Result<Option<InputRecord>> {
        let ordinal = self.ordinal;
        let result = match &mut self.records {
            Records::Json { reader, buf, line } => {
                buf.clear();
                if reader.read_until(b'\n', buf)? == 0 {
                    return Ok(None);
                }
                *line += 1;
                let decoded = decode_json_bytes(buf, &self.limits);
                InputRecord {
                    ordinal,
                    line: *line,
                    decoded,
                }
            }
            Records::Csv {
                reader,
                columns,
                record,
            } => {
                if !reader.read_byte_record(record)? {
                    return Ok(None);
                }
                let line = record.position().map_or(0, |p| p.line());
                let decoded = match csv::StringRecord::from_byte_record(record.clone()) {
                    Err(_) => Decoded::Rejected(
                        Rejection::new("(record)", RejectReason::BadCsv, "not valid UTF-8"),
                        String::from_utf8_lossy(record.as_slice()).into_owned(),
                    ),
                    Ok(text) if text.iter().all(|c| c.trim().is_empty()) => Decoded::Blank,
                    Ok(text) => {
                        let raw = || text.iter().collect::<Vec<_>>().join(",");
                        match columns.decode(&text, &self.limits) {
                            Ok(event) => judged_against_clock(event, &self.limits, raw),
                            Err(r) => Decoded::Rejected(r, raw()),
                        }
                    }
                };
                InputRecord {
                    ordinal,
                    line,
                    decoded,
                }
            }
        };
        self.ordinal += 1;
        Ok(Some(result))
    }

    /// Skips records already applied by an earlier run.
    pub fn skip_to(&mut self, ordinal: u64) -> Result<()> {
        while self.ordinal < ordinal {
            if self.next_record()?.is_none() {
                break;
            }
        }
        Ok(())
    }
}

fn decode_json_bytes(buf: &[u8], limits: &Limits) -> Decoded {
    let text = match std::str::from_utf8(buf) {
        Ok(t) => t.trim_end_matches(['\n', '\r']),
        Err(_) => {
            return Decoded::Rejected(
                Rejection::new("(record)", RejectReason::BadJson, "line is not valid UTF-8"),
                String::from_utf8_lossy(buf).trim_end().to_string(),
            )
        }
    };
    if text.trim().is_empty() {
        return Decoded::Blank;
    }
    match decode_json_line(text, limits) {
        Ok(event) => judged_against_clock(event, limits, || text.to_string()),
        Err(r) => Decoded::Rejected(r, text.to_string()),
    }
}

/// A decoded event of a file, refused when dated further past the clock than
/// `input.max_future_skew` (a file has no broker timestamp to read it against).
fn judged_against_clock(event: Event, limits: &Limits, raw: impl FnOnce() -> String) -> Decoded {
    match refuse_if_ahead(&event, now_nanos(), limits) {
        Ok(()) => Decoded::Event(event),
        Err(r) => Decoded::Rejected(r, raw()),
    }
}
