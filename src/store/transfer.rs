//! Moving a whole store: from one backend to another (`store copy`), out to a portable JSON
//! Lines file (`store export`) and back into an empty store (`store import`), each checked by
//! counts and a digest per table (`portable::TableDigest`).
//!
//! Everything streams in pages of a bounded size: no table is held in memory whole. A copy
//! digests the source's records as it reads them, writes them to the target, then reads the
//! target back and digests it the same way; any difference is an error. Sources should be
//! quiet while they are read (a sled data dir is locked against a running server anyway; a
//! PostgreSQL store with live replicas would move under the copy, and the check would say so).
//!
//! The file: one JSON object per line. The first line is the header (format, format version,
//! the store layout its records follow, counts per table), then one [`RawRecord`] per line,
//! table by table, then a trailer with the counts and digests. An import reads the whole file
//! once to check every line and the trailer before it writes anything, so a damaged file is
//! refused with its line number and leaves the target untouched.

use std::collections::BTreeMap;
use std::io::{BufRead, Write};

use serde::{Deserialize, Serialize};

use super::portable::{RawRecord, Table, TableDigest};
use super::{Store, StoreError, LAYOUT_VERSION};

/// The file's name for itself, in the header and the trailer.
pub const FILE_FORMAT: &str = "understudy-store";
/// The version of the file's own layout (header, records, trailer).
pub const FILE_FORMAT_VERSION: u32 = 1;
/// How the digests are made (`portable::TableDigest`).
pub const DIGEST_METHOD: &str = "sha256-sum-v1";
/// Records per page read and per write, unless told otherwise.
pub const DEFAULT_BATCH: usize = 1_000;

#[derive(Debug, thiserror::Error)]
pub enum TransferError {
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("the target already holds data ({0}); copy into an empty store, or pass --replace to erase it first")]
    TargetNotEmpty(String),
    #[error("the target does not match the source: {0}")]
    Mismatch(String),
    #[error("line {line}: {reason}")]
    Line { line: u64, reason: String },
    #[error("the file is refused: {0}")]
    File(String),
    #[error("{context}: {source}")]
    Io {
        context: String,
        source: std::io::Error,
    },
}

fn io_error(context: &str) -> impl FnOnce(std::io::Error) -> TransferError + '_ {
    move |source| TransferError::Io {
        context: context.to_owned(),
        source,
    }
}

/// What a long transfer tells whoever watches it (the CLI's progress bar).
pub trait Progress {
    /// A new phase of `total` records begins.
    fn phase(&self, what: &str, total: u64);
    fn advance(&self, records: u64);
}

/// No one is watching.
pub struct Quiet;

impl Progress for Quiet {
    fn phase(&self, _: &str, _: u64) {}
    fn advance(&self, _: u64) {}
}

pub type Digests = BTreeMap<Table, TableDigest>;

/// One table's check: counts and digests on both sides.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TableCheck {
    pub table: Table,
    pub source_count: u64,
    pub target_count: u64,
    pub source_digest: String,
    pub target_digest: String,
    pub matches: bool,
}

/// Every table's check, in [`Table::ALL`] order.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Report {
    pub tables: Vec<TableCheck>,
}

impl Report {
    fn compare(source: &Digests, target: &Digests) -> Report {
        let tables = Table::ALL
            .iter()
            .map(|&table| {
                let s = source.get(&table).copied().unwrap_or_default();
                let t = target.get(&table).copied().unwrap_or_default();
                TableCheck {
                    table,
                    source_count: s.count,
                    target_count: t.count,
                    source_digest: s.hex(table),
                    target_digest: t.hex(table),
                    matches: s.hex(table) == t.hex(table),
                }
            })
            .collect();
        Report { tables }
    }

    pub fn records(&self) -> u64 {
        self.tables.iter().map(|t| t.source_count).sum()
    }

    /// `Ok` when every table matches; otherwise [`TransferError::Mismatch`] naming them.
    pub fn check(&self) -> Result<(), TransferError> {
        let bad: Vec<String> = self
            .tables
            .iter()
            .filter(|t| !t.matches)
            .map(|t| {
                format!(
                    "{} ({} records and digest {} in the source, {} and {} in the target)",
                    t.table,
                    t.source_count,
                    &t.source_digest[..16],
                    t.target_count,
                    &t.target_digest[..16]
                )
            })
            .collect();
        if bad.is_empty() {
            Ok(())
        } else {
            Err(TransferError::Mismatch(bad.join("; ")))
        }
    }
}

/// Records per table, as the store counts them.
pub fn counts(store: &dyn Store) -> Result<BTreeMap<Table, u64>, TransferError> {
    let mut counts = BTreeMap::new();
    for table in Table::ALL {
        counts.insert(table, store.table_len(table)?);
    }
    Ok(counts)
}

