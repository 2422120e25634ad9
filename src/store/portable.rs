//! A store's data as backend-neutral records, so a whole store can move between sled and
//! PostgreSQL, or out to a file and back, and be checked on arrival.
//!
//! Every backend reads its tables out as [`RawRecord`]s, a page at a time in its own key
//! order ([`Store::records_page`](super::Store::records_page)), and writes them back into an
//! empty store ([`Store::restore_records`](super::Store::restore_records)). A record keeps the
//! stored JSON text byte for byte (both backends store the same serde JSON for the same value),
//! so a copy is exact and the same record digests the same on either side.
//!
//! What is a table here is what the store *holds*, not how a backend indexes it: sled's
//! `example_ids` and layout 2's `outcomes` rows are indexes rebuilt from the examples on
//! restore (see `sled_store::portable`), and the write probe (`check_writable`'s last
//! timestamp) is a liveness marker, not data, so neither is exported.
//!
//! [`TableDigest`] is order-independent: the SHA-256 of each record's canonical line, summed
//! modulo 2^256, then hashed once more with the table's name and count. Two backends that
//! page in different orders (sled's examples by event time, PostgreSQL's by id) digest the
//! same records to the same value.

use serde::{Deserialize, Serialize};
use serde_json::value::RawValue;
use sha2::{Digest, Sha256};

use crate::promotion::RunState;
use crate::time::Millis;

/// A kind of record a store holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Table {
    /// Named counters (`Store::next_seq`), the promotion log's `log` among them.
    Counters,
    /// The activation history, the shadow state and the freeze.
    Meta,
    Models,
    Runs,
    /// The promotion log.
    Log,
    /// Score records.
    Scores,
    /// Labeled examples: backfilled rows, and the examples outcomes made of their scores.
    Examples,
    /// A shadowing candidate's rows that have their outcome.
    Shadowed,
}

impl Table {
    /// Every table, in the order a copy writes them.
    pub const ALL: [Table; 8] = [
        Table::Counters,
        Table::Meta,
        Table::Models,
        Table::Runs,
        Table::Log,
        Table::Scores,
        Table::Examples,
        Table::Shadowed,
    ];

    pub fn name(self) -> &'static str {
        match self {
            Table::Counters => "counters",
            Table::Meta => "meta",
            Table::Models => "models",
            Table::Runs => "runs",
            Table::Log => "log",
            Table::Scores => "scores",
            Table::Examples => "examples",
            Table::Shadowed => "shadowed",
        }
    }
}

impl std::fmt::Display for Table {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.name())
    }
}

/// The `meta` keys that are data (the write probe is not).
pub const META_KEYS: [&str; 3] = ["active_history", "shadow", "freeze"];

/// One stored record, as any backend holds it.
///
/// `key` is the record's key in its table: a counter's name, a meta key, a model, run, score
/// or example id, a log entry's sequence in decimal, a shadowing candidate's id (with the
/// score id in `score_id`). `value` is the stored JSON text as it is (a counter's value is
/// its number).
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawRecord {
    pub table: Table,
    pub key: String,
    /// Only for `shadowed`: the score id under the candidate.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub score_id: Option<String>,
    pub value: Box<RawValue>,
}

impl PartialEq for RawRecord {
    fn eq(&self, other: &Self) -> bool {
        self.table == other.table
            && self.key == other.key
            && self.score_id == other.score_id
            && self.value.get() == other.value.get()
    }
}

/// Where the next page of a table starts: opaque, made by the backend that read the last page.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct PageCursor(pub(crate) Vec<u8>);

/// One page of a table's records.
#[derive(Debug, Default)]
pub struct RecordPage {
    pub records: Vec<RawRecord>,
    /// Where the next page starts; `None` when the table has no more records.
    pub next: Option<PageCursor>,
}

/// A record that does not hold what its table needs.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{table} record `{key}`: {reason}")]
pub struct RecordError {
    pub table: Table,
    pub key: String,
    pub reason: String,
}

