//! Labeled rows from a CSV file: the label's column, `event_time`, the declared features and
//! optionally `id`. Each row is validated cell by cell into schema order with the rules
//! `POST /v1/examples` applies, every broken rule named by line and field; any bad row refuses
//! the whole file. Readers only: the command line opens the files.

use serde_json::{Map, Value as Json};

use crate::ingest;
use crate::learn::Example;
use crate::schema::{FeatureKind, FieldError, Row, Schema, Value};
use crate::store::StoredExample;
use crate::time::Millis;

/// Why a CSV of labeled rows was refused; nothing from it is kept.
#[derive(Debug, thiserror::Error)]
pub(crate) enum CsvError {
    #[error("reading {source_name}: {source}")]
    Read {
        source_name: String,
        source: ::csv::Error,
    },
    #[error("{source_name}: the header's column `{column}` {rule}")]
    Header {
        source_name: String,
        column: String,
        rule: String,
    },
    #[error("{} problems in {source_name}, nothing imported:\n  {}", .problems.len(), shown(.problems))]
    Rows {
        source_name: String,
        problems: Vec<CsvProblem>,
    },
}

/// One broken rule on one line: `row` for the row as a whole (its column count, its
/// encoding), else the field as the API names it (`features.days_to_due`, `label`).
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct CsvProblem {
    pub line: u64,
    pub field: String,
    pub rule: String,
}

/// The first 20 problems, one a line.
fn shown(problems: &[CsvProblem]) -> String {
    problems
        .iter()
        .take(20)
        .map(|p| format!("line {}: `{}`: {}", p.line, p.field, p.rule))
        .collect::<Vec<_>>()
        .join("\n  ")
}

/// [`read_csv`] over any reader; `source_name` names it in errors. Each row is validated
/// straight from its cells into schema order ([`read_csv_rows`]); the named map the store keeps
/// is built only for rows that passed.
pub(crate) fn read_csv_from(
    input: impl std::io::Read,
    source_name: &str,
    schema: &Schema,
) -> Result<Vec<StoredExample>, CsvError> {
    let mut examples = Vec::new();
    read_csv_rows(input, source_name, schema, |layout, row| {
        // The map holds every feature column of the header: an empty cell as `null` (whatever
        // the feature's missing rule made of it in the row), a number as read, a category as
        // its text.
        let mut features = Map::new();
        for &(c, j) in &layout.feature_columns {
            let cell = row.record[c].trim();
            let value = match (row.row.get(j).unwrap_or(Value::Missing), cell) {
                (_, "") => Json::Null,
                (Value::Number(v), _) => {
                    serde_json::Number::from_f64(v).map_or(Json::Null, Json::Number)
                }
                _ => Json::String(cell.to_owned()),
            };
            features.insert(layout.headers[c].clone(), value);
        }
        examples.push(StoredExample {
            monitoring: layout.monitoring(row.record),
            id: row
                .id
                .map_or_else(|| ulid::Ulid::new().to_string(), str::to_owned),
            event_time: row.event_time,
            label: row.label,
            features,
        });
    })?;
    Ok(examples)
}

/// [`read_csv_examples`] over any reader; `source_name` names it in errors.
pub(crate) fn read_csv_examples_from(
    input: impl std::io::Read,
    source_name: &str,
    schema: &Schema,
) -> Result<Vec<Example>, CsvError> {
    let mut examples = Vec::new();
    read_csv_rows(input, source_name, schema, |layout, row| {
        examples.push(Example {
            monitoring: layout.monitoring(row.record),
            id: row.id.map(Into::into).unwrap_or_default(),
            event_time: row.event_time,
            row: row.row,
            label: row.label,
        })
    })?;
    // The vector grew by doubling: up to half of it is spare room a long run would carry.
    examples.shrink_to_fit();
    Ok(examples)
}

/// Where a CSV's columns go.
struct CsvLayout {
    headers: Vec<String>,
    /// `(column, feature)` for each declared feature the header names, in header order.
    feature_columns: Vec<(usize, usize)>,
    /// Columns of monitoring attributes (`monitoring.attributes`): kept, never features.
    monitoring_columns: Vec<usize>,
}