/// Calls `each` with every page of every table, in [`Table::ALL`] order.
pub fn read_all(
    store: &dyn Store,
    batch: usize,
    mut each: impl FnMut(Table, Vec<RawRecord>) -> Result<(), TransferError>,
) -> Result<(), TransferError> {
    for table in Table::ALL {
        let mut after = None;
        loop {
            let page = store.records_page(table, after.as_ref(), batch)?;
            if !page.records.is_empty() {
                each(table, page.records)?;
            }
            match page.next {
                Some(next) => after = Some(next),
                None => break,
            }
        }
    }
    Ok(())
}

/// Every table's digest, reading the whole store once.
pub fn digest(
    store: &dyn Store,
    batch: usize,
    progress: &dyn Progress,
) -> Result<Digests, TransferError> {
    let mut digests = Digests::new();
    read_all(store, batch, |table, records| {
        let d = digests.entry(table).or_default();
        for r in &records {
            d.add(r);
        }
        progress.advance(records.len() as u64);
        Ok(())
    })?;
    Ok(digests)
}

/// Refuses a target that holds any record, or, with `replace`, erases it first.
pub fn prepare_target(target: &dyn Store, replace: bool) -> Result<(), TransferError> {
    let held = |counts: &BTreeMap<Table, u64>| -> Vec<String> {
        counts
            .iter()
            .filter(|(_, &n)| n > 0)
            .map(|(t, n)| format!("{t}: {n}"))
            .collect()
    };
    let found = held(&counts(target)?);
    if found.is_empty() {
        return Ok(());
    }
    if !replace {
        return Err(TransferError::TargetNotEmpty(found.join(", ")));
    }
    target.erase_all_records()?;
    let left = held(&counts(target)?);
    if left.is_empty() {
        Ok(())
    } else {
        Err(TransferError::Mismatch(format!(
            "records left after erasing the target: {}",
            left.join(", ")
        )))
    }
}

/// How a copy or an import writes.
#[derive(Debug, Clone, Copy)]
pub struct Options {
    /// Records per page read and per write.
    pub batch: usize,
    /// Erase a target that holds data instead of refusing it.
    pub replace: bool,
}

impl Default for Options {
    fn default() -> Self {
        Options {
            batch: DEFAULT_BATCH,
            replace: false,
        }
    }
}

/// Copies every record of `from` into `to` (empty, or erased with `replace`), then reads
/// `to` back and compares counts and digests. The report says what was compared; call
/// [`Report::check`] for the verdict.
pub fn copy(
    from: &dyn Store,
    to: &dyn Store,
    options: Options,
    progress: &dyn Progress,
) -> Result<Report, TransferError> {
    let batch = options.batch.max(1);
    let total: u64 = counts(from)?.values().sum();
    prepare_target(to, options.replace)?;
    progress.phase("copying", total);
    let mut source = Digests::new();
    read_all(from, batch, |table, records| {
        let d = source.entry(table).or_default();
        for r in &records {
            d.add(r);
        }
        to.restore_records(&records)?;
        progress.advance(records.len() as u64);
        Ok(())
    })?;
    progress.phase("verifying the target", total);
    let target = digest(to, batch, progress)?;
    Ok(Report::compare(&source, &target))
}

/// The file's first line.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Header {
    pub format: String,
    pub format_version: u32,
    /// The store layout the records' JSON follows (`store::LAYOUT_VERSION`).
    pub layout: u32,
    /// The backend the records came from (`sled`, `postgres`): for people, not checked.
    pub source: String,
    pub exported_at: String,
    pub digest: String,
    /// Records per table name.
    pub counts: BTreeMap<String, u64>,
}

/// The file's last line.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Trailer {
    /// Always [`FILE_FORMAT`]: tells the trailer from a record.
    pub end: String,
    pub counts: BTreeMap<String, u64>,
    /// Each table's digest, hex.
    pub digests: BTreeMap<String, String>,
}

fn by_name<T: Copy>(map: &BTreeMap<Table, T>) -> BTreeMap<String, T> {
    map.iter().map(|(t, v)| (t.name().to_owned(), *v)).collect()
}