/// The columns a backend needs beside the JSON text, read out of a record (and checked
/// against its key, so a record edited by hand cannot land under another id).
#[derive(Debug, Clone, PartialEq)]
pub enum Columns<'a> {
    Counter {
        value: u64,
    },
    Meta,
    Model {
        created_at: Millis,
    },
    Run {
        finished: bool,
    },
    Log {
        seq: u64,
    },
    Score {
        at: Millis,
    },
    Example {
        event_time: Millis,
        label: f64,
        /// When the outcome that made this example arrived (layout 3 outcomes carry it).
        outcome_at: Option<Millis>,
    },
    Shadowed {
        score_id: &'a str,
    },
}

#[derive(Deserialize)]
struct ModelFields {
    id: String,
    #[serde(with = "crate::time::rfc3339")]
    created_at: Millis,
}

#[derive(Deserialize)]
struct RunFields {
    run_id: String,
    state: RunState,
}

#[derive(Deserialize)]
struct LogFields {
    seq: u64,
}

#[derive(Deserialize)]
struct ScoreFields {
    score_id: String,
    at: Millis,
}

#[derive(Deserialize)]
struct ExampleFields {
    id: String,
    event_time: Millis,
    label: f64,
    #[serde(default)]
    outcome_at: Option<Millis>,
}

#[derive(Deserialize)]
struct ShadowedFields {
    #[allow(dead_code)]
    active: f64,
    #[allow(dead_code)]
    candidate: f64,
    #[allow(dead_code)]
    label: f64,
}

impl RawRecord {
    /// A record from stored JSON text; [`RecordError`] when the text is not JSON.
    pub fn new(
        table: Table,
        key: String,
        score_id: Option<String>,
        json: String,
    ) -> Result<RawRecord, RecordError> {
        match RawValue::from_string(json) {
            Ok(value) => Ok(RawRecord {
                table,
                key,
                score_id,
                value,
            }),
            Err(e) => Err(RecordError {
                table,
                key,
                reason: format!("the stored value is not JSON: {e}"),
            }),
        }
    }

    fn error(&self, reason: impl Into<String>) -> RecordError {
        RecordError {
            table: self.table,
            key: self.key.clone(),
            reason: reason.into(),
        }
    }

    fn parse<'a, T: Deserialize<'a>>(&'a self) -> Result<T, RecordError> {
        serde_json::from_str(self.value.get()).map_err(|e| self.error(e.to_string()))
    }

    /// The columns this record's table needs, checked against its key.
    pub fn columns(&self) -> Result<Columns<'_>, RecordError> {
        if self.table != Table::Shadowed && self.score_id.is_some() {
            return Err(self.error("`score_id` belongs to shadowed records only"));
        }
        let same = |field: &str, found: &str| {
            if found == self.key {
                Ok(())
            } else {
                Err(self.error(format!("its `{field}` is `{found}`, not the key")))
            }
        };
        match self.table {
            Table::Counters => {
                let value = self
                    .value
                    .get()
                    .parse::<u64>()
                    .map_err(|_| self.error("a counter's value must be a whole number"))?;
                if value > i64::MAX as u64 {
                    return Err(self.error("the counter is too large"));
                }
                Ok(Columns::Counter { value })
            }
            Table::Meta => {
                if !META_KEYS.contains(&self.key.as_str()) {
                    return Err(self.error(format!("not a meta key (one of {META_KEYS:?})")));
                }
                Ok(Columns::Meta)
            }
            Table::Models => {
                let fields: ModelFields = self.parse()?;
                same("id", &fields.id)?;
                Ok(Columns::Model {
                    created_at: fields.created_at,
                })
            }
            Table::Runs => {
                let fields: RunFields = self.parse()?;
                same("run_id", &fields.run_id)?;
                Ok(Columns::Run {
                    finished: fields.state == RunState::Finished,
                })
            }
            Table::Log => {
                let fields: LogFields = self.parse()?;
                same("seq", &fields.seq.to_string())?;
                if fields.seq > i64::MAX as u64 {
                    return Err(self.error("the sequence is too large"));
                }
                Ok(Columns::Log { seq: fields.seq })
            }
            Table::Scores => {
                let fields: ScoreFields = self.parse()?;
                same("score_id", &fields.score_id)?;
                Ok(Columns::Score { at: fields.at })
            }
            Table::Examples => {
                let fields: ExampleFields = self.parse()?;
                same("id", &fields.id)?;
                if !fields.label.is_finite() {
                    return Err(self.error("the label is not a finite number"));
                }
                Ok(Columns::Example {
                    event_time: fields.event_time,
                    label: fields.label,
                    outcome_at: fields.outcome_at,
                })
            }
            Table::Shadowed => {
                let _: ShadowedFields = self.parse()?;
                match &self.score_id {
                    Some(score_id) if !score_id.is_empty() && !score_id.contains('\0') => {
                        if self.key.contains('\0') {
                            return Err(self.error("a candidate id cannot hold a NUL"));
                        }
                        Ok(Columns::Shadowed { score_id })
                    }
                    _ => Err(self.error("a shadowed record needs its `score_id`")),
                }
            }
        }
    }

    /// The record's canonical bytes: its JSON line as `store export` writes it (the value's
    /// stored text unchanged).
    pub fn canonical_line(&self) -> String {
        serde_json::to_string(self).expect("a raw record serializes")
    }
}

