//! Score records in the sled store: pages of records under one key (`score_pages`), read
//! back by id or newest first, and deleted oldest first by compaction. Pages are appended to
//! the score log and the `scores` tree keeps a pointer to each (`score_log`); pages written
//! before layout 5, and a page compaction rewrote, are the tree's values themselves.

use super::*;

/// Room per record when a batch is encoded: a compact record with 30 numeric features is about
/// 300 bytes, its JSON about 900.
const RECORD_BYTES_GUESS: usize = 384;

impl SledStore {
    pub(super) fn write_score_records(&self, records: &[ScoreRecord]) -> Result<(), StoreError> {
        let Some(last) = records.last() else {
            return Ok(());
        };
        let mut newest = lock(&self.newest_score);
        crate::store::check_score_order(newest.as_deref(), records)?;
        // The batch's pages share one layout, the first compact-able record's; a record whose
        // features are text, or of another layout, is written as JSON.
        let layout = records.iter().find_map(|r| match &r.features {
            RecordedFeatures::Values { layout, .. } => Some(Arc::clone(layout)),
            RecordedFeatures::Text(_) => None,
        });
        let layout_bytes = layout.as_ref().map(|l| self.layouts.bytes_of(l));
        // Every record into one buffer, then pages slice it: one allocation per batch rather
        // than one (and its regrowth) per record.
        let mut bytes = Vec::with_capacity(records.len() * RECORD_BYTES_GUESS);
        let mut ends = Vec::with_capacity(records.len());
        for record in records {
            let compact = layout
                .as_ref()
                .is_some_and(|l| score_pages::encode_compact(record, l, &mut bytes));
            if !compact {
                serde_json::to_writer(&mut bytes, record).expect("a score record serializes");
            }
            ends.push((bytes.len(), compact));
        }
        let mut start = 0;
        let stored: Vec<(&str, StoredRecord)> = records
            .iter()
            .zip(&ends)
            .map(|(r, &(end, compact))| {
                let slice = &bytes[start..end];
                start = end;
                let stored = if compact {
                    StoredRecord::Compact(slice)
                } else {
                    StoredRecord::Json(slice)
                };
                (r.score_id.as_str(), stored)
            })
            .collect();
        let layout_bytes = layout_bytes.as_deref().unwrap_or(&[]);
        let mut keys = Vec::new();
        let mut pages = Vec::new();
        for page in score_pages::split(&stored) {
            keys.push(page[0].0);
            pages.push((
                score_pages::encode(layout_bytes, page).map_err(page_error)?,
                page.len() as u32,
            ));
        }
        // The pages first, then the pointers: a crash between leaves bytes nothing names.
        let pointers = self.score_log.append(&pages).map_err(log_io)?;
        let mut batch = sled::Batch::default();
        for (key, pointer) in keys.into_iter().zip(pointers) {
            batch.insert(key.as_bytes(), &pointer.encode()[..]);
        }
        self.scores.apply_batch(batch).map_err(io)?;
        *newest = Some(last.score_id.clone());
        self.score_count
            .fetch_add(records.len() as u64, Ordering::SeqCst);
        Ok(())
    }

    /// A page's layout, if it has one (parsed once per distinct layout, see [`LayoutCache`]).
    fn layout_of(&self, page: &PageView) -> Result<Option<Arc<FeatureLayout>>, StoreError> {
        match page.layout_bytes() {
            [] => Ok(None),
            bytes => self.layouts.layout_of(bytes).map(Some).ok_or_else(|| {
                StoreError::Corrupt("a score page's feature layout is damaged".into())
            }),
        }
    }

    /// A `scores` value's page: the value itself, or what its pointer names in the score log
    /// (`None` when that page was lost in a crash; see `score_log`).
    pub(super) fn page_bytes(&self, value: &sled::IVec) -> Result<Option<sled::IVec>, StoreError> {
        match score_log::Pointer::decode(value) {
            None => Ok(Some(value.clone())),
            Some(pointer) => Ok(self
                .score_log
                .read(&pointer)
                .map_err(log_io)?
                .map(Into::into)),
        }
    }

    /// Reads a stored record back with its page's layout.
    pub(super) fn decode_record(
        &self,
        page: &PageView,
        id: &str,
        stored: StoredRecord,
    ) -> Result<ScoreRecord, StoreError> {
        let layout = match stored {
            StoredRecord::Compact(_) => self.layout_of(page)?,
            StoredRecord::Json(_) => None,
        };
        score_pages::decode(id, stored, layout.as_ref()).map_err(page_error)
    }

