//! Score pages in append-only segment files, the `scores` tree keeping a small pointer per
//! page.
//!
//! Why: sled logs every write of a tree node, rewrites a leaf whole after ten updates or when
//! it splits, and moves live data out of old segments. Score pages arrive in key order, so
//! every batch landed in the rightmost leaf and was written several times over: under
//! `wrk -t2 -c64` the service wrote 1,757 bytes per score for records of about 330 bytes, and
//! sled's I/O threads plus `apply_batch` took 18 % of its CPU (`BENCHMARKS.md`). Appended to a
//! file, a page is written once; the tree then holds a 25-byte pointer per page.
//!
//! A segment file is named by its sequence number (`0000000000000007.seg`) and holds frames:
//! a little-endian `u32` length, the CRC-32 of the page, the page (`score_pages`). Only the
//! recorder appends (under the store's score lock), so frames are in id order and a segment
//! below the first one any pointer names holds nothing live: compaction deletes it.
//!
//! Crashes: a frame is appended before its pointer is inserted, so a crash in between leaves
//! bytes no pointer names. sled flushes its own log every 200 ms and syncs; segments are synced
//! at least as often by the writer (and before any outcome is made durable), but a power cut
//! can still leave a durable pointer to a frame that did not reach the disk. Such a frame is
//! short or fails its checksum: the page reads as absent (a warning is logged), the way sled
//! itself loses the writes of its last flush interval.

use std::collections::HashMap;
use std::fs::File;
use std::io::Write;
use std::os::unix::fs::FileExt;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use crate::threads::lock;

/// The first byte of a `scores` value that points into the log (page values start with their
/// format, `0x01`, `0x02` or `{`).
pub(super) const POINTER_TAG: u8 = 0xF5;
const POINTER_BYTES: usize = 1 + 8 + 8 + 4 + 4;
const FRAME_HEADER: usize = 8;
/// A segment is closed once it holds this much.
const SEGMENT_BYTES: u64 = 64 << 20;
/// The writer syncs the open segment when this long has passed since its last sync.
const SYNC_EVERY: Duration = Duration::from_millis(200);

/// Where a page lives: its segment, offset and length, and how many records it holds (so the
/// store counts records when it opens without reading every page).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) struct Pointer {
    pub(super) segment: u64,
    pub(super) offset: u64,
    pub(super) len: u32,
    pub(super) records: u32,
}

impl Pointer {
    pub(super) fn encode(&self) -> [u8; POINTER_BYTES] {
        let mut out = [0u8; POINTER_BYTES];
        out[0] = POINTER_TAG;
        out[1..9].copy_from_slice(&self.segment.to_le_bytes());
        out[9..17].copy_from_slice(&self.offset.to_le_bytes());
        out[17..21].copy_from_slice(&self.len.to_le_bytes());
        out[21..25].copy_from_slice(&self.records.to_le_bytes());
        out
    }

    /// A pointer value, or `None` for a value that is not one (a page stored inline).
    pub(super) fn decode(value: &[u8]) -> Option<Pointer> {
        if value.len() != POINTER_BYTES || value[0] != POINTER_TAG {
            return None;
        }
        let u64_at = |i: usize| u64::from_le_bytes(value[i..i + 8].try_into().unwrap());
        let u32_at = |i: usize| u32::from_le_bytes(value[i..i + 4].try_into().unwrap());
        Some(Pointer {
            segment: u64_at(1),
            offset: u64_at(9),
            len: u32_at(17),
            records: u32_at(21),
        })
    }
}

struct Writer {
    segment: u64,
    file: Option<File>,
    len: u64,
    unsynced: bool,
    last_sync: Instant,
}

/// The segment files of one store.
pub(super) struct ScoreLog {
    dir: PathBuf,
    writer: Mutex<Writer>,
    /// Open segments for reading, by number (a deleted segment's handle stays readable
    /// until dropped).
    readers: Mutex<HashMap<u64, Arc<File>>>,
}

