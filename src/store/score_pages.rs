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
//! A page's value: byte 0 is [`PAGE_FORMAT`]; a little-endian `u32` count; per record a `u8`
//! id length, the id and a little-endian `u32` record length; then the records' JSON,
//! concatenated. A value that starts with `{` is one layout-2 record stored under its own id,
//! read as a page of one.

/// The first byte of a page value (a layout-2 record starts with `{`).
pub const PAGE_FORMAT: u8 = 1;
/// Records per page at most.
pub const PAGE_RECORDS: usize = 64;
/// A page's records' JSON stays within this many bytes (a record larger than that gets a page
/// of its own), so 17 pages fit in a node sled writes inline.
pub const PAGE_BYTES: usize = 7 * 1024;

#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum PageError {
    #[error("score page is truncated or malformed")]
    Malformed,
    #[error("score page format {0} is unknown")]
    UnknownFormat(u8),
    #[error("a score id of {0} bytes is longer than a page allows (255)")]
    IdTooLong(usize),
}

/// A parsed page: its records' ids and JSON, in id order, borrowed from the value.
#[derive(Debug)]
pub struct PageView<'a> {
    entries: Vec<(&'a str, &'a [u8])>,
}

impl<'a> PageView<'a> {
    /// Reads the page stored under `key`.
    pub fn parse(key: &'a [u8], value: &'a [u8]) -> Result<PageView<'a>, PageError> {
        match value.first() {
            Some(b'{') => {
                let id = std::str::from_utf8(key).map_err(|_| PageError::Malformed)?;
                Ok(PageView {
                    entries: vec![(id, value)],
                })
            }
            Some(&PAGE_FORMAT) => parse_page(value),
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

    /// The JSON of the record with this id.
    pub fn get(&self, id: &str) -> Option<&'a [u8]> {
        self.entries
            .binary_search_by(|(stored, _)| (*stored).cmp(id))
            .ok()
            .map(|i| self.entries[i].1)
    }

    /// Records as (id, JSON), in id order.
    pub fn entries(&self) -> &[(&'a str, &'a [u8])] {
        &self.entries
    }
}

fn parse_page(value: &[u8]) -> Result<PageView<'_>, PageError> {
    let mut at = 1;
    let mut take = |n: usize| -> Result<&[u8], PageError> {
        let bytes = value.get(at..at + n).ok_or(PageError::Malformed)?;
        at += n;
        Ok(bytes)
    };
    let count = u32::from_le_bytes(take(4)?.try_into().expect("4 bytes")) as usize;
    // Every record needs at least 5 header bytes; a count beyond that is corruption, not a
    // reason to allocate.
    if count > value.len() / 5 {
        return Err(PageError::Malformed);
    }
    let mut index = Vec::with_capacity(count);
    for _ in 0..count {
        let id_len = take(1)?[0] as usize;
        let id = std::str::from_utf8(take(id_len)?).map_err(|_| PageError::Malformed)?;
        let len = u32::from_le_bytes(take(4)?.try_into().expect("4 bytes")) as usize;
        index.push((id, len));
    }
    let mut entries = Vec::with_capacity(count);
    for (id, len) in index {
        entries.push((id, take(len)?));
    }
    if at != value.len() || entries.windows(2).any(|w| w[0].0 >= w[1].0) {
        return Err(PageError::Malformed);
    }
    Ok(PageView { entries })
}

/// Encodes records, given as (id, JSON) in increasing id order, as one page.
pub fn encode<'r>(records: &[(&'r str, &'r [u8])]) -> Result<Vec<u8>, PageError> {
    let header: usize = records.iter().map(|(id, _)| 5 + id.len()).sum();
    let body: usize = records.iter().map(|(_, json)| json.len()).sum();
    let mut out = Vec::with_capacity(5 + header + body);
    out.push(PAGE_FORMAT);
    out.extend_from_slice(&(records.len() as u32).to_le_bytes());
    for (id, json) in records {
        let id_len = u8::try_from(id.len()).map_err(|_| PageError::IdTooLong(id.len()))?;
        out.push(id_len);
        out.extend_from_slice(id.as_bytes());
        out.extend_from_slice(&(json.len() as u32).to_le_bytes());
    }
    for (_, json) in records {
        out.extend_from_slice(json);
    }
    Ok(out)
}

