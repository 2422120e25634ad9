//! A starter config guessed from a CSV of one's own data (`understudy init --from-csv`).
//!
//! Every column is read once: a column whose filled cells are all finite numbers becomes a
//! `number` feature bounded by the smallest and largest value seen; any other column a
//! `category` feature listing the values seen, unless it has so many distinct values that it
//! looks like an identifier or free text. The label is the column the user names, else one
//! named like a label (`label`, `outcome`, `target`, `y`), else a column of 0s and 1s. A column
//! named `event_time`, or else one whose every cell is an RFC 3339 time, is the event time.
//!
//! The guess is pure: it reads from any reader and returns what it found with the reason for
//! each choice; the command line prints it and writes the file. It is a starting point a person
//! reviews, not a decision: observed bounds refuse live values beyond them, and a column being
//! available says nothing about whether it may be used (see the README's cautions).

use std::collections::HashMap;
use std::fmt::Write;

use crate::config::DEFAULT_CONFIG_TOML;

/// Column names taken as the label when no `--label` is given, in this order.
pub(crate) const LABEL_NAMES: [&str; 4] = ["label", "outcome", "target", "y"];

/// A text column with more distinct values than this is left out (common practice, no
/// source: past a few dozen values one-hot columns mostly describe noise, and such a column is
/// usually an identifier, a free-text field or a date).
pub(crate) const MAX_CATEGORIES: usize = 50;

/// What the label is.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum GuessedLabel {
    /// Only 0 and 1: the model predicts the probability of 1.
    Binary,
    /// Other numbers: the model predicts the value.
    Number,
}

/// One feature as guessed.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum GuessedKind {
    Number {
        min: f64,
        max: f64,
    },
    /// Values seen, most frequent first (ties by name).
    Category {
        values: Vec<String>,
    },
}

#[derive(Debug, Clone, PartialEq)]
pub(crate) struct GuessedFeature {
    pub name: String,
    pub kind: GuessedKind,
    /// Rows where the cell was empty.
    pub empty: usize,
}

/// Everything the guess found, with reasons.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Guess {
    /// Data rows read (the header excluded).
    pub rows: usize,
    pub label: String,
    pub label_kind: GuessedLabel,
    /// Why this column is the label.
    pub label_reason: String,
    /// The event-time column, if one was found.
    pub event_time: Option<String>,
    /// The `id` column, if there is one.
    pub id: Option<String>,
    pub features: Vec<GuessedFeature>,
    /// Columns left out, each with the reason.
    pub skipped: Vec<(String, String)>,
}

/// Why no guess could be made.
#[derive(Debug, thiserror::Error)]
pub(crate) enum GuessError {
    #[error("reading the CSV: {0}")]
    Csv(#[from] csv::Error),
    #[error("the CSV has a header but no data rows")]
    NoRows,
    #[error("the header's column `{0}` appears twice; give each column once")]
    DuplicateColumn(String),
    #[error("--label `{0}` is not a column of the CSV (columns: {1})")]
    LabelNotAColumn(String, String),
    #[error("the label column `{column}` {rule}")]
    LabelUnusable { column: String, rule: String },
    #[error("no label column found: none is named {names}, and no column holds only 0 and 1; pass --label NAME")]
    NoLabel { names: String },
    #[error("no column is usable as a feature: {0}")]
    NoFeatures(String),
}

/// What one column's cells look like.
#[derive(Default)]
struct Column {
    empty: usize,
    filled: usize,
    numbers: usize,
    times: usize,
    min: f64,
    max: f64,
    only_zero_one: bool,
    counts: HashMap<String, usize>,
}

impl Column {
    fn new() -> Column {
        Column {
            min: f64::INFINITY,
            max: f64::NEG_INFINITY,
            only_zero_one: true,
            ..Column::default()
        }
    }