fn segment_name(segment: u64) -> String {
    format!("{segment:016}.seg")
}

fn segment_number(path: &Path) -> Option<u64> {
    let name = path.file_name()?.to_str()?;
    let digits = name.strip_suffix(".seg")?;
    (digits.len() == 16).then(|| digits.parse().ok())?
}

impl ScoreLog {
    /// Opens (creating) the log in `dir`. Appends go to a new segment after the highest one
    /// found, so a torn tail of the last run is never appended to.
    pub(super) fn open(dir: &Path) -> std::io::Result<ScoreLog> {
        std::fs::create_dir_all(dir)?;
        let highest = Self::segments_in(dir)?.into_iter().max();
        Ok(ScoreLog {
            dir: dir.to_owned(),
            writer: Mutex::new(Writer {
                segment: highest.map_or(0, |h| h + 1),
                file: None,
                len: 0,
                unsynced: false,
                last_sync: Instant::now(),
            }),
            readers: Mutex::new(HashMap::new()),
        })
    }

    /// Makes appends go to a segment above `segment`, one a pointer names: a segment whose
    /// file is gone (a deleted data file, a damaged disk) must not be reused under the same
    /// number, or its old pointers would name new bytes.
    pub(super) fn append_after(&self, segment: u64) {
        let mut writer = lock(&self.writer);
        if writer.file.is_none() && writer.segment <= segment {
            writer.segment = segment + 1;
        }
    }

    pub(super) fn segments_in(dir: &Path) -> std::io::Result<Vec<u64>> {
        let mut found = Vec::new();
        for entry in std::fs::read_dir(dir)? {
            if let Some(n) = segment_number(&entry?.path()) {
                found.push(n);
            }
        }
        Ok(found)
    }

    fn path(&self, segment: u64) -> PathBuf {
        self.dir.join(segment_name(segment))
    }

    /// Appends pages (each with its record count) in one write and returns their pointers.
    pub(super) fn append(&self, pages: &[(Vec<u8>, u32)]) -> std::io::Result<Vec<Pointer>> {
        let mut writer = lock(&self.writer);
        if writer.file.is_none() || writer.len >= SEGMENT_BYTES {
            if writer.file.take().is_some() {
                writer.segment += 1;
            }
            let file = std::fs::OpenOptions::new()
                .create(true)
                .append(true)
                .open(self.path(writer.segment))?;
            writer.len = file.metadata()?.len();
            writer.file = Some(file);
            // The new name must survive a crash along with what is written to it.
            File::open(&self.dir)?.sync_all()?;
        }
        let total: usize = pages.iter().map(|(p, _)| p.len() + FRAME_HEADER).sum();
        let mut bytes = Vec::with_capacity(total);
        let mut pointers = Vec::with_capacity(pages.len());
        for (page, records) in pages {
            let len = u32::try_from(page.len()).map_err(|_| {
                std::io::Error::new(std::io::ErrorKind::InvalidInput, "a score page over 4 GiB")
            })?;
            pointers.push(Pointer {
                segment: writer.segment,
                offset: writer.len + (bytes.len() + FRAME_HEADER) as u64,
                len,
                records: *records,
            });
            bytes.extend_from_slice(&len.to_le_bytes());
            bytes.extend_from_slice(&crc32fast::hash(page).to_le_bytes());
            bytes.extend_from_slice(page);
        }
        let file = writer.file.as_mut().expect("opened above");
        if let Err(e) = file.write_all(&bytes) {
            // A partial frame may be on disk: the next append starts a new segment.
            writer.file = None;
            writer.segment += 1;
            return Err(e);
        }
        writer.len += bytes.len() as u64;
        writer.unsynced = true;
        if writer.last_sync.elapsed() >= SYNC_EVERY {
            Self::sync_writer(&mut writer)?;
        }
        Ok(pointers)
    }