impl CsvLayout {
    /// A row's monitoring attributes: every non-empty cell of their columns, trimmed.
    fn monitoring(
        &self,
        record: &::csv::StringRecord,
    ) -> std::collections::BTreeMap<String, String> {
        self.monitoring_columns
            .iter()
            .filter_map(|&c| {
                let cell = record[c].trim();
                (!cell.is_empty()).then(|| (self.headers[c].clone(), cell.to_owned()))
            })
            .collect()
    }
}

/// One valid row of a CSV: its features validated into schema order, and its cells.
struct CsvRow<'r> {
    id: Option<&'r str>,
    event_time: Millis,
    label: f64,
    row: Row,
    record: &'r ::csv::StringRecord,
}

/// One cell of a declared feature's column, read by its kind.
#[derive(Clone, Copy)]
enum Cell {
    /// The column is absent or the cell is empty.
    Empty,
    Number(f64),
    /// A category column's cell, by its column.
    Text(usize),
    /// A number column's cell that is no finite number; its error is already reported.
    Unreadable,
}

/// The one CSV reader: checks the header, then validates each row cell by cell into schema
/// order and hands every valid row to `keep`. Any bad row refuses the whole file, with every
/// problem named by line and field as `POST /v1/examples` names it: per row, unreadable
/// number cells (in header order), an unreadable label, then the features' own rules (in
/// schema order), the label's rule, the event time and the id ([`ingest`]'s checks).
fn read_csv_rows(
    input: impl std::io::Read,
    source_name: &str,
    schema: &Schema,
    mut keep: impl FnMut(&CsvLayout, CsvRow<'_>),
) -> Result<(), CsvError> {
    let mut reader = ::csv::Reader::from_reader(input);
    let read_error = |source| CsvError::Read {
        source_name: source_name.to_owned(),
        source,
    };
    let header_error = |column: &str, rule: String| CsvError::Header {
        source_name: source_name.to_owned(),
        // An empty column name is shown as `""`, so the error still names it.
        column: if column.is_empty() {
            "\"\"".to_owned()
        } else {
            clip(column)
        },
        rule,
    };
    let headers: Vec<String> = reader
        .headers()
        .map_err(read_error)?
        .iter()
        .map(str::to_owned)
        .collect();
    for (i, h) in headers.iter().enumerate() {
        if headers[..i].contains(h) {
            return Err(header_error(
                h,
                "appears twice; give each column once".into(),
            ));
        }
    }
    let label_col = headers.iter().position(|h| h == schema.label());
    let time_col = headers.iter().position(|h| h == "event_time");
    let id_col = headers.iter().position(|h| h == "id");
    let (Some(label_col), Some(time_col)) = (label_col, time_col) else {
        let missing = if label_col.is_none() {
            schema.label()
        } else {
            "event_time"
        };
        return Err(header_error(
            missing,
            format!(
                "is missing; the header needs a `{}` column (the label) and an `event_time` column",
                schema.label()
            ),
        ));
    };
    let features = schema.features();
    let mut feature_columns = Vec::new();
    let mut monitoring_columns = Vec::new();
    for (i, h) in headers.iter().enumerate() {
        if i == label_col || i == time_col || Some(i) == id_col {
            continue;
        }
        if schema.monitoring().contains(h) {
            monitoring_columns.push(i);
            continue;
        }
        match features.iter().position(|f| &f.name == h) {
            Some(j) => feature_columns.push((i, j)),
            None => {
                return Err(header_error(
                    h,
                    "is not a declared feature, the label, `event_time` or `id`".into(),
                ))
            }
        }
    }
    let layout = CsvLayout {
        headers,
        feature_columns,
        monitoring_columns,
    };
    let mut problems: Vec<CsvProblem> = Vec::new();
    let mut record = ::csv::StringRecord::new();
    let mut cells: Vec<Cell> = Vec::with_capacity(features.len());
    let mut last_line = 1;
    loop {
        let line = last_line + 1;
        match reader.read_record(&mut record) {
            Ok(false) => break,
            Ok(true) => {}
            Err(e) => {
                let line = e.position().map_or(line, ::csv::Position::line);
                last_line = line;
                let rule = match e.kind() {
                    ::csv::ErrorKind::UnequalLengths {
                        expected_len, len, ..
                    } => format!(
                        "has {len} columns; the header has {expected_len} (one value per column)"
                    ),
                    ::csv::ErrorKind::Utf8 { .. } => "must be UTF-8 text".to_owned(),
                    _ => return Err(read_error(e)),
                };
                problems.push(CsvProblem {
                    line,
                    field: "row".into(),
                    rule,
                });
                continue;
            }
        }
        let line = record.position().map_or(line, ::csv::Position::line);
        last_line = line;
        let mut errors: Vec<FieldError> = Vec::new();
        // The cells, each read by its feature's kind, in header order (so unreadable numbers
        // are reported in the order of the file's columns).
        cells.clear();
        cells.resize(features.len(), Cell::Empty);
        for &(c, j) in &layout.feature_columns {
            cells[j] = match (features[j].kind, record[c].trim()) {
                (_, "") => Cell::Empty,
                (FeatureKind::Number, text) => match text.parse::<f64>() {
                    Ok(v) if v.is_finite() => Cell::Number(v),
                    _ => {
                        errors.push(FieldError {
                            field: format!("features.{}", layout.headers[c]),
                            rule: format!("must be a finite number, got `{}`", clip(text)),
                        });
                        Cell::Unreadable
                    }
                },
                (FeatureKind::Category, _) => Cell::Text(c),
            };
        }
        let label_text = record[label_col].trim();
        let label = match label_text.parse::<f64>() {
            Ok(value) => Some(value),
            Err(_) => {
                errors.push(FieldError {
                    field: "label".into(),
                    rule: format!("must be a number, got `{}`", clip(label_text)),
                });
                None
            }
        };
        // Each feature's own rules, in schema order; an unreadable cell's error is the one
        // already reported, not the "required" its absence would cause.
        let row: Row = features
            .iter()
            .zip(&cells)
            .map(|(feature, cell)| {
                let value = match *cell {
                    Cell::Empty => feature.when_missing(),
                    Cell::Number(v) => feature.number(v),
                    Cell::Text(c) => feature.category(record[c].trim()),
                    Cell::Unreadable => Ok(Value::Missing),
                };
                value.unwrap_or_else(|rule| {
                    errors.push(FieldError {
                        field: format!("features.{}", feature.name),
                        rule,
                    });
                    Value::Missing
                })
            })
            .collect();
        let id = id_col.map(|c| record[c].trim()).filter(|s| !s.is_empty());
        let event_time =
            ingest::check_beside_features(schema, label, record[time_col].trim(), id, &mut errors);
        if errors.is_empty() {
            keep(
                &layout,
                CsvRow {
                    id,
                    event_time,
                    label: label.unwrap_or_default(),
                    row,
                    record: &record,
                },
            );
        }
        problems.extend(errors.into_iter().map(|e| CsvProblem {
            line,
            field: e.field,
            rule: e.rule,
        }));
    }
    if !problems.is_empty() {
        return Err(CsvError::Rows {
            source_name: source_name.to_owned(),
            problems,
        });
    }
    Ok(())
}

/// A cell's text cut for an error message.
fn clip(text: &str) -> String {
    crate::text::clip(text, crate::text::ECHO_CHARS)
}

/// The CSV importer under generated files: valid files load row for row, one broken rule is
/// reported on its line under its field, and no text makes it panic.
#[cfg(test)]
mod csv_properties {
    use super::*;
    use crate::config::Config;
    use crate::demo::scenario::{invoice, Regime};
    use crate::time::{now_ms, to_rfc3339};
    use proptest::prelude::*;
    use proptest::test_runner::Config as Cases;
    use rand::SeedableRng;

    const CASES: u32 = 256;
    const HEADER: &str = "id,event_time,invoice_amount,days_to_due,debtor_years_trading,\
        prior_late_invoices,credit_utilisation,debtor_sector,submission_channel,paid_late";

    /// The embedded schema, built once (loading the config dominates a case's time).
    fn schema() -> &'static Schema {
        static SCHEMA: std::sync::OnceLock<Schema> = std::sync::OnceLock::new();
        SCHEMA.get_or_init(|| Config::embedded_default().schema())
    }

    /// `rows` rows of the invented scenario as CSV lines (no header), with their labels.
    fn scenario_lines(seed: u64, rows: usize) -> Vec<(String, u8)> {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let start = now_ms() - 90 * 24 * 3600 * 1000;
        (0..rows)
            .map(|i| {
                let inv = invoice(&mut rng, Regime::Before);
                let cell = |k: &str| match inv.features.get(k) {
                    Some(Json::String(s)) => s.clone(),
                    Some(Json::Number(n)) => n.to_string(),
                    _ => String::new(),
                };
                let label = inv.draw_label(&mut rng);
                let line = format!(
                    "r{i},{},{},{},{},{},{},{},{},{label}",
                    to_rfc3339(start + i as i64 * 60_000),
                    cell("invoice_amount"),
                    cell("days_to_due"),
                    cell("debtor_years_trading"),
                    cell("prior_late_invoices"),
                    cell("credit_utilisation"),
                    cell("debtor_sector"),
                    cell("submission_channel"),
                );
                (line, label)
            })
            .collect()
    }

    fn file(lines: &[String]) -> String {
        format!("{HEADER}\n{}\n", lines.join("\n"))
    }

    fn problems(text: &str) -> Vec<CsvProblem> {
        match read_csv_from(text.as_bytes(), "rows.csv", schema()) {
            Err(CsvError::Rows { problems, .. }) => problems,
            other => panic!("expected row problems, got {other:?}"),
        }
    }

    #[test]
    fn a_monitoring_column_is_kept_beside_the_features_and_refused_when_undeclared() {
        let lines: Vec<String> = scenario_lines(5, 3)
            .into_iter()
            .zip(["40-49", "", " 60+ "])
            .map(|((line, _), band)| format!("{line},{band}"))
            .collect();
        let text = format!("{HEADER},owner_age_band\n{}\n", lines.join("\n"));
        let monitored = schema()
            .clone()
            .with_monitoring(vec!["owner_age_band".into()]);
        let stored = read_csv_from(text.as_bytes(), "rows.csv", &monitored).unwrap();
        let bands: Vec<Option<&str>> = stored
            .iter()
            .map(|e| e.monitoring.get("owner_age_band").map(String::as_str))
            .collect();
        // An empty cell is not recorded; a value is trimmed.
        assert_eq!(bands, [Some("40-49"), None, Some("60+")]);
        assert!(stored
            .iter()
            .all(|e| !e.features.contains_key("owner_age_band")));
        let examples = read_csv_examples_from(text.as_bytes(), "rows.csv", &monitored).unwrap();
        assert_eq!(examples[0].monitoring["owner_age_band"], "40-49");
        assert_eq!(examples[0].row.len(), schema().features().len());
        // Without the declaration the column is an unknown one, as before.
        match read_csv_from(text.as_bytes(), "rows.csv", schema()) {
            Err(CsvError::Header { column, .. }) => assert_eq!(column, "owner_age_band"),
            other => panic!("expected a header error, got {other:?}"),
        }
    }

    proptest! {
        #![proptest_config(Cases::with_cases(CASES))]

        #[test]
        fn a_valid_file_loads_every_row_as_written(seed in any::<u64>(), rows in 1..40usize) {
            let lines = scenario_lines(seed, rows);
            let text = file(&lines.iter().map(|(l, _)| l.clone()).collect::<Vec<_>>());
            let examples = read_csv_from(text.as_bytes(), "rows.csv", schema()).unwrap();
            prop_assert_eq!(examples.len(), rows);
            for (i, (example, (_, label))) in examples.iter().zip(&lines).enumerate() {
                prop_assert_eq!(&example.id, &format!("r{i}"));
                prop_assert_eq!(example.label, f64::from(*label));
            }
        }

        #[test]
        fn a_row_with_the_wrong_column_count_is_named_by_line(
            seed in any::<u64>(),
            rows in 1..30usize,
            pick in any::<prop::sample::Index>(),
            change in prop_oneof![Just(-9i32), -3..0i32, 1..4i32],
        ) {
            let mut lines: Vec<String> =
                scenario_lines(seed, rows).into_iter().map(|(l, _)| l).collect();
            let at = pick.index(rows);
            let mut cells: Vec<&str> = lines[at].split(',').collect();
            if change < 0 {
                cells.truncate((10 + change) as usize);
            } else {
                cells.extend(std::iter::repeat_n("7", change as usize));
            }
            let expected = format!("has {} columns; the header has 10", cells.len());
            lines[at] = cells.join(",");
            let problems = problems(&file(&lines));
            prop_assert_eq!(problems.len(), 1, "{:?}", problems);
            prop_assert_eq!(problems[0].line, at as u64 + 2);
            prop_assert_eq!(problems[0].field.as_str(), "row");
            prop_assert!(problems[0].rule.starts_with(&expected), "{}", problems[0].rule);
        }

        #[test]
        fn one_bad_cell_is_named_by_line_and_field(
            seed in any::<u64>(),
            rows in 1..30usize,
            pick in any::<prop::sample::Index>(),
            (column, value, field, rule) in prop::sample::select(vec![
                (1, "9999-01-01T00:00:00Z", "event_time", "between"),
                (1, "0001-01-01T00:00:00Z", "event_time", "between"),
                (1, "1970-01-01T00:00:00Z", "event_time", "between"),
                (1, "yesterday", "event_time", "RFC 3339"),
                (2, "-5", "features.invoice_amount", ">= 0"),
                (2, "NaN", "features.invoice_amount", "finite number"),
                (2, "1e999", "features.invoice_amount", "finite number"),
                (3, "thirty", "features.days_to_due", "finite number"),
                (7, "mining", "features.debtor_sector", "unknown category"),
                (7, "", "features.debtor_sector", "required"),
                (9, "2", "label", "must be 0 or 1"),
                (9, "-1", "label", "must be 0 or 1"),
                (9, "0.5", "label", "must be 0 or 1"),
                (9, "true", "label", "must be a number"),
                (9, "", "label", "must be a number"),
            ]),
        ) {
            let mut lines: Vec<String> =
                scenario_lines(seed, rows).into_iter().map(|(l, _)| l).collect();
            let at = pick.index(rows);
            let mut cells: Vec<String> = lines[at].split(',').map(str::to_owned).collect();
            cells[column] = value.to_owned();
            lines[at] = cells.join(",");
            let problems = problems(&file(&lines));
            prop_assert_eq!(problems.len(), 1, "{:?}", problems);
            prop_assert_eq!(problems[0].line, at as u64 + 2);
            prop_assert_eq!(problems[0].field.as_str(), field);
            prop_assert!(problems[0].rule.contains(rule), "{}", problems[0].rule);
        }

        #[test]
        fn any_text_is_loaded_or_refused_naming_what_broke(
            body in prop_oneof![
                "\\PC{0,200}",
                prop::collection::vec(
                    prop::sample::select(vec![
                        ",", "\n", "\"", "paid_late", "event_time", "id", "invoice_amount",
                        "debtor_sector", "retail", "1", "0", "2026-06-01T00:00:00Z", "NaN", " ",
                        "\r\n", "é", "\u{0}",
                    ]),
                    0..60,
                ).prop_map(|p| p.concat()),
            ],
            with_header in any::<bool>(),
        ) {
            let text = if with_header { format!("{HEADER}\n{body}") } else { body };
            match read_csv_from(text.as_bytes(), "rows.csv", schema()) {
                Ok(_) => {}
                Err(CsvError::Rows { problems, .. }) => {
                    prop_assert!(!problems.is_empty());
                    for p in problems {
                        prop_assert!(p.line >= 2, "{:?}", p);
                        prop_assert!(!p.field.is_empty() && !p.rule.is_empty(), "{:?}", p);
                    }
                }
                Err(CsvError::Header { column, rule, .. }) => {
                    prop_assert!(!column.is_empty() && !rule.is_empty(), "{} {}", column, rule);
                }
                Err(CsvError::Read { source, .. }) => {
                    prop_assert!(!source.to_string().is_empty());
                }
            }
        }
    }

    /// The reader as it was before rows went straight into schema order: a named map per row,
    /// validated by `ingest::example` (kept here as the reference the new readers must match).
    fn read_csv_through_maps(
        input: impl std::io::Read,
        source_name: &str,
        schema: &Schema,
    ) -> Result<Vec<StoredExample>, CsvError> {
        let mut reader = ::csv::Reader::from_reader(input);
        let read_error = |source| CsvError::Read {
            source_name: source_name.to_owned(),
            source,
        };
        let header_error = |column: &str, rule: String| CsvError::Header {
            source_name: source_name.to_owned(),
            // An empty column name is shown as `""`, so the error still names it.
            column: if column.is_empty() {
                "\"\"".to_owned()
            } else {
                clip(column)
            },
            rule,
        };
        let headers: Vec<String> = reader
            .headers()
            .map_err(read_error)?
            .iter()
            .map(str::to_owned)
            .collect();
        for (i, h) in headers.iter().enumerate() {
            if headers[..i].contains(h) {
                return Err(header_error(
                    h,
                    "appears twice; give each column once".into(),
                ));
            }
        }
        let label_col = headers.iter().position(|h| h == schema.label());
        let time_col = headers.iter().position(|h| h == "event_time");
        let id_col = headers.iter().position(|h| h == "id");
        let (Some(label_col), Some(time_col)) = (label_col, time_col) else {
            let missing = if label_col.is_none() {
                schema.label()
            } else {
                "event_time"
            };
            return Err(header_error(
                missing,
                format!(
                    "is missing; the header needs a `{}` column (the label) and an `event_time` column",
                    schema.label()
                ),
            ));
        };
        let mut kinds: Vec<Option<FeatureKind>> = Vec::with_capacity(headers.len());
        for (i, h) in headers.iter().enumerate() {
            if i == label_col || i == time_col || Some(i) == id_col {
                kinds.push(None);
                continue;
            }
            match schema.features().iter().find(|f| &f.name == h) {
                Some(f) => kinds.push(Some(f.kind)),
                None => {
                    return Err(header_error(
                        h,
                        "is not a declared feature, the label, `event_time` or `id`".into(),
                    ))
                }
            }
        }
        let mut examples = Vec::new();
        let mut problems: Vec<CsvProblem> = Vec::new();
        let mut record = ::csv::StringRecord::new();
        let mut last_line = 1;
        loop {
            let line = last_line + 1;
            match reader.read_record(&mut record) {
                Ok(false) => break,
                Ok(true) => {}
                Err(e) => {
                    let line = e.position().map_or(line, ::csv::Position::line);
                    last_line = line;
                    let rule = match e.kind() {
                        ::csv::ErrorKind::UnequalLengths {
                            expected_len, len, ..
                        } => format!(
                            "has {len} columns; the header has {expected_len} (one value per column)"
                        ),
                        ::csv::ErrorKind::Utf8 { .. } => "must be UTF-8 text".to_owned(),
                        _ => return Err(read_error(e)),
                    };
                    problems.push(CsvProblem {
                        line,
                        field: "row".into(),
                        rule,
                    });
                    continue;
                }
            }
            let line = record.position().map_or(line, ::csv::Position::line);
            last_line = line;
            let mut features = Map::new();
            let mut errors: Vec<FieldError> = Vec::new();
            for (i, cell) in record.iter().enumerate() {
                let Some(kind) = kinds[i] else { continue };
                let value = match (kind, cell.trim()) {
                    (_, "") => Json::Null,
                    (FeatureKind::Number, text) => match text
                        .parse::<f64>()
                        .ok()
                        .and_then(serde_json::Number::from_f64)
                    {
                        Some(number) => Json::Number(number),
                        None => {
                            errors.push(FieldError {
                                field: format!("features.{}", headers[i]),
                                rule: format!("must be a finite number, got `{}`", clip(text)),
                            });
                            continue;
                        }
                    },
                    (FeatureKind::Category, text) => Json::String(text.to_owned()),
                };
                features.insert(headers[i].clone(), value);
            }
            let label = match record[label_col].trim().parse::<f64>() {
                Ok(value) => value,
                Err(_) => {
                    errors.push(FieldError {
                        field: "label".into(),
                        rule: format!("must be a number, got `{}`", clip(record[label_col].trim())),
                    });
                    0.0
                }
            };
            let id = id_col.map(|c| record[c].trim()).filter(|s| !s.is_empty());
            // A cell that is no number was left out of the features; its error is the one to
            // report, not the "required" that its absence causes.
            let unreadable: Vec<String> = errors.iter().map(|e| e.field.clone()).collect();
            match ingest::example(schema, &features, label, record[time_col].trim(), id) {
                Ok(example) if errors.is_empty() => examples.push(example),
                Ok(_) => {}
                Err(e) => errors.extend(e.0.into_iter().filter(|e| !unreadable.contains(&e.field))),
            }
            problems.extend(errors.into_iter().map(|e| CsvProblem {
                line,
                field: e.field,
                rule: e.rule,
            }));
        }
        if !problems.is_empty() {
            return Err(CsvError::Rows {
                source_name: source_name.to_owned(),
                problems,
            });
        }
        Ok(examples)
    }

    proptest! {
        #![proptest_config(Cases::with_cases(CASES))]

        /// `train` reads rows straight into schema order and `import` keeps named maps: the
        /// same file gives what the map-per-row reader gave (the same maps, or the same rows
        /// as the API's rules make of those maps) or the same problems, word for word.
        #[test]
        fn both_readers_accept_and_refuse_what_the_map_per_row_reader_did(
            seed in any::<u64>(),
            rows in 1..20usize,
            edits in prop::collection::vec(
                (any::<prop::sample::Index>(), 1..10usize, prop::sample::select(vec![
                    "", "-5", "NaN", "1e999", "thirty", "mining", "retail", "2", "0.5", "x",
                    "yesterday", "1970-01-01T00:00:00Z", " 7 ",
                ])),
                0..4,
            ),
            drop_column in prop::option::of(2..9usize),
        ) {
            let mut lines: Vec<Vec<String>> = scenario_lines(seed, rows)
                .into_iter()
                .map(|(l, _)| l.split(',').map(str::to_owned).collect())
                .collect();
            for (pick, column, value) in edits {
                let at = pick.index(rows);
                lines[at][column] = value.to_owned();
            }
            let mut header: Vec<&str> = HEADER.split(',').collect();
            if let Some(c) = drop_column {
                header.remove(c);
                for line in &mut lines {
                    line.remove(c);
                }
            }
            let text = format!(
                "{}\n{}\n",
                header.join(","),
                lines.iter().map(|l| l.join(",")).collect::<Vec<_>>().join("\n")
            );
            let by_rows = read_csv_examples_from(text.as_bytes(), "rows.csv", schema());
            let by_maps = read_csv_from(text.as_bytes(), "rows.csv", schema());
            let before = read_csv_through_maps(text.as_bytes(), "rows.csv", schema());
            match (&by_maps, &before) {
                (Ok(stored), Ok(reference)) => {
                    prop_assert_eq!(stored.len(), reference.len());
                    for (s, r) in stored.iter().zip(reference) {
                        prop_assert_eq!(&s.features, &r.features);
                        prop_assert_eq!((s.event_time, s.label), (r.event_time, r.label));
                        prop_assert_eq!(&s.id, &r.id);
                    }
                }
                (Err(CsvError::Rows { problems: a, .. }), Err(CsvError::Rows { problems: b, .. })) => {
                    prop_assert_eq!(a, b);
                }
                (a, b) => prop_assert!(false, "maps {:?} but before {:?}", a, b),
            }
            match (by_rows, before) {
                (Ok(examples), Ok(stored)) => {
                    prop_assert_eq!(examples.len(), stored.len());
                    for (e, s) in examples.iter().zip(&stored) {
                        prop_assert_eq!(&e.id, &s.id);
                        prop_assert_eq!(e.event_time, s.event_time);
                        prop_assert_eq!(e.label, s.label);
                        prop_assert_eq!(Ok(e.row.clone()), schema().parse_row(&s.features));
                    }
                }
                (Err(CsvError::Rows { problems: a, .. }), Err(CsvError::Rows { problems: b, .. })) => {
                    prop_assert_eq!(a, b);
                }
                (Err(CsvError::Header { column: a, rule: r, .. }), Err(CsvError::Header { column: b, rule: s, .. })) => {
                    prop_assert_eq!((a, r), (b, s));
                }
                (a, b) => prop_assert!(false, "rows {:?} but maps {:?}", a.map(|v| v.len()), b.map(|v| v.len())),
            }
        }
    }

    #[test]
    fn a_column_given_twice_in_the_header_is_refused() {
        let text = format!("{HEADER},days_to_due\n");
        match read_csv_from(text.as_bytes(), "rows.csv", schema()) {
            Err(CsvError::Header { column, rule, .. }) => {
                assert_eq!(column, "days_to_due");
                assert!(rule.contains("twice"), "{rule}");
            }
            other => panic!("expected a header error, got {other:?}"),
        }
    }
}