    fn add(&mut self, cell: &str) {
        let cell = cell.trim();
        if cell.is_empty() {
            self.empty += 1;
            return;
        }
        self.filled += 1;
        if let Some(value) = cell.parse::<f64>().ok().filter(|v| v.is_finite()) {
            self.numbers += 1;
            self.min = self.min.min(value);
            self.max = self.max.max(value);
            self.only_zero_one &= value == 0.0 || value == 1.0;
        } else {
            self.only_zero_one = false;
        }
        if crate::time::parse_rfc3339(cell).is_some() {
            self.times += 1;
        }
        // Counting stops being useful past the category limit; keep memory bounded.
        if self.counts.len() <= MAX_CATEGORIES || self.counts.contains_key(cell) {
            *self.counts.entry(cell.to_owned()).or_default() += 1;
        }
    }

    fn all_numbers(&self) -> bool {
        self.numbers > 0 && self.numbers == self.filled
    }

    fn all_times(&self) -> bool {
        self.times > 0 && self.times == self.filled
    }

    fn both_classes(&self) -> bool {
        self.all_numbers() && self.only_zero_one && self.min == 0.0 && self.max == 1.0
    }
}

/// Reads a CSV (with a header) and guesses the label, the event time and the features.
/// `label` is the user's choice of label column, if any.
pub(crate) fn guess(input: impl std::io::Read, label: Option<&str>) -> Result<Guess, GuessError> {
    let mut reader = csv::Reader::from_reader(input);
    let headers: Vec<String> = reader
        .headers()?
        .iter()
        .map(|h| h.trim().to_owned())
        .collect();
    for (i, h) in headers.iter().enumerate() {
        if headers[..i].contains(h) {
            return Err(GuessError::DuplicateColumn(h.clone()));
        }
    }
    let mut columns: Vec<Column> = headers.iter().map(|_| Column::new()).collect();
    let mut rows = 0;
    for record in reader.records() {
        let record = record?;
        rows += 1;
        for (column, cell) in columns.iter_mut().zip(record.iter()) {
            column.add(cell);
        }
    }
    if rows == 0 {
        return Err(GuessError::NoRows);
    }

    let (label_at, label_reason) = choose_label(&headers, &columns, label)?;
    let label_column = &columns[label_at];
    let label_kind = if label_column.empty > 0 {
        return Err(GuessError::LabelUnusable {
            column: headers[label_at].clone(),
            rule: format!(
                "has {} empty cells; every labeled row needs its outcome",
                label_column.empty
            ),
        });
    } else if label_column.all_numbers() && label_column.only_zero_one {
        GuessedLabel::Binary
    } else if label_column.all_numbers() {
        GuessedLabel::Number
    } else {
        return Err(GuessError::LabelUnusable {
            column: headers[label_at].clone(),
            rule: "holds values that are not numbers; a label is 0/1 or a number".into(),
        });
    };

    let time_at = headers.iter().position(|h| h == "event_time").or_else(|| {
        (0..headers.len())
            .find(|&i| i != label_at && columns[i].all_times() && columns[i].empty == 0)
    });
    let id_at = headers.iter().position(|h| h == "id");

    let mut features = Vec::new();
    let mut skipped = Vec::new();
    for (i, (name, column)) in headers.iter().zip(&columns).enumerate() {
        if i == label_at || Some(i) == time_at || Some(i) == id_at {
            continue;
        }
        match feature(name, column) {
            Ok(kind) => features.push(GuessedFeature {
                name: name.clone(),
                kind,
                empty: column.empty,
            }),
            Err(reason) => skipped.push((name.clone(), reason)),
        }
    }
    if features.is_empty() {
        let reasons = skipped
            .iter()
            .map(|(c, r)| format!("`{c}` {r}"))
            .collect::<Vec<_>>()
            .join("; ");
        return Err(GuessError::NoFeatures(if reasons.is_empty() {
            "the CSV has no columns besides the label, the event time and the id".into()
        } else {
            reasons
        }));
    }
    Ok(Guess {
        rows,
        label: headers[label_at].clone(),
        label_kind,
        label_reason,
        event_time: time_at.map(|i| headers[i].clone()),
        id: id_at.map(|i| headers[i].clone()),
        features,
        skipped,
    })
}

/// The label's column and why it was chosen.
fn choose_label(
    headers: &[String],
    columns: &[Column],
    label: Option<&str>,
) -> Result<(usize, String), GuessError> {
    if let Some(label) = label {
        return match headers.iter().position(|h| h == label) {
            Some(i) => Ok((i, "named by --label".into())),
            None => Err(GuessError::LabelNotAColumn(
                label.to_owned(),
                headers.join(", "),
            )),
        };
    }
    for name in LABEL_NAMES {
        if let Some(i) = headers.iter().position(|h| h.eq_ignore_ascii_case(name)) {
            return Ok((i, format!("its name is one a label usually has ({name})")));
        }
    }
    let binary: Vec<usize> = (0..headers.len())
        .filter(|&i| headers[i] != "id" && columns[i].both_classes() && columns[i].empty == 0)
        .collect();
    match binary.as_slice() {
        [] => Err(GuessError::NoLabel {
            names: LABEL_NAMES
                .iter()
                .map(|n| format!("`{n}`"))
                .collect::<Vec<_>>()
                .join(", "),
        }),
        [only] => Ok((*only, "the only column of 0s and 1s".into())),
        [.., last] => Ok((
            *last,
            format!(
                "the last of several columns of 0s and 1s (also: {}); pass --label NAME to choose another",
                binary[..binary.len() - 1]
                    .iter()
                    .map(|&i| headers[i].as_str())
                    .collect::<Vec<_>>()
                    .join(", ")
            ),
        )),
    }
}

/// A column as a feature, or the reason it is left out.
fn feature(name: &str, column: &Column) -> Result<GuessedKind, String> {
    let name_ok = !name.is_empty()
        && name.len() <= 64
        && name
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '_' || c == '-' || c == '.');
    if !name_ok {
        return Err(
            "is not a usable feature name (1-64 characters of A-Z, a-z, 0-9, `_`, `-`, `.`); rename it"
                .into(),
        );
    }
    if column.filled == 0 {
        return Err("is empty in every row".into());
    }
    if column.all_numbers() {
        if column.min == column.max {
            return Err(format!(
                "holds one value only ({}), which cannot inform a model",
                number(column.min)
            ));
        }
        return Ok(GuessedKind::Number {
            min: column.min,
            max: column.max,
        });
    }
    if column.all_times() {
        return Err(
            "holds times; a model takes numbers or categories (derive an age or a weekday from it)"
                .into(),
        );
    }
    if column.counts.len() > MAX_CATEGORIES {
        return Err(format!(
            "has more than {MAX_CATEGORIES} distinct values: an identifier or free text, not a category"
        ));
    }
    if column.counts.len() < 2 {
        return Err("holds one value only, which cannot inform a model".into());
    }
    let mut values: Vec<(&String, &usize)> = column.counts.iter().collect();
    values.sort_by(|a, b| b.1.cmp(a.1).then(a.0.cmp(b.0)));
    Ok(GuessedKind::Category {
        values: values.into_iter().map(|(v, _)| v.clone()).collect(),
    })
}