    fn sync_writer(writer: &mut Writer) -> std::io::Result<()> {
        if let (true, Some(file)) = (writer.unsynced, writer.file.as_ref()) {
            file.sync_data()?;
        }
        writer.unsynced = false;
        writer.last_sync = Instant::now();
        Ok(())
    }

    /// Makes every page appended so far durable.
    pub(super) fn sync(&self) -> std::io::Result<()> {
        Self::sync_writer(&mut lock(&self.writer))
    }

    /// The page a pointer names, or `None` if its frame is missing, short or damaged (see the
    /// module's note on crashes) or its segment was deleted meanwhile.
    pub(super) fn read(&self, pointer: &Pointer) -> std::io::Result<Option<Vec<u8>>> {
        let file = {
            let mut readers = lock(&self.readers);
            match readers.get(&pointer.segment) {
                Some(file) => Arc::clone(file),
                None => match File::open(self.path(pointer.segment)) {
                    Ok(file) => {
                        let file = Arc::new(file);
                        readers.insert(pointer.segment, Arc::clone(&file));
                        file
                    }
                    Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
                        tracing::warn!(
                            segment = pointer.segment,
                            "a score page's segment is missing"
                        );
                        return Ok(None);
                    }
                    Err(e) => return Err(e),
                },
            }
        };
        let mut frame = vec![0u8; FRAME_HEADER + pointer.len as usize];
        let start = pointer.offset - FRAME_HEADER as u64;
        match file.read_exact_at(&mut frame, start) {
            Ok(()) => {}
            Err(e) if e.kind() == std::io::ErrorKind::UnexpectedEof => {
                tracing::warn!(
                    segment = pointer.segment,
                    offset = pointer.offset,
                    "a score page is cut short (lost in a crash)"
                );
                return Ok(None);
            }
            Err(e) => return Err(e),
        }
        let len = u32::from_le_bytes(frame[0..4].try_into().unwrap());
        let crc = u32::from_le_bytes(frame[4..8].try_into().unwrap());
        let page = frame.split_off(FRAME_HEADER);
        if len != pointer.len || crc32fast::hash(&page) != crc {
            tracing::warn!(
                segment = pointer.segment,
                offset = pointer.offset,
                "a score page fails its checksum (lost in a crash)"
            );
            return Ok(None);
        }
        Ok(Some(page))
    }

    /// Deletes the segments below `segment` (never the one being appended to). Returns how
    /// many went.
    pub(super) fn remove_below(&self, segment: u64) -> std::io::Result<usize> {
        let current = lock(&self.writer).segment;
        let mut removed = 0;
        for n in Self::segments_in(&self.dir)? {
            if n < segment.min(current) {
                lock(&self.readers).remove(&n);
                match std::fs::remove_file(self.path(n)) {
                    Ok(()) => removed += 1,
                    Err(e) if e.kind() == std::io::ErrorKind::NotFound => {}
                    Err(e) => return Err(e),
                }
            }
        }
        Ok(removed)
    }

    /// Deletes every segment; appends continue in a new one.
    pub(super) fn clear(&self) -> std::io::Result<()> {
        let mut writer = lock(&self.writer);
        if writer.file.take().is_some() {
            writer.segment += 1;
        }
        writer.unsynced = false;
        lock(&self.readers).clear();
        for n in Self::segments_in(&self.dir)? {
            std::fs::remove_file(self.path(n))?;
        }
        Ok(())
    }

    /// Bytes the segment files take.
    pub(super) fn size(&self) -> std::io::Result<u64> {
        let mut total = 0;
        for n in Self::segments_in(&self.dir)? {
            total += std::fs::metadata(self.path(n))?.len();
        }
        Ok(total)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn pages(n: usize) -> Vec<(Vec<u8>, u32)> {
        (0..n)
            .map(|i| (vec![i as u8; 100 + i * 37], i as u32 + 1))
            .collect()
    }

    #[test]
    fn appended_pages_read_back_through_their_pointers_after_a_reopen() {
        let dir = tempfile::tempdir().unwrap();
        let log = ScoreLog::open(dir.path()).unwrap();
        let first = log.append(&pages(3)).unwrap();
        let second = log.append(&pages(2)).unwrap();
        drop(log);
        let log = ScoreLog::open(dir.path()).unwrap();
        for (pointer, (page, records)) in first.iter().zip(pages(3)) {
            assert_eq!(Pointer::decode(&pointer.encode()), Some(*pointer));
            assert_eq!(pointer.records, records);
            assert_eq!(log.read(pointer).unwrap(), Some(page));
        }
        assert_eq!(log.read(&second[1]).unwrap(), Some(pages(2)[1].0.clone()));
        // Appends after a reopen go to a new segment.
        let third = log.append(&pages(1)).unwrap();
        assert!(third[0].segment > second[0].segment);
        assert_eq!(log.read(&third[0]).unwrap(), Some(pages(1)[0].0.clone()));
    }

    #[test]
    fn a_torn_or_damaged_frame_reads_as_absent_not_as_an_error() {
        let dir = tempfile::tempdir().unwrap();
        let log = ScoreLog::open(dir.path()).unwrap();
        let pointers = log.append(&pages(2)).unwrap();
        let path = log.path(pointers[0].segment);
        // One flipped byte inside the first page: its checksum no longer matches.
        let mut bytes = std::fs::read(&path).unwrap();
        bytes[pointers[0].offset as usize + 5] ^= 0xFF;
        // The second page cut short, as a crash before the data reached the disk leaves it.
        bytes.truncate(pointers[1].offset as usize + 10);
        std::fs::write(&path, &bytes).unwrap();
        let log = ScoreLog::open(dir.path()).unwrap();
        assert_eq!(log.read(&pointers[0]).unwrap(), None);
        assert_eq!(log.read(&pointers[1]).unwrap(), None);
    }

    #[test]
    fn only_segments_below_the_first_live_one_are_removed() {
        let dir = tempfile::tempdir().unwrap();
        let mut pointers = Vec::new();
        for _ in 0..3 {
            // A reopen starts a new segment: three segments.
            let log = ScoreLog::open(dir.path()).unwrap();
            pointers.push(log.append(&pages(1)).unwrap()[0]);
        }
        let log = ScoreLog::open(dir.path()).unwrap();
        assert_eq!(log.remove_below(pointers[1].segment).unwrap(), 1);
        assert_eq!(log.read(&pointers[0]).unwrap(), None);
        assert!(log.read(&pointers[1]).unwrap().is_some());
        assert!(log.read(&pointers[2]).unwrap().is_some());
        log.clear().unwrap();
        assert_eq!(log.size().unwrap(), 0);
        let after = log.append(&pages(1)).unwrap();
        assert!(log.read(&after[0]).unwrap().is_some());
    }

    #[test]
    fn a_segment_number_a_pointer_names_is_not_reused_when_its_file_is_gone() {
        let dir = tempfile::tempdir().unwrap();
        let log = ScoreLog::open(dir.path()).unwrap();
        let lost = log.append(&pages(1)).unwrap()[0];
        std::fs::remove_file(log.path(lost.segment)).unwrap();
        let log = ScoreLog::open(dir.path()).unwrap();
        log.append_after(lost.segment);
        let next = log.append(&pages(1)).unwrap()[0];
        assert!(next.segment > lost.segment);
        assert_eq!(log.read(&lost).unwrap(), None);
        assert!(log.read(&next).unwrap().is_some());
    }

    #[test]
    fn a_value_that_is_a_page_is_not_taken_for_a_pointer() {
        assert_eq!(Pointer::decode(&[2, 0, 0, 0]), None);
        assert_eq!(Pointer::decode(b"{\"score_id\":\"x\"}"), None);
        let mut almost = Pointer {
            segment: 1,
            offset: 8,
            len: 3,
            records: 1,
        }
        .encode();
        almost[0] = 2;
        assert_eq!(Pointer::decode(&almost), None);
    }
}
