//! Score records are written many to a key: a *page*.
//!
//! sled's cost is mostly per key: writing 900-byte records one per key took 13-20 µs of CPU
//! per record, and 4-5 µs as pages of 8 (measured on this machine, see `BENCHMARKS.md`). Every
//! score leaves a record, so the scoring path's throughput followed sled's cost per key until
//! records were paged.
//!
//! Pages stay small, though: sled writes a tree node larger than a quarter of its 512 KiB
//! segment as a file of its own, and a leaf holds up to 17 keys, so pages of 64 records
//! (57 KB) made every leaf rewrite a file creation and cost 5-7 µs per record again.
//!
//! The recorder assigns score ids in the order it writes them, so pages hold increasing ids
//! and never overlap: a page's key is its first id, and the page holding an id is the last key
//! at or before that id.
//!
//! A page's value (format 2, written since records could be compact): byte 0 is
//! [`PAGE_FORMAT`]; a little-endian `u32` length and the [`FeatureLayout`] its compact records
//! are rendered with (length 0 when it has none); a `u32` count; per record a `u8` id length,
//! the id and a `u32` body length; then the bodies, concatenated. A body is a kind byte and
//! either the record's JSON or the compact record ([`encode_compact`]). Still read: format 1
//! (no layout, bodies are bare JSON), and a value that starts with `{`, one layout-2 record
//! stored under its own id, read as a page of one.

use std::sync::Arc;

use super::recorded::{self, FeatureLayout, RecordedFeatures};
use super::{ScoreRecord, ShadowScore};

/// The first byte of a page value as written now.
pub const PAGE_FORMAT: u8 = 2;
/// Format 1: JSON records with no kind byte and no layout (read only).
const PAGE_FORMAT_JSON: u8 = 1;
/// Records per page at most.
pub const PAGE_RECORDS: usize = 64;
/// A page's record bodies stay within this many bytes (a record larger than that gets a page
/// of its own), so 17 pages fit in a node sled writes inline.
pub const PAGE_BYTES: usize = 7 * 1024;

const KIND_JSON: u8 = 0;
const KIND_COMPACT: u8 = 1;

#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum PageError {
    #[error("score page is truncated or malformed")]
    Malformed,
    #[error("score page format {0} is unknown")]
    UnknownFormat(u8),
    #[error("a score id of {0} bytes is longer than a page allows (255)")]
    IdTooLong(usize),
    #[error("a score record in a page is damaged: {0}")]
    Record(String),
}

/// One record's stored bytes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum StoredRecord<'a> {
    /// The record as JSON.
    Json(&'a [u8]),
    /// A compact record, read with its page's layout.
    Compact(&'a [u8]),
}

impl StoredRecord<'_> {
    fn body_len(&self) -> usize {
        match self {
            StoredRecord::Json(b) | StoredRecord::Compact(b) => 1 + b.len(),
        }
    }

    fn write_body(&self, out: &mut Vec<u8>) {
        let (kind, bytes) = match self {
            StoredRecord::Json(b) => (KIND_JSON, b),
            StoredRecord::Compact(b) => (KIND_COMPACT, b),
        };
        out.push(kind);
        out.extend_from_slice(bytes);
    }
}

/// A parsed page: its layout's bytes and its records' ids and bytes, in id order, borrowed
/// from the value.
#[derive(Debug)]
pub struct PageView<'a> {
    layout: &'a [u8],
    entries: Vec<(&'a str, StoredRecord<'a>)>,
}

impl<'a> PageView<'a> {
    /// Reads the page stored under `key`.
    pub fn parse(key: &'a [u8], value: &'a [u8]) -> Result<PageView<'a>, PageError> {
        match value.first() {
            Some(b'{') => {
                let id = std::str::from_utf8(key).map_err(|_| PageError::Malformed)?;
                Ok(PageView {
                    layout: &[],
                    entries: vec![(id, StoredRecord::Json(value))],
                })
            }
            Some(&PAGE_FORMAT_JSON) => parse_page(value, false),
            Some(&PAGE_FORMAT) => parse_page(value, true),
            Some(&other) => Err(PageError::UnknownFormat(other)),
            None => Err(PageError::Malformed),
        }
    }

    pub fn len(&self) -> usize {
        self.entries.len()
    }

    pub fn is_empty(&self) -> bool {
        self.entries.is_empty()
    }

    /// The id of the `i`th record.
    pub fn id(&self, i: usize) -> &'a str {
        self.entries[i].0
    }

    /// The stored bytes of the record with this id.
    pub fn get(&self, id: &str) -> Option<StoredRecord<'a>> {
        self.entries
            .binary_search_by(|(stored, _)| (*stored).cmp(id))
            .ok()
            .map(|i| self.entries[i].1)
    }

    /// Records as (id, stored bytes), in id order.
    pub fn entries(&self) -> &[(&'a str, StoredRecord<'a>)] {
        &self.entries
    }

    /// The bytes of the layout its compact records are read with (empty when it has none).
    pub fn layout_bytes(&self) -> &'a [u8] {
        self.layout
    }

    /// The page holding this page's records from the `i`th on, under the same layout.
    pub fn rewrite_from(&self, i: usize) -> Result<Vec<u8>, PageError> {
        encode(self.layout, &self.entries[i..])
    }
}