/// A number as TOML: whole numbers without a fraction, others as Rust's shortest round trip.
fn number(value: f64) -> String {
    if value.fract() == 0.0 && value.abs() < 1e15 {
        format!("{}", value as i64)
    } else {
        format!("{value:?}")
    }
}

fn quoted(text: &str) -> String {
    toml::Value::String(text.to_owned()).to_string()
}

impl Guess {
    /// The commented config: the starter file's server, access and run settings around a
    /// `[label]` and `[[features]]` written from the guess. `source` names the CSV.
    pub(crate) fn config_toml(&self, source: &str) -> String {
        let mut out = String::new();
        let _ = writeln!(
            out,
            "# understudy configuration guessed by `understudy init --from-csv` from {source}\n\
             # ({} rows). Review every feature before serving: the bounds are the smallest and\n\
             # largest values seen, so live requests beyond them are refused, and the categories\n\
             # are the values seen. Leave out protected characteristics (and close proxies for\n\
             # them) where the law or your policy says so; see the README's cautions.\n",
            self.rows
        );
        let starter = DEFAULT_CONFIG_TOML;
        let server_at = starter.find("[server]").unwrap_or(0);
        let label_at = starter
            .find("# The outcome the model predicts")
            .unwrap_or(starter.len());
        let training_at = starter.find("[training]").unwrap_or(starter.len());
        out.push_str(&starter[server_at..label_at]);

        let _ = writeln!(
            out,
            "# The outcome the model predicts ({}).",
            self.label_reason
        );
        let _ = writeln!(out, "[label]\nname = {}", quoted(&self.label));
        let kind = match self.label_kind {
            GuessedLabel::Binary => "binary",
            GuessedLabel::Number => "number",
        };
        let _ = writeln!(
            out,
            "# \"binary\" (outcomes 0/1; models give the probability of 1) or \"number\".\nkind = \"{kind}\"\n"
        );
        match &self.event_time {
            Some(column) if column == "event_time" => {}
            Some(column) => {
                let _ = writeln!(
                    out,
                    "# Event time: `understudy import` reads it from a column named `event_time`;\n\
                     # rename the CSV's `{column}` column to that.\n"
                );
            }
            None => out.push_str(
                "# No event-time column was found: `understudy import` needs an `event_time` column of\n\
                 # RFC 3339 times (when each row's outcome was decided).\n\n",
            ),
        }
        out.push_str(
            "# Features: kind = \"number\" (optional min/max bounds) or \"category\" (its allowed values).\n\
             # missing = \"reject\" (the request must carry it), \"median\" (numbers only: the training\n\
             # median is used), or a constant (a number, or one of the categories).\n",
        );
        for feature in &self.features {
            let _ = writeln!(out, "[[features]]\nname = {}", quoted(&feature.name));
            match &feature.kind {
                GuessedKind::Number { min, max } => {
                    let _ = writeln!(
                        out,
                        "kind = \"number\"\nmin = {}\nmax = {}",
                        number(*min),
                        number(*max)
                    );
                    if feature.empty > 0 {
                        let _ = writeln!(
                            out,
                            "# {} of {} rows were empty.\nmissing = \"median\"",
                            feature.empty, self.rows
                        );
                    }
                }
                GuessedKind::Category { values } => {
                    let list = values
                        .iter()
                        .map(|v| quoted(v))
                        .collect::<Vec<_>>()
                        .join(", ");
                    let _ = writeln!(out, "kind = \"category\"\ncategories = [{list}]");
                    if feature.empty > 0 {
                        let _ = writeln!(
                            out,
                            "# {} of {} rows were empty; they count as the most frequent value.\nmissing = {}",
                            feature.empty,
                            self.rows,
                            quoted(&values[0])
                        );
                    }
                }
            }
            out.push('\n');
        }
        for (column, reason) in &self.skipped {
            let _ = writeln!(out, "# Left out: `{column}` {reason}.");
        }
        if !self.skipped.is_empty() {
            out.push('\n');
        }

        let rest = &starter[training_at..];
        match self.label_kind {
            GuessedLabel::Binary => out.push_str(rest),
            // Numeric labels take the linear family and an error metric.
            GuessedLabel::Number => out.push_str(
                &rest
                    .replacen("family = \"logistic\"", "family = \"linear\"", 1)
                    .replacen("metric = \"auc\"", "metric = \"rmse\"", 1),
            ),
        }
        out
    }

