//! RocksDB's options for a store: the database's (background jobs, compression, the
//! write-ahead log and MANIFEST sizes) and each column family's (merge operators,
//! compaction filters, buffers, periodic rewrites). Apart from the opening sequence
//! (`open`), so that the migrations, which open a store their own way, use the same
//! options without depending on it.

use rocksdb::{ColumnFamilyDescriptor, DBCompressionType, Options};

use super::{merge, ALL_CFS, CF_DIRTY, CF_PAIRS, CF_PURCHASE_PAIRS};

/// Bytes of the write buffer of a pair family: room for bursts, as flushing merges
/// operands and lags bulk writes.
const PAIR_WRITE_BUFFER_BYTES: usize = 64 << 20;

/// Write buffers the rating pair family may hold before writes stall.
const PAIR_WRITE_BUFFERS: i32 = 4;

/// Level-0 files of the rating pair family that start a compaction. Each live write
/// ingests one or two files overlapping the whole family, and each compaction rewrites the
/// whole family: with RocksDB's default of 4, compactions took 42 % of the live service's
/// processor time on the MovieLens benchmark. Rows the service reads often are kept in
/// memory, so the extra files mostly cost the first read of a row.
const PAIR_LEVEL0_FILES: i32 = 16;

/// Largest total size of the write-ahead log before the families holding it are flushed.
const MAX_TOTAL_WAL_BYTES: u64 = 256 << 20;

/// Age after which RocksDB rewrites any table file, so that old sums from before an
/// erasure's retraction do not outlive it by more than this (docs/design.md, "Personal
/// data").
const TABLE_FILE_REWRITE_SECONDS: u64 = 7 * 24 * 3600;

/// Size past which RocksDB starts a new MANIFEST, which drops the first and last keys of
/// table files that no longer exist (a forgotten user's name among them).
const MAX_MANIFEST_BYTES: usize = 1 << 20;

/// Background flush and compaction threads.
const BACKGROUND_JOBS: i32 = 2;

/// The database-wide options of every open of a store.
pub(super) fn db_options() -> Options {
    let mut o = Options::default();
    o.create_if_missing(true);
    o.create_missing_column_families(true);
    o.increase_parallelism(BACKGROUND_JOBS);
    o.set_max_background_jobs(BACKGROUND_JOBS);
    // A manual compaction after a bulk backfill splits its key range over this many
    // threads.
    o.set_max_subcompactions(BACKGROUND_JOBS as u32);
    o.set_compression_type(DBCompressionType::Lz4);
    o.set_level_compaction_dynamic_level_bytes(true);
    // Small families (meta, users, ids) rarely fill a memtable; without a cap they would
    // pin every WAL file the big pair families have long since flushed.
    o.set_max_total_wal_size(MAX_TOTAL_WAL_BYTES);
    o.set_max_manifest_file_size(MAX_MANIFEST_BYTES);
    o
}

/// The options of one column family: merge operators, compaction filters, buffers. Table
/// files written for ingestion use the same.
pub(super) fn cf_options(name: &str) -> Options {
    let mut o = Options::default();
    o.set_compression_type(DBCompressionType::Lz4);
    o.set_periodic_compaction_seconds(TABLE_FILE_REWRITE_SECONDS);
    match name {
        CF_PAIRS => {
            // LZ4 at acceleration 2 (a negative level): compressing the row blocks was the
            // largest single cost of a wide backfill's pass; this spends a tenth of it
            // less for about 3 % more bytes per pair (measured on the generated wide set).
            o.set_compression_options(-14, -2, 0, 0);
            o.set_merge_operator_associative("simtide_rating_block_sum", merge::merge_rating_blocks);
            o.set_compaction_filter(
                "simtide_drop_empty_rating_blocks",
                merge::drop_empty_rating_blocks,
            );
            o.set_write_buffer_size(PAIR_WRITE_BUFFER_BYTES);
            o.set_max_write_buffer_number(PAIR_WRITE_BUFFERS);
            o.set_level_zero_file_num_compaction_trigger(PAIR_LEVEL0_FILES);
        }
        CF_PURCHASE_PAIRS => {
            o.set_merge_operator_associative("simtide_count_sum", merge::merge_counts);
            o.set_compaction_filter("simtide_drop_empty_counts", merge::drop_empty_counts);
            o.set_write_buffer_size(PAIR_WRITE_BUFFER_BYTES);
        }
        CF_DIRTY => {
            o.set_merge_operator_associative("simtide_dirty_earliest", merge::merge_dirty);
        }
        _ => {}
    }
    o
}

/// Every column family with its options, for opening a store.
pub(super) fn cf_descriptors() -> Vec<ColumnFamilyDescriptor> {
    ALL_CFS
        .iter()
        .map(|&name| ColumnFamilyDescriptor::new(name, cf_options(name)))
        .collect()
}