    pub(super) fn read_score(&self, score_id: &str) -> Result<Option<ScoreRecord>, StoreError> {
        // The page holding an id is the last key at or before it.
        let Some(item) = self.scores.range(..=score_id.as_bytes()).next_back() else {
            return Ok(None);
        };
        let (key, value) = item.map_err(io)?;
        let Some(value) = self.page_bytes(&value)? else {
            return Ok(None);
        };
        let page = PageView::parse(&key, &value).map_err(page_error)?;
        page.get(score_id)
            .map(|stored| self.decode_record(&page, score_id, stored))
            .transpose()
    }

    pub(super) fn read_recent_scores(
        &self,
        max: usize,
        since: Option<Millis>,
    ) -> Result<Vec<ScoreRecord>, StoreError> {
        // Pages come in id order and score ids are ULIDs: their byte order is their time order.
        let mut out = Vec::new();
        'pages: for item in self.scores.iter().rev() {
            let (key, value) = item.map_err(io)?;
            let Some(value) = self.page_bytes(&value)? else {
                continue;
            };
            let page = PageView::parse(&key, &value).map_err(page_error)?;
            for &(id, stored) in page.entries().iter().rev() {
                if out.len() >= max {
                    break 'pages;
                }
                let record = self.decode_record(&page, id, stored)?;
                if since.is_some_and(|since| record.at < since) {
                    break 'pages;
                }
                out.push(record);
            }
        }
        Ok(out)
    }

    pub(super) fn delete_old_scores(
        &self,
        limits: ScoreLimits,
        max_pages: usize,
    ) -> Result<Compacted, StoreError> {
        // Records beyond the count limit are the oldest `excess`; records older than the age
        // limit are the ids below the ULID of that instant (its random part zero). Both are a
        // prefix of the tree: whole pages go, and the page the prefix ends in is written again
        // without its deleted records, under its first kept id.
        let excess = limits
            .keep
            .map_or(0, |keep| self.score_count().saturating_sub(keep));
        let boundary = limits
            .older_than
            .map(|t| ulid::Ulid::from_parts(t.max(0) as u64, 0).to_string());
        let goes = |deleted: u64, id: &str| {
            deleted < excess || boundary.as_ref().is_some_and(|b| id < b.as_str())
        };
        let mut batch = sled::Batch::default();
        let mut done = Compacted::default();
        for item in self.scores.iter() {
            if done.pages >= max_pages {
                done.more = true;
                break;
            }
            let (key, value) = item.map_err(io)?;
            let Some(bytes) = self.page_bytes(&value)? else {
                // A page lost in a crash: it goes by its first id, with the records its
                // pointer counted.
                let records = score_log::Pointer::decode(&value).map_or(0, |p| p.records);
                if !goes(done.records, &String::from_utf8_lossy(&key)) {
                    break;
                }
                batch.remove(key.clone());
                done.pages += 1;
                done.records += u64::from(records);
                continue;
            };
            let page = PageView::parse(&key, &bytes).map_err(page_error)?;
            let dropped = (0..page.len())
                .take_while(|&i| goes(done.records + i as u64, page.id(i)))
                .count();
            if dropped == 0 {
                break;
            }
            batch.remove(key.clone());
            done.pages += 1;
            done.records += dropped as u64;
            if dropped < page.len() {
                batch.insert(
                    page.id(dropped).as_bytes(),
                    page.rewrite_from(dropped).map_err(page_error)?,
                );
                break;
            }
        }
        if done.records > 0 {
            // A sled batch holds sled's global write lock while it applies: every other read
            // and write of the store (score lookups, outcome transactions, the recorder's
            // batches, the flusher) waits for it, hence the bounded chunk.
            self.scores.apply_batch(batch).map_err(io)?;
            // Saturating: a record batch applied a moment ago may not be counted yet.
            let _ = self
                .score_count
                .fetch_update(Ordering::SeqCst, Ordering::SeqCst, |n| {
                    Some(n.saturating_sub(done.records))
                });
            self.remove_dead_segments()?;
        }
        Ok(done)
    }

    /// Deletes the score log's segments below the first one a pointer names: segments fill
    /// in id order and compaction deletes the oldest ids, so nothing below it is live.
    fn remove_dead_segments(&self) -> Result<(), StoreError> {
        let mut first_live = u64::MAX;
        for value in self.scores.iter().values() {
            if let Some(pointer) = score_log::Pointer::decode(&value.map_err(io)?) {
                first_live = pointer.segment;
                break;
            }
        }
        self.score_log.remove_below(first_live).map_err(log_io)?;
        Ok(())
    }
}