    /// What was guessed, one line per column, for the terminal.
    pub(crate) fn summary(&self) -> String {
        let mut out = String::new();
        let kind = match self.label_kind {
            GuessedLabel::Binary => "binary (0/1)",
            GuessedLabel::Number => "number",
        };
        let _ = writeln!(out, "read {} rows", self.rows);
        let _ = writeln!(
            out,
            "label       {} — {kind}; {}",
            self.label, self.label_reason
        );
        match &self.event_time {
            Some(column) => {
                let _ = writeln!(out, "event time  {column}");
            }
            None => out.push_str(
                "event time  none found (import needs an `event_time` column of RFC 3339 times)\n",
            ),
        }
        if let Some(id) = &self.id {
            let _ = writeln!(out, "id          {id}");
        }
        for feature in &self.features {
            let empty = if feature.empty > 0 {
                format!(" ({} empty)", feature.empty)
            } else {
                String::new()
            };
            match &feature.kind {
                GuessedKind::Number { min, max } => {
                    let _ = writeln!(
                        out,
                        "feature     {} — number, {} to {}{empty}",
                        feature.name,
                        number(*min),
                        number(*max)
                    );
                }
                GuessedKind::Category { values } => {
                    let _ = writeln!(
                        out,
                        "feature     {} — category, {} values: {}{empty}",
                        feature.name,
                        values.len(),
                        values.join(", ")
                    );
                }
            }
        }
        for (column, reason) in &self.skipped {
            let _ = writeln!(out, "left out    {column} — {reason}");
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;
    use crate::schema::{FeatureKind, LabelKind, MissingRule};

    fn guessed(text: &str, label: Option<&str>) -> Guess {
        guess(text.as_bytes(), label).unwrap()
    }

    const SMALL: &str = "id,event_time,amount,sector,paid_late\n\
        a,2026-01-01T00:00:00Z,120.5,retail,0\n\
        b,2026-01-02T00:00:00Z,-3,logistics,1\n\
        c,2026-01-03T00:00:00Z,9000,retail,0\n";

    #[test]
    fn numbers_take_their_observed_bounds_and_text_its_values() {
        let g = guessed(SMALL, None);
        assert_eq!(g.rows, 3);
        assert_eq!(g.label, "paid_late");
        assert_eq!(g.label_kind, GuessedLabel::Binary);
        assert_eq!(g.event_time.as_deref(), Some("event_time"));
        assert_eq!(g.id.as_deref(), Some("id"));
        assert_eq!(
            g.features,
            vec![
                GuessedFeature {
                    name: "amount".into(),
                    kind: GuessedKind::Number {
                        min: -3.0,
                        max: 9000.0
                    },
                    empty: 0
                },
                GuessedFeature {
                    name: "sector".into(),
                    kind: GuessedKind::Category {
                        values: vec!["retail".into(), "logistics".into()]
                    },
                    empty: 0
                },
            ]
        );
        assert!(g.skipped.is_empty());
    }

    #[test]
    fn the_label_is_the_named_column_then_a_usual_name_then_a_zero_one_column() {
        // A usual name wins over a 0/1 column, case aside.
        let text = "flag,Outcome,x\n0,5,1\n1,7,2\n";
        let g = guessed(text, None);
        assert_eq!(g.label, "Outcome");
        assert_eq!(g.label_kind, GuessedLabel::Number);
        // --label wins over both.
        let g = guessed(text, Some("x"));
        assert_eq!(
            (g.label.as_str(), &g.label_reason[..]),
            ("x", "named by --label")
        );
        // Several 0/1 columns: the last, and the summary names the others.
        let g = guessed("a,b,c,d\n0,1,0,3\n1,0,1,4\n", None);
        assert_eq!(g.label, "c");
        assert!(g.label_reason.contains("also: a, b"), "{}", g.label_reason);
        // A column of 0s only is not a label.
        let error = guess("a,b\n0,1\n0,2\n".as_bytes(), None)
            .unwrap_err()
            .to_string();
        assert!(error.contains("pass --label"), "{error}");
        let error = guess("a,b\n0,1\n".as_bytes(), Some("c"))
            .unwrap_err()
            .to_string();
        assert!(
            error.contains("`c` is not a column") && error.contains("a, b"),
            "{error}"
        );
        let error = guess("a,y\n1,yes\n2,no\n".as_bytes(), None)
            .unwrap_err()
            .to_string();
        assert!(error.contains("not numbers"), "{error}");
    }

    #[test]
    fn an_rfc3339_column_is_the_event_time_and_other_columns_are_left_out_with_a_reason() {
        let mut text = String::from("decided_at,note,constant,size,y\n");
        for i in 0..60 {
            text.push_str(&format!(
                "2026-02-{:02}T10:00:00+01:00,free text {i},7,{},{}\n",
                1 + i % 28,
                i % 9,
                i % 2
            ));
        }
        let g = guessed(&text, None);
        assert_eq!(g.event_time.as_deref(), Some("decided_at"));
        let skipped: Vec<&str> = g.skipped.iter().map(|(c, _)| c.as_str()).collect();
        assert_eq!(skipped, ["note", "constant"]);
        assert!(
            g.skipped[0].1.contains("more than 50 distinct"),
            "{:?}",
            g.skipped
        );
        assert!(
            g.skipped[1].1.contains("one value only (7)"),
            "{:?}",
            g.skipped
        );
        assert_eq!(g.features.len(), 1);
        // The written config says to rename the time column.
        assert!(g
            .config_toml("x.csv")
            .contains("rename the CSV's `decided_at` column"));
    }

    #[test]
    fn empty_cells_are_counted_and_get_a_missing_rule_in_the_config() {
        let text = "amount,channel,label\n1.5,web,0\n,web,1\n4,,0\n2,fax,1\n";
        let g = guessed(text, None);
        assert_eq!(g.features[0].empty, 1);
        assert_eq!(g.features[1].empty, 1);
        let config = Config::from_toml(&g.config_toml("rows.csv")).unwrap();
        assert_eq!(config.features[0].missing, MissingRule::Median);
        assert_eq!(
            config.features[1].missing,
            MissingRule::Category("web".into())
        );
        // A label with an empty cell is refused.
        let error = guess("a,label\n1,0\n2,\n".as_bytes(), None)
            .unwrap_err()
            .to_string();
        assert!(error.contains("1 empty cells"), "{error}");
    }

    #[test]
    fn the_written_config_loads_with_the_guessed_schema() {
        let g = guessed(SMALL, None);
        let text = g.config_toml("small.csv");
        let config = Config::from_toml(&text).unwrap();
        assert_eq!(config.label.name, "paid_late");
        assert_eq!(config.label.kind, LabelKind::Binary);
        assert_eq!(config.features.len(), 2);
        assert_eq!(config.features[0].kind, FeatureKind::Number);
        assert_eq!(
            (config.features[0].min, config.features[0].max),
            (Some(-3.0), Some(9000.0))
        );
        assert_eq!(config.features[1].categories, ["retail", "logistics"]);
        // The starter's run settings come along, comments included.
        assert!(text.contains("[training]") && text.contains("# Stratified k-fold"));
        assert_eq!(config.training.window_rows, 4800);

        // A numeric label gets the linear family and an error metric.
        let g = guessed("amount,days_late\n1,3.5\n2,0\n", Some("days_late"));
        let config = Config::from_toml(&g.config_toml("late.csv")).unwrap();
        assert_eq!(config.label.kind, LabelKind::Number);
        assert_eq!(config.gate.metric.name(), "rmse");
        assert_eq!(config.training.families[0].name(), "linear");
    }

    #[test]
    fn numbers_are_written_so_toml_reads_them_back_exactly() {
        for value in [
            0.0,
            -3.0,
            0.1,
            1e-7,
            123456.789,
            1e300,
            -2.5e16,
            4503599627370497.0,
        ] {
            let text = format!("x = {}", number(value));
            let table: toml::Table = text.parse().unwrap();
            let back = table["x"]
                .as_float()
                .or(table["x"].as_integer().map(|i| i as f64));
            assert_eq!(back, Some(value), "{text}");
        }
    }

    #[test]
    fn a_header_only_file_or_a_repeated_column_is_refused() {
        assert!(matches!(
            guess("a,label\n".as_bytes(), None),
            Err(GuessError::NoRows)
        ));
        assert!(matches!(
            guess("a,a,label\n1,2,0\n".as_bytes(), None),
            Err(GuessError::DuplicateColumn(c)) if c == "a"
        ));
        let error = guess(
            "event_time,label\n2026-01-01T00:00:00Z,1\n".as_bytes(),
            None,
        )
        .unwrap_err()
        .to_string();
        assert!(
            error.contains("no column is usable as a feature"),
            "{error}"
        );
    }
}