/// Bytes read off the front of a stored value.
struct Cursor<'a> {
    bytes: &'a [u8],
    at: usize,
}

impl<'a> Cursor<'a> {
    fn take(&mut self, n: usize) -> Option<&'a [u8]> {
        let taken = self.bytes.get(self.at..self.at.checked_add(n)?)?;
        self.at += n;
        Some(taken)
    }

    fn byte(&mut self) -> Option<u8> {
        Some(self.take(1)?[0])
    }

    fn u16(&mut self) -> Option<usize> {
        Some(u16::from_le_bytes(self.take(2)?.try_into().ok()?) as usize)
    }

    fn u32(&mut self) -> Option<usize> {
        Some(u32::from_le_bytes(self.take(4)?.try_into().ok()?) as usize)
    }

    fn u64(&mut self) -> Option<u64> {
        Some(u64::from_le_bytes(self.take(8)?.try_into().ok()?))
    }

    fn str(&mut self, n: usize) -> Option<&'a str> {
        std::str::from_utf8(self.take(n)?).ok()
    }

    fn rest(&mut self) -> &'a [u8] {
        let rest = &self.bytes[self.at..];
        self.at = self.bytes.len();
        rest
    }
}

fn parse_page(value: &[u8], with_kinds: bool) -> Result<PageView<'_>, PageError> {
    read_page(value, with_kinds).ok_or(PageError::Malformed)
}

fn read_page(value: &[u8], with_kinds: bool) -> Option<PageView<'_>> {
    let mut cursor = Cursor {
        bytes: value,
        at: 1,
    };
    let layout = if with_kinds {
        let len = cursor.u32()?;
        cursor.take(len)?
    } else {
        &[]
    };
    let count = cursor.u32()?;
    // Every record needs at least 5 header bytes; a count beyond that is corruption, not a
    // reason to allocate.
    if count > value.len() / 5 {
        return None;
    }
    let mut index = Vec::with_capacity(count);
    for _ in 0..count {
        let id_len = cursor.byte()? as usize;
        let id = cursor.str(id_len)?;
        index.push((id, cursor.u32()?));
    }
    let mut entries = Vec::with_capacity(count);
    for (id, len) in index {
        let body = cursor.take(len)?;
        let stored = if with_kinds {
            match body.split_first()? {
                (&KIND_JSON, json) => StoredRecord::Json(json),
                (&KIND_COMPACT, compact) => StoredRecord::Compact(compact),
                _ => return None,
            }
        } else {
            StoredRecord::Json(body)
        };
        entries.push((id, stored));
    }
    if cursor.at != value.len() || entries.windows(2).any(|w| w[0].0 >= w[1].0) {
        return None;
    }
    Some(PageView { layout, entries })
}