/// An order-independent digest of one table's records.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct TableDigest {
    pub count: u64,
    /// The records' SHA-256 values as big-endian numbers, summed modulo 2^256.
    sum: [u8; 32],
}

impl TableDigest {
    pub fn add(&mut self, record: &RawRecord) {
        self.add_line(record.canonical_line().as_bytes());
    }

    /// Adds one record given as its canonical line.
    pub fn add_line(&mut self, line: &[u8]) {
        let hash = Sha256::digest(line);
        let mut carry = 0u16;
        for i in (0..32).rev() {
            let total = u16::from(self.sum[i]) + u16::from(hash[i]) + carry;
            self.sum[i] = (total & 0xff) as u8;
            carry = total >> 8;
        }
        self.count += 1;
    }

    /// The digest as hex: SHA-256 over a version tag, the table's name, the count and the sum.
    pub fn hex(&self, table: Table) -> String {
        let mut hasher = Sha256::new();
        hasher.update(b"understudy table digest v1\0");
        hasher.update(table.name().as_bytes());
        hasher.update([0]);
        hasher.update(self.count.to_be_bytes());
        hasher.update(self.sum);
        hasher
            .finalize()
            .iter()
            .map(|b| format!("{b:02x}"))
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rec(table: Table, key: &str, json: &str) -> RawRecord {
        RawRecord::new(table, key.into(), None, json.into()).unwrap()
    }

    #[test]
    fn the_digest_ignores_order_but_not_content_count_or_table() {
        let a = rec(Table::Counters, "log", "3");
        let b = rec(Table::Counters, "model", "7");
        let mut forward = TableDigest::default();
        forward.add(&a);
        forward.add(&b);
        let mut backward = TableDigest::default();
        backward.add(&b);
        backward.add(&a);
        assert_eq!(forward.hex(Table::Counters), backward.hex(Table::Counters));
        let mut changed = TableDigest::default();
        changed.add(&a);
        changed.add(&rec(Table::Counters, "model", "8"));
        assert_ne!(forward.hex(Table::Counters), changed.hex(Table::Counters));
        // The same record twice is not the same as once (a sum, not an exclusive or).
        let mut once = TableDigest::default();
        once.add(&a);
        let mut twice = once;
        twice.add(&a);
        twice.add(&a);
        assert_ne!(once.hex(Table::Counters), twice.hex(Table::Counters));
        assert_ne!(forward.hex(Table::Counters), forward.hex(Table::Meta));
        assert_eq!(TableDigest::default().hex(Table::Log).len(), 64);
    }

    #[test]
    fn the_digest_is_the_documented_construction() {
        // Computed independently with Python 3.11.7's hashlib from the construction in the
        // module docs: s = sum of sha256(line) mod 2^256 over the two lines, then
        // sha256(b"understudy table digest v1\0" + b"counters" + b"\0" + (2).to_bytes(8, "big")
        // + s.to_bytes(32, "big")).hexdigest(). (The same script agrees with every table of a
        // demo store's export.)
        let mut digest = TableDigest::default();
        digest.add(&rec(Table::Counters, "log", "3"));
        digest.add(&rec(Table::Counters, "model", "7"));
        assert_eq!(
            digest.hex(Table::Counters),
            "417ae2aded1bbf860706b3dc7ec4af5ad76331c73913113dbec7ad79018a232e"
        );
    }

    #[test]
    fn the_sum_carries_across_bytes() {
        // Adding the same 256-bit value 2^9 times moves carries through every byte; the sum
        // must equal the value times 512 modulo 2^256, computed here independently.
        let line = b"carry";
        let hash = Sha256::digest(line);
        let mut digest = TableDigest::default();
        for _ in 0..512 {
            digest.add_line(line);
        }
        // value * 512 = value << 9, truncated to 256 bits.
        let mut expected = [0u8; 32];
        for i in 0..32 {
            let hi = if i + 1 < 32 { hash[i + 1] >> 7 } else { 0 };
            let byte = (hash[i] << 1) | hi;
            if i >= 1 {
                expected[i - 1] = byte;
            }
        }
        // That was a shift by 1 bit and 1 byte = 9 bits.
        assert_eq!(digest.sum, expected);
    }

    #[test]
    fn columns_come_from_the_value_and_must_agree_with_the_key() {
        let score = rec(
            Table::Scores,
            "01J0",
            r#"{"score_id":"01J0","at":5,"model_id":"m","features":{},"output":0.5}"#,
        );
        assert_eq!(score.columns().unwrap(), Columns::Score { at: 5 });
        let moved = rec(
            Table::Scores,
            "01J1",
            r#"{"score_id":"01J0","at":5,"model_id":"m","features":{},"output":0.5}"#,
        );
        assert!(moved.columns().unwrap_err().reason.contains("not the key"));
        let example = rec(
            Table::Examples,
            "e1",
            r#"{"id":"e1","event_time":-3,"label":1.0,"features":{},"outcome_at":9}"#,
        );
        assert_eq!(
            example.columns().unwrap(),
            Columns::Example {
                event_time: -3,
                label: 1.0,
                outcome_at: Some(9)
            }
        );
        assert!(rec(Table::Counters, "x", "-1").columns().is_err());
        assert!(rec(Table::Counters, "x", "1.5").columns().is_err());
        assert!(rec(Table::Meta, "write_probe", "1").columns().is_err());
        assert_eq!(
            rec(Table::Log, "2", r#"{"seq":2}"#).columns().unwrap(),
            Columns::Log { seq: 2 }
        );
        assert!(rec(Table::Log, "3", r#"{"seq":2}"#).columns().is_err());
        let shadowed = RawRecord::new(
            Table::Shadowed,
            "m-2".into(),
            Some("01J0".into()),
            r#"{"active":0.1,"candidate":0.2,"label":1.0}"#.into(),
        )
        .unwrap();
        assert_eq!(
            shadowed.columns().unwrap(),
            Columns::Shadowed { score_id: "01J0" }
        );
        let orphan = rec(
            Table::Shadowed,
            "m-2",
            r#"{"active":0.1,"candidate":0.2,"label":1.0}"#,
        );
        assert!(orphan.columns().is_err());
        assert!(RawRecord::new(Table::Meta, "freeze".into(), None, "{".into()).is_err());
    }

    #[test]
    fn a_line_keeps_the_stored_text_byte_for_byte() {
        let text = r#"{"b":1,"a":[1.5e-7,"é"]}"#;
        let record = rec(Table::Meta, "shadow", text);
        let line = record.canonical_line();
        assert_eq!(
            line,
            format!(r#"{{"table":"meta","key":"shadow","value":{text}}}"#)
        );
        let back: RawRecord = serde_json::from_str(&line).unwrap();
        assert_eq!(back, record);
        assert_eq!(back.value.get(), text);
    }
}