/// Writes every record of `from` to `out` as JSON Lines, with its header and trailer.
/// `source` names the backend for the header. Returns the trailer written.
pub fn export(
    from: &dyn Store,
    source: &str,
    out: &mut dyn Write,
    batch: usize,
    progress: &dyn Progress,
) -> Result<Trailer, TransferError> {
    let batch = batch.max(1);
    let expected = counts(from)?;
    let header = Header {
        format: FILE_FORMAT.to_owned(),
        format_version: FILE_FORMAT_VERSION,
        layout: LAYOUT_VERSION,
        source: source.to_owned(),
        exported_at: crate::time::to_rfc3339(crate::time::now_ms()),
        digest: DIGEST_METHOD.to_owned(),
        counts: by_name(&expected),
    };
    let write_line = |out: &mut dyn Write, line: &str| -> Result<(), TransferError> {
        out.write_all(line.as_bytes())
            .and_then(|()| out.write_all(b"\n"))
            .map_err(io_error("writing the export"))
    };
    write_line(
        out,
        &serde_json::to_string(&header).expect("a header serializes"),
    )?;
    progress.phase("exporting", expected.values().sum());
    let mut digests = Digests::new();
    read_all(from, batch, |table, records| {
        let d = digests.entry(table).or_default();
        for r in &records {
            let line = r.canonical_line();
            d.add_line(line.as_bytes());
            write_line(out, &line)?;
        }
        progress.advance(records.len() as u64);
        Ok(())
    })?;
    let actual: BTreeMap<Table, u64> = Table::ALL
        .iter()
        .map(|&t| (t, digests.get(&t).map_or(0, |d| d.count)))
        .collect();
    if actual != expected {
        return Err(TransferError::Mismatch(format!(
            "the store changed during the export (counts {:?} before, {:?} read); stop the service and export again",
            by_name(&expected),
            by_name(&actual)
        )));
    }
    let trailer = Trailer {
        end: FILE_FORMAT.to_owned(),
        counts: by_name(&actual),
        digests: Table::ALL
            .iter()
            .map(|&t| {
                (
                    t.name().to_owned(),
                    digests.get(&t).copied().unwrap_or_default().hex(t),
                )
            })
            .collect(),
    };
    write_line(
        out,
        &serde_json::to_string(&trailer).expect("a trailer serializes"),
    )?;
    out.flush().map_err(io_error("writing the export"))?;
    Ok(trailer)
}

/// What a file's full read found: its header and its trailer, both checked.
#[derive(Debug, Clone, PartialEq)]
pub struct FileSummary {
    pub header: Header,
    pub trailer: Trailer,
}

impl FileSummary {
    pub fn records(&self) -> u64 {
        self.trailer.counts.values().sum()
    }
}

/// An export's lines, numbered from 1.
struct Lines<'a> {
    input: &'a mut dyn BufRead,
    text: String,
    number: u64,
}

impl Lines<'_> {
    /// The next line (in `self.text`, without its line end) and its number.
    fn next(&mut self) -> Result<Option<u64>, TransferError> {
        self.text.clear();
        let n = self
            .input
            .read_line(&mut self.text)
            .map_err(io_error("reading the export"))?;
        if n == 0 {
            return Ok(None);
        }
        self.number += 1;
        if self.text.ends_with('\n') {
            self.text.pop();
            if self.text.ends_with('\r') {
                self.text.pop();
            }
        }
        Ok(Some(self.number))
    }
}