/// Splits records (in id order) into runs that each make one page: at most [`PAGE_RECORDS`]
/// records, and within [`PAGE_BYTES`] of JSON unless one record alone is larger.
pub fn split<'r>(
    records: &'r [(&'r str, &'r [u8])],
) -> impl Iterator<Item = &'r [(&'r str, &'r [u8])]> {
    let mut rest = records;
    std::iter::from_fn(move || {
        if rest.is_empty() {
            return None;
        }
        let mut bytes = 0;
        let mut n = 0;
        while n < rest.len()
            && n < PAGE_RECORDS
            && (n == 0 || bytes + rest[n].1.len() <= PAGE_BYTES)
        {
            bytes += rest[n].1.len();
            n += 1;
        }
        let (page, tail) = rest.split_at(n);
        rest = tail;
        Some(page)
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn records(n: usize) -> Vec<(String, Vec<u8>)> {
        (0..n)
            .map(|i| (format!("id{i:04}"), format!(r#"{{"n":{i}}}"#).into_bytes()))
            .collect()
    }

    fn borrowed(owned: &[(String, Vec<u8>)]) -> Vec<(&str, &[u8])> {
        owned
            .iter()
            .map(|(i, j)| (i.as_str(), j.as_slice()))
            .collect()
    }

    #[test]
    fn a_page_reads_back_every_record_by_id_and_nothing_else() {
        let owned = records(40);
        let page = encode(&borrowed(&owned)).unwrap();
        let view = PageView::parse(b"id0000", &page).unwrap();
        assert_eq!(view.len(), 40);
        for (id, json) in &owned {
            assert_eq!(view.get(id), Some(json.as_slice()), "{id}");
        }
        assert_eq!(view.get("id0040"), None);
        assert_eq!(view.get("id00005"), None);
        assert_eq!(view.entries(), borrowed(&owned).as_slice());
    }

    #[test]
    fn a_layout_2_record_reads_as_a_page_of_one_under_its_key() {
        let view = PageView::parse(b"01ABC", br#"{"score_id":"01ABC"}"#).unwrap();
        assert_eq!(view.len(), 1);
        assert_eq!(view.id(0), "01ABC");
        assert_eq!(view.get("01ABC"), Some(&br#"{"score_id":"01ABC"}"#[..]));
    }

    #[test]
    fn damaged_pages_are_errors_not_panics() {
        let owned = records(3);
        let page = encode(&borrowed(&owned)).unwrap();
        for cut in 0..page.len() {
            assert!(PageView::parse(b"k", &page[..cut]).is_err(), "cut at {cut}");
        }
        let mut longer = page.clone();
        longer.push(b'x');
        assert_eq!(
            PageView::parse(b"k", &longer).unwrap_err(),
            PageError::Malformed
        );
        let mut huge_count = page;
        huge_count[1..5].copy_from_slice(&u32::MAX.to_le_bytes());
        assert_eq!(
            PageView::parse(b"k", &huge_count).unwrap_err(),
            PageError::Malformed
        );
        assert_eq!(
            PageView::parse(b"k", &[9]).unwrap_err(),
            PageError::UnknownFormat(9)
        );
        // Ids out of order would break the lookup's binary search.
        let swapped = encode(&[("b", b"{}".as_slice()), ("a", b"{}".as_slice())]).unwrap();
        assert_eq!(
            PageView::parse(b"b", &swapped).unwrap_err(),
            PageError::Malformed
        );
    }

    #[test]
    fn batches_split_by_count_and_by_bytes() {
        let owned = records(PAGE_RECORDS * 2 + 5);
        let sizes: Vec<usize> = split(&borrowed(&owned)).map(|p| p.len()).collect();
        assert_eq!(sizes, vec![PAGE_RECORDS, PAGE_RECORDS, 5]);
        let half = vec![b'x'; PAGE_BYTES / 2];
        let over = vec![b'x'; PAGE_BYTES + 1];
        let mixed: Vec<(&str, &[u8])> = vec![
            ("a", &half),
            ("b", &half),
            ("c", &half),
            ("d", &over),
            ("e", b"{}"),
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
            let mut page = bytes.clone();
            page.insert(0, PAGE_FORMAT);
            let _ = PageView::parse(b"k", &page);
        }

        /// Any records in id order split into pages that, read back, give every record under
        /// its own id, in order, within the page limits.
        #[test]
        fn records_split_and_read_back_whole(
            records in proptest::collection::btree_map(
                "[0-9A-Z]{1,26}",
                proptest::collection::vec(proptest::prelude::any::<u8>(), 0..3000),
                0..200,
            ),
        ) {
            let owned: Vec<(String, Vec<u8>)> = records.into_iter().collect();
            let all = borrowed(&owned);
            let mut seen = Vec::new();
            for page in split(&all) {
                proptest::prop_assert!(!page.is_empty() && page.len() <= PAGE_RECORDS);
                let bytes: usize = page.iter().map(|(_, json)| json.len()).sum();
                proptest::prop_assert!(page.len() == 1 || bytes <= PAGE_BYTES);
                let encoded = encode(page).unwrap();
                let view = PageView::parse(page[0].0.as_bytes(), &encoded).unwrap();
                for (id, json) in page {
                    proptest::prop_assert_eq!(view.get(id), Some(*json));
                }
                seen.extend(view.entries().iter().map(|(id, json)| (id.to_string(), json.to_vec())));
            }
            proptest::prop_assert_eq!(seen, owned);
        }
    }

    #[test]
    fn an_id_longer_than_255_bytes_is_refused() {
        let id = "x".repeat(256);
        assert_eq!(
            encode(&[(id.as_str(), b"{}".as_slice())]).unwrap_err(),
            PageError::IdTooLong(256)
        );
    }
}
