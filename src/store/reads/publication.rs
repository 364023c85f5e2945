//! Reading what publication needs: the dirty marks of lists out of date, the lists last
//! published, and where the stored lists were delivered.

use anyhow::Result;
use rocksdb::IteratorMode;

use crate::event::UnixNanos;
use crate::model::{DirtyMark, PublishedList};
use crate::signal::Signal;
use crate::store::{codec, Store, CF_DIRTY, CF_META, CF_PUBLISHED, META_DELIVERED_TO};

impl Store {
    /// Pending dirty marks of a signal.
    pub fn dirty_marks(&self, signal: Signal) -> Result<Vec<(u32, DirtyMark)>> {
        let mut out = Vec::new();
        for entry in self
            .db
            .prefix_iterator_cf(self.cf(CF_DIRTY), [codec::signal_key_byte(signal)])
        {
            let (key, value) = entry?;
            if key.first() != Some(&codec::signal_key_byte(signal)) {
                break;
            }
            let (_, item) = codec::split_signal_item_key(&key)?;
            out.push((item, codec::decode_dirty_mark(&value)?));
        }
        Ok(out)
    }

    /// The last list published for an item.
    pub fn published(&self, signal: Signal, item: u32) -> Result<Option<PublishedList>> {
        match self
            .db
            .get_cf(self.cf(CF_PUBLISHED), codec::signal_item_key(signal, item))?
        {
            Some(v) => Ok(Some(codec::decode_published(&v)?)),
            None => Ok(None),
        }
    }

    /// Every published list, in (signal, item id) order.
    pub fn all_published(&self) -> impl Iterator<Item = Result<(Signal, u32, PublishedList)>> + '_ {
        self.db
            .iterator_cf(self.cf(CF_PUBLISHED), IteratorMode::Start)
            .map(|entry| {
                let (key, value) = entry?;
                let (signal, item) = codec::split_signal_item_key(&key)?;
                Ok((signal, item, codec::decode_published(&value)?))
            })
    }

    /// When the oldest pending change happened (the earliest dirty mark), if any.
    pub fn oldest_dirty_since(&self) -> Result<Option<UnixNanos>> {
        let mut oldest: Option<UnixNanos> = None;
        for entry in self.db.iterator_cf(self.cf(CF_DIRTY), IteratorMode::Start) {
            let (_, value) = entry?;
            let since = codec::decode_dirty_mark(&value)?.since;
            oldest = Some(oldest.map_or(since, |o| o.min(since)));
        }
        Ok(oldest)
    }

    /// The destination label whose topics hold every stored list, if any.
    pub fn delivered_to(&self) -> Result<Option<String>> {
        let value = self.db.get_cf(self.cf(CF_META), META_DELIVERED_TO)?;
        Ok(value.map(|v| String::from_utf8_lossy(&v).into_owned()))
    }
}