/// Encodes records, given as (id, stored bytes) in increasing id order, as one page whose
/// compact records are read with `layout` (a [`FeatureLayout`]'s bytes, or empty).
pub fn encode(layout: &[u8], records: &[(&str, StoredRecord<'_>)]) -> Result<Vec<u8>, PageError> {
    let header: usize = records.iter().map(|(id, _)| 5 + id.len()).sum();
    let body: usize = records.iter().map(|(_, r)| r.body_len()).sum();
    let mut out = Vec::with_capacity(9 + layout.len() + header + body);
    out.push(PAGE_FORMAT);
    out.extend_from_slice(&(layout.len() as u32).to_le_bytes());
    out.extend_from_slice(layout);
    out.extend_from_slice(&(records.len() as u32).to_le_bytes());
    for (id, record) in records {
        let id_len = u8::try_from(id.len()).map_err(|_| PageError::IdTooLong(id.len()))?;
        out.push(id_len);
        out.extend_from_slice(id.as_bytes());
        out.extend_from_slice(&(record.body_len() as u32).to_le_bytes());
    }
    for (_, record) in records {
        record.write_body(&mut out);
    }
    Ok(out)
}

/// Splits records (in id order) into runs that each make one page: at most [`PAGE_RECORDS`]
/// records, and within [`PAGE_BYTES`] of bodies unless one record alone is larger.
pub fn split<'r, 'b>(
    records: &'r [(&'b str, StoredRecord<'b>)],
) -> impl Iterator<Item = &'r [(&'b str, StoredRecord<'b>)]> {
    let mut rest = records;
    std::iter::from_fn(move || {
        if rest.is_empty() {
            return None;
        }
        let mut bytes = 0;
        let mut n = 0;
        while n < rest.len()
            && n < PAGE_RECORDS
            && (n == 0 || bytes + rest[n].1.body_len() <= PAGE_BYTES)
        {
            bytes += rest[n].1.body_len();
            n += 1;
        }
        let (page, tail) = rest.split_at(n);
        rest = tail;
        Some(page)
    })
}

/// Flags of a compact record.
const HAS_REFERENCE: u8 = 1;
const HAS_SHADOW: u8 = 2;
const CANDIDATE_ANSWERED: u8 = 4;

/// Appends `record` as a compact record read with `layout`: its time, model id, flags,
/// output, reference and other model's output when it has them, then its feature values as
/// words (the id is the page's). `false`, with nothing appended, when the record cannot be one:
/// its features are text or have another layout, or a string is longer than its length field.
pub fn encode_compact(
    record: &ScoreRecord,
    layout: &Arc<FeatureLayout>,
    out: &mut Vec<u8>,
) -> bool {
    let RecordedFeatures::Values {
        values,
        layout: own,
    } = &record.features
    else {
        return false;
    };
    let short = |s: &str| u8::try_from(s.len()).ok();
    let (Some(model_len), true) = (
        short(&record.model_id),
        Arc::ptr_eq(own, layout) || own == layout,
    ) else {
        return false;
    };
    let reference_len = match &record.reference {
        Some(r) => match u16::try_from(r.len()) {
            Ok(n) => Some(n),
            Err(_) => return false,
        },
        None => None,
    };
    let shadow_len = match &record.shadow {
        Some(s) => match short(&s.model_id) {
            Some(n) => Some(n),
            None => return false,
        },
        None => None,
    };
    let start = out.len();
    out.extend_from_slice(&record.at.to_le_bytes());
    out.push(model_len);
    out.extend_from_slice(record.model_id.as_bytes());
    let flags = reference_len.map_or(0, |_| HAS_REFERENCE)
        | shadow_len.map_or(0, |_| HAS_SHADOW)
        | if record.candidate_answered {
            CANDIDATE_ANSWERED
        } else {
            0
        };
    out.push(flags);
    out.extend_from_slice(&record.output.to_le_bytes());
    if let (Some(len), Some(reference)) = (reference_len, &record.reference) {
        out.extend_from_slice(&len.to_le_bytes());
        out.extend_from_slice(reference.as_bytes());
    }
    if let (Some(len), Some(shadow)) = (shadow_len, &record.shadow) {
        out.push(len);
        out.extend_from_slice(shadow.model_id.as_bytes());
        out.extend_from_slice(&shadow.output.to_le_bytes());
    }
    if recorded::encode_values(values, out).is_none() {
        out.truncate(start);
        return false;
    }
    true
}

/// Reads a stored record back; a compact one needs its page's layout.
pub fn decode(
    id: &str,
    stored: StoredRecord<'_>,
    layout: Option<&Arc<FeatureLayout>>,
) -> Result<ScoreRecord, PageError> {
    match stored {
        StoredRecord::Json(json) => {
            serde_json::from_slice(json).map_err(|e| PageError::Record(e.to_string()))
        }
        StoredRecord::Compact(bytes) => {
            let layout = layout.ok_or(PageError::Record(
                "a compact record in a page without a layout".into(),
            ))?;
            decode_compact(id, bytes, layout).ok_or(PageError::Malformed)
        }
    }
}

fn decode_compact(id: &str, bytes: &[u8], layout: &Arc<FeatureLayout>) -> Option<ScoreRecord> {
    let mut cursor = Cursor { bytes, at: 0 };
    let at = cursor.u64()? as i64;
    let model_len = cursor.byte()? as usize;
    let model_id = cursor.str(model_len)?.to_owned();
    let flags = cursor.byte()?;
    if flags & !(HAS_REFERENCE | HAS_SHADOW | CANDIDATE_ANSWERED) != 0 {
        return None;
    }
    let output = f64::from_bits(cursor.u64()?);
    let reference = if flags & HAS_REFERENCE != 0 {
        let len = cursor.u16()?;
        Some(cursor.str(len)?.to_owned())
    } else {
        None
    };
    let shadow = if flags & HAS_SHADOW != 0 {
        let len = cursor.byte()? as usize;
        let model_id = cursor.str(len)?.to_owned();
        let output = f64::from_bits(cursor.u64()?);
        Some(ShadowScore { model_id, output })
    } else {
        None
    };
    let values = recorded::decode_values(cursor.rest(), layout)?;
    Some(ScoreRecord {
        score_id: id.to_owned(),
        at,
        model_id,
        reference,
        features: RecordedFeatures::Values {
            values,
            layout: Arc::clone(layout),
        },
        output,
        shadow,
        candidate_answered: flags & CANDIDATE_ANSWERED != 0,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::schema::{Row, Value};

    fn records(n: usize) -> Vec<(String, Vec<u8>)> {
        (0..n)
            .map(|i| (format!("id{i:04}"), format!(r#"{{"n":{i}}}"#).into_bytes()))
            .collect()
    }

    fn as_json(owned: &[(String, Vec<u8>)]) -> Vec<(&str, StoredRecord<'_>)> {
        owned
            .iter()
            .map(|(i, j)| (i.as_str(), StoredRecord::Json(j.as_slice())))
            .collect()
    }

    #[test]
    fn a_page_reads_back_every_record_by_id_and_nothing_else() {
        let owned = records(40);
        let mut stored = as_json(&owned);
        stored[7].1 = StoredRecord::Compact(b"\x01\x02");
        let page = encode(b"LAYOUT", &stored).unwrap();
        let view = PageView::parse(b"id0000", &page).unwrap();
        assert_eq!(view.len(), 40);
        assert_eq!(view.layout_bytes(), b"LAYOUT");
        for (id, record) in &stored {
            assert_eq!(view.get(id), Some(*record), "{id}");
        }
        assert_eq!(view.get("id0040"), None);
        assert_eq!(view.get("id00005"), None);
        assert_eq!(view.entries(), stored.as_slice());
        // Compaction's rewrite keeps the layout and the later records.
        let rest = view.rewrite_from(30).unwrap();
        let rest = PageView::parse(b"id0030", &rest).unwrap();
        assert_eq!(rest.layout_bytes(), b"LAYOUT");
        assert_eq!(rest.entries(), &stored[30..]);
    }

    #[test]
    fn pages_of_format_1_and_layout_2_records_still_read() {
        let view = PageView::parse(b"01ABC", br#"{"score_id":"01ABC"}"#).unwrap();
        assert_eq!(view.len(), 1);
        assert_eq!(view.id(0), "01ABC");
        assert_eq!(
            view.get("01ABC"),
            Some(StoredRecord::Json(&br#"{"score_id":"01ABC"}"#[..]))
        );
        // Format 1, as written before compact records: no layout, no kind bytes.
        let mut old = vec![1u8];
        old.extend_from_slice(&2u32.to_le_bytes());
        for id in ["a", "b"] {
            old.push(1);
            old.extend_from_slice(id.as_bytes());
            old.extend_from_slice(&2u32.to_le_bytes());
        }
        old.extend_from_slice(b"{}[]");
        let view = PageView::parse(b"a", &old).unwrap();
        assert_eq!(view.layout_bytes(), b"");
        assert_eq!(view.get("a"), Some(StoredRecord::Json(b"{}")));
        assert_eq!(view.get("b"), Some(StoredRecord::Json(b"[]")));
        // Rewritten by compaction, it becomes format 2.
        let rewritten = view.rewrite_from(1).unwrap();
        assert_eq!(rewritten[0], PAGE_FORMAT);
        assert_eq!(
            PageView::parse(b"b", &rewritten).unwrap().get("b"),
            Some(StoredRecord::Json(b"[]"))
        );
    }

    #[test]
    fn damaged_pages_are_errors_not_panics() {
        let owned = records(3);
        let page = encode(b"L", &as_json(&owned)).unwrap();
        for cut in 0..page.len() {
            assert!(PageView::parse(b"k", &page[..cut]).is_err(), "cut at {cut}");
        }
        let mut longer = page.clone();
        longer.push(b'x');
        assert_eq!(
            PageView::parse(b"k", &longer).unwrap_err(),
            PageError::Malformed
        );
        let mut huge_count = page.clone();
        huge_count[6..10].copy_from_slice(&u32::MAX.to_le_bytes());
        assert_eq!(
            PageView::parse(b"k", &huge_count).unwrap_err(),
            PageError::Malformed
        );
        let mut unknown_kind = page;
        let last_body = unknown_kind.len() - owned[2].1.len() - 1;
        unknown_kind[last_body] = 9;
        assert_eq!(
            PageView::parse(b"k", &unknown_kind).unwrap_err(),
            PageError::Malformed
        );
        assert_eq!(
            PageView::parse(b"k", &[9]).unwrap_err(),
            PageError::UnknownFormat(9)
        );
        // Ids out of order would break the lookup's binary search.
        let swapped = encode(
            &[],
            &[
                ("b", StoredRecord::Json(b"{}")),
                ("a", StoredRecord::Json(b"{}")),
            ],
        )
        .unwrap();
        assert_eq!(
            PageView::parse(b"b", &swapped).unwrap_err(),
            PageError::Malformed
        );
    }

    #[test]
    fn batches_split_by_count_and_by_bytes() {
        let owned = records(PAGE_RECORDS * 2 + 5);
        let sizes: Vec<usize> = split(&as_json(&owned)).map(|p| p.len()).collect();
        assert_eq!(sizes, vec![PAGE_RECORDS, PAGE_RECORDS, 5]);
        // Each body is one kind byte longer than its record.
        let half = vec![b'x'; PAGE_BYTES / 2 - 1];
        let over = vec![b'x'; PAGE_BYTES];
        let mixed: Vec<(&str, StoredRecord)> = vec![
            ("a", StoredRecord::Json(&half)),
            ("b", StoredRecord::Compact(&half)),
            ("c", StoredRecord::Json(&half)),
            ("d", StoredRecord::Json(&over)),
            ("e", StoredRecord::Json(b"{}")),
        ];
        let sizes: Vec<usize> = split(&mixed).map(|p| p.len()).collect();
        assert_eq!(sizes, vec![2, 1, 1, 1]);
    }

    proptest::proptest! {
        #![proptest_config(proptest::test_runner::Config::with_cases(64))]

        /// Whatever bytes a damaged store hands back, reading them is an answer, never a panic.
        #[test]
        fn any_bytes_read_as_a_page_or_an_error(
            bytes in proptest::collection::vec(proptest::prelude::any::<u8>(), 0..600),
        ) {
            let _ = PageView::parse(b"k", &bytes);
            for format in [PAGE_FORMAT_JSON, PAGE_FORMAT] {
                let mut page = bytes.clone();
                page.insert(0, format);
                let _ = PageView::parse(b"k", &page);
            }
            let layout = Arc::new(layout());
            let _ = decode("k", StoredRecord::Compact(&bytes), Some(&layout));
        }

        /// Any records in id order split into pages that, read back, give every record under
        /// its own id, in order, within the page limits.
        #[test]
        fn records_split_and_read_back_whole(
            records in proptest::collection::btree_map(
                "[0-9A-Z]{1,26}",
                (proptest::prelude::any::<bool>(),
                 proptest::collection::vec(proptest::prelude::any::<u8>(), 0..3000)),
                0..200,
            ),
        ) {
            let owned: Vec<(String, bool, Vec<u8>)> =
                records.into_iter().map(|(id, (c, b))| (id, c, b)).collect();
            let all: Vec<(&str, StoredRecord)> = owned
                .iter()
                .map(|(id, compact, bytes)| {
                    let stored = if *compact {
                        StoredRecord::Compact(bytes.as_slice())
                    } else {
                        StoredRecord::Json(bytes.as_slice())
                    };
                    (id.as_str(), stored)
                })
                .collect();
            let mut seen = Vec::new();
            for page in split(&all) {
                proptest::prop_assert!(!page.is_empty() && page.len() <= PAGE_RECORDS);
                let bytes: usize = page.iter().map(|(_, r)| r.body_len()).sum();
                proptest::prop_assert!(page.len() == 1 || bytes <= PAGE_BYTES);
                let encoded = encode(b"layout", page).unwrap();
                let view = PageView::parse(page[0].0.as_bytes(), &encoded).unwrap();
                for (id, record) in page {
                    proptest::prop_assert_eq!(view.get(id), Some(*record));
                }
                seen.extend(view.entries().iter().map(|(id, r)| {
                    let (compact, bytes) = match r {
                        StoredRecord::Json(b) => (false, b.to_vec()),
                        StoredRecord::Compact(b) => (true, b.to_vec()),
                    };
                    (id.to_string(), compact, bytes)
                }));
            }
            proptest::prop_assert_eq!(seen, owned);
        }
    }

    #[test]
    fn an_id_longer_than_255_bytes_is_refused() {
        let id = "x".repeat(256);
        assert_eq!(
            encode(&[], &[(id.as_str(), StoredRecord::Json(b"{}"))]).unwrap_err(),
            PageError::IdTooLong(256)
        );
    }

    fn layout() -> FeatureLayout {
        FeatureLayout::from_bytes(
            br#"{"names":["amount","channel"],"categories":[[],["web","branch"]]}"#,
        )
        .unwrap()
    }

    fn values_record(layout: &Arc<FeatureLayout>) -> ScoreRecord {
        ScoreRecord {
            score_id: "01JCOMPACT".into(),
            at: 1_800_000_000_123,
            model_id: "m-7-0a1b2c3d".into(),
            reference: Some("application 42 ✓".into()),
            features: RecordedFeatures::Values {
                values: Row::from(vec![Value::Number(-1250.25), Value::Category(1)]),
                layout: Arc::clone(layout),
            },
            output: 0.8125,
            shadow: Some(ShadowScore {
                model_id: "m-8-ffffffff".into(),
                output: 0.25,
            }),
            candidate_answered: true,
        }
    }

    /// The record as its JSON, the form every reader compares by.
    fn json(record: &ScoreRecord) -> serde_json::Value {
        serde_json::to_value(record).unwrap()
    }

    #[test]
    fn a_compact_record_reads_back_as_the_record_written() {
        let layout = Arc::new(layout());
        let mut record = values_record(&layout);
        for (reference, shadow, candidate_answered) in [
            (record.reference.clone(), record.shadow.clone(), true),
            (None, None, false),
        ] {
            record.reference = reference;
            record.shadow = shadow;
            record.candidate_answered = candidate_answered;
            let mut bytes = Vec::new();
            assert!(encode_compact(&record, &layout, &mut bytes));
            let back = decode(
                &record.score_id,
                StoredRecord::Compact(&bytes),
                Some(&layout),
            )
            .unwrap();
            assert_eq!(json(&back), json(&record));
            assert_eq!(
                serde_json::to_string(&back.features).unwrap(),
                r#"{"amount":-1250.25,"channel":"branch"}"#
            );
            // Every cut of it is an error, not a panic nor a shorter record.
            for cut in 0..bytes.len() {
                assert!(
                    decode("k", StoredRecord::Compact(&bytes[..cut]), Some(&layout)).is_err(),
                    "cut at {cut}"
                );
            }
        }
    }

    #[test]
    fn records_that_cannot_be_compact_are_left_to_json() {
        let layout = Arc::new(layout());
        let mut out = Vec::new();
        let mut text = values_record(&layout);
        text.features = serde_json::value::RawValue::from_string(r#"{"amount":1}"#.into())
            .unwrap()
            .into();
        assert!(!encode_compact(&text, &layout, &mut out));
        let other_layout = Arc::new(
            FeatureLayout::from_bytes(br#"{"names":["a","b"],"categories":[[],[]]}"#).unwrap(),
        );
        assert!(!encode_compact(
            &values_record(&layout),
            &other_layout,
            &mut out
        ));
        let mut long_model = values_record(&layout);
        long_model.model_id = "m".repeat(256);
        assert!(!encode_compact(&long_model, &layout, &mut out));
        assert!(out.is_empty(), "nothing appended for a refused record");
        // A compact record needs its page's layout.
        let mut bytes = Vec::new();
        assert!(encode_compact(&values_record(&layout), &layout, &mut bytes));
        assert!(decode("k", StoredRecord::Compact(&bytes), None).is_err());
    }
}