/// Reads an export from `input` line by line, checks every line and the trailer, and hands
/// each record (with its line number) to `each`. Errors name the line.
pub fn scan(
    input: &mut dyn BufRead,
    progress: &dyn Progress,
    mut each: impl FnMut(u64, RawRecord) -> Result<(), TransferError>,
) -> Result<FileSummary, TransferError> {
    let mut lines = Lines {
        input,
        text: String::new(),
        number: 0,
    };
    let line_error = |line: u64, reason: String| TransferError::Line { line, reason };

    let Some(first) = lines.next()? else {
        return Err(TransferError::File("the file is empty".into()));
    };
    let header: Header = serde_json::from_str(&lines.text).map_err(|e| {
        line_error(
            first,
            format!("not the header of an understudy store export: {e}"),
        )
    })?;
    if header.format != FILE_FORMAT {
        return Err(line_error(
            first,
            format!("the format is `{}`, not `{FILE_FORMAT}`", header.format),
        ));
    }
    if header.format_version != FILE_FORMAT_VERSION {
        return Err(line_error(
            first,
            format!(
                "format version {} is not one this binary reads ({FILE_FORMAT_VERSION})",
                header.format_version
            ),
        ));
    }
    if header.layout > LAYOUT_VERSION {
        return Err(line_error(
            first,
            format!(
                "the records follow store layout {}, newer than this binary's {LAYOUT_VERSION}; upgrade understudy",
                header.layout
            ),
        ));
    }
    if header.digest != DIGEST_METHOD {
        return Err(line_error(
            first,
            format!("digest method `{}` is not `{DIGEST_METHOD}`", header.digest),
        ));
    }
    progress.phase("reading", header.counts.values().sum());

    let mut digests = Digests::new();
    let mut last_score: Option<String> = None;
    let trailer = loop {
        let Some(line) = lines.next()? else {
            return Err(TransferError::File(format!(
                "the file ends after line {} without its trailer: it was cut short",
                lines.number
            )));
        };
        let record: RawRecord = match serde_json::from_str(&lines.text) {
            Ok(record) => record,
            Err(record_error) => match serde_json::from_str::<Trailer>(&lines.text) {
                Ok(trailer) if trailer.end == FILE_FORMAT => break trailer,
                _ => {
                    return Err(line_error(
                        line,
                        format!("not a store record: {record_error}"),
                    ))
                }
            },
        };
        record
            .columns()
            .map_err(|e| line_error(line, e.to_string()))?;
        if record.table == Table::Scores {
            if let Some(last) = last_score.as_deref().filter(|l| record.key.as_str() <= *l) {
                return Err(line_error(
                    line,
                    format!(
                        "score `{}` comes after `{last}`; score records must be in increasing id order",
                        record.key
                    ),
                ));
            }
            last_score = Some(record.key.clone());
        }
        digests.entry(record.table).or_default().add(&record);
        each(line, record)?;
        progress.advance(1);
    };
    while let Some(line) = lines.next()? {
        if !lines.text.trim().is_empty() {
            return Err(line_error(line, "text after the trailer".into()));
        }
    }
    for table in Table::ALL {
        let found = digests.get(&table).copied().unwrap_or_default();
        let name = table.name();
        let said_count = trailer.counts.get(name).copied();
        if said_count != Some(found.count) {
            return Err(TransferError::File(format!(
                "the trailer counts {said_count:?} {name} records, the file holds {}",
                found.count
            )));
        }
        if header.counts.get(name).copied() != Some(found.count) {
            return Err(TransferError::File(format!(
                "the header counts {:?} {name} records, the file holds {}",
                header.counts.get(name),
                found.count
            )));
        }
        let hex = found.hex(table);
        if trailer.digests.get(name) != Some(&hex) {
            return Err(TransferError::File(format!(
                "the {name} records digest to {hex}, the trailer says {}: the file was changed after it was written",
                trailer.digests.get(name).map_or("nothing", String::as_str)
            )));
        }
    }
    if let Some(extra) = trailer
        .counts
        .keys()
        .chain(trailer.digests.keys())
        .find(|name| !Table::ALL.iter().any(|t| t.name() == name.as_str()))
    {
        return Err(TransferError::File(format!(
            "the trailer names a table `{extra}` this binary does not know"
        )));
    }
    Ok(FileSummary { header, trailer })
}

/// Imports an export into `to` (empty, or erased with `replace`): reads the file once to check
/// it whole (`open` is called twice, once per read), writes it in batches on the second read,
/// then reads the target back and compares it with the file's trailer.
pub fn import(
    open: &dyn Fn() -> Result<Box<dyn BufRead>, TransferError>,
    to: &dyn Store,
    options: Options,
    progress: &dyn Progress,
) -> Result<(FileSummary, Report), TransferError> {
    let batch = options.batch.max(1);
    let checked = scan(&mut *open()?, progress, |_, _| Ok(()))?;
    prepare_target(to, options.replace)?;
    let mut pending: Vec<RawRecord> = Vec::with_capacity(batch);
    let write = |pending: &mut Vec<RawRecord>| -> Result<(), TransferError> {
        if !pending.is_empty() {
            to.restore_records(pending)?;
            pending.clear();
        }
        Ok(())
    };
    // Every line passed the check above, so what fails here is the target (a store error).
    let written = scan(&mut *open()?, progress, |_, record| {
        if pending.len() >= batch || pending.first().is_some_and(|p| p.table != record.table) {
            write(&mut pending)?;
        }
        pending.push(record);
        Ok(())
    })?;
    write(&mut pending)?;
    if written != checked {
        return Err(TransferError::File(
            "the file changed between its check and its import".into(),
        ));
    }
    progress.phase("verifying the target", checked.records());
    let target = digest(to, batch, progress)?;
    let tables = Table::ALL
        .iter()
        .map(|&table| {
            let t = target.get(&table).copied().unwrap_or_default();
            let name = table.name();
            let source_digest = checked.trailer.digests[name].clone();
            let target_digest = t.hex(table);
            TableCheck {
                table,
                source_count: checked.trailer.counts[name],
                target_count: t.count,
                matches: source_digest == target_digest,
                source_digest,
                target_digest,
            }
        })
        .collect();
    Ok((checked, Report { tables }))
}

#[cfg(test)]
mod tests;
