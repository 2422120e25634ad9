//! The preprocessing pipeline that travels inside a model: median imputation for numbers,
//! one-hot encoding for categories, and standardization of every column.
//!
//! It is fitted on one set of training rows only (a fold's training part, or a run's whole
//! training part) and then applied unchanged, so no statistic leaks from validation or holdout
//! rows into the fit.

use serde::{Deserialize, Serialize};

use crate::schema::FeatureKind;
use crate::schema::{Row, Schema, Value};

/// How one feature becomes columns.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum FeatureTransform {
    /// One column: `(value or median - mean) / scale`.
    Number {
        name: String,
        median: f64,
        mean: f64,
        scale: f64,
    },
    /// One column per category: `(indicator - mean) / scale`.
    Category {
        name: String,
        categories: Vec<String>,
        means: Vec<f64>,
        scales: Vec<f64>,
    },
}

impl FeatureTransform {
    pub fn name(&self) -> &str {
        match self {
            FeatureTransform::Number { name, .. } | FeatureTransform::Category { name, .. } => name,
        }
    }

    pub fn width(&self) -> usize {
        match self {
            FeatureTransform::Number { .. } => 1,
            FeatureTransform::Category { categories, .. } => categories.len(),
        }
    }
}

/// The fitted pipeline: one transform per schema feature, in schema order.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Preprocessor {
    pub features: Vec<FeatureTransform>,
}

/// A column with no spread is centred but not scaled (it becomes all zeros).
fn usable_scale(std: f64) -> f64 {
    if std.is_finite() && std > 1e-12 {
        std
    } else {
        1.0
    }
}

fn mean_and_std(values: impl Iterator<Item = f64> + Clone) -> (f64, f64) {
    let n = values.clone().count().max(1) as f64;
    let mean = values.clone().sum::<f64>() / n;
    let var = values.map(|v| (v - mean).powi(2)).sum::<f64>() / n;
    (mean, var.sqrt())
}

fn median(mut values: Vec<f64>) -> f64 {
    if values.is_empty() {
        return 0.0;
    }
    values.sort_by(f64::total_cmp);
    let mid = values.len() / 2;
    if values.len() % 2 == 1 {
        values[mid]
    } else {
        (values[mid - 1] + values[mid]) / 2.0
    }
}

impl Preprocessor {
    /// Fits the pipeline on `rows` (each in `schema` order).
    pub fn fit(schema: &Schema, rows: &[&Row]) -> Preprocessor {
        let features = schema
            .features()
            .iter()
            .enumerate()
            .map(|(j, feature)| match feature.kind {
                FeatureKind::Number => {
                    let present: Vec<f64> = rows
                        .iter()
                        .filter_map(|r| match r.0[j] {
                            Value::Number(v) => Some(v),
                            _ => None,
                        })
                        .collect();
                    let median = median(present);
                    let imputed = rows.iter().map(|r| match r.0[j] {
                        Value::Number(v) => v,
                        _ => median,
                    });
                    let (mean, std) = mean_and_std(imputed);
                    FeatureTransform::Number {
                        name: feature.name.clone(),
                        median,
                        mean,
                        scale: usable_scale(std),
                    }
                }
                FeatureKind::Category => {
                    let k = feature.categories.len();
                    let mut counts = vec![0usize; k];
                    for r in rows {
                        if let Value::Category(c) = r.0[j] {
                            if let Some(count) = counts.get_mut(c as usize) {
                                *count += 1;
                            }
                        }
                    }
                    let n = rows.len().max(1) as f64;
                    let means: Vec<f64> = counts.iter().map(|&c| c as f64 / n).collect();
                    let scales = means
                        .iter()
                        .map(|&p| usable_scale((p * (1.0 - p)).sqrt()))
                        .collect();
                    FeatureTransform::Category {
                        name: feature.name.clone(),
                        categories: feature.categories.clone(),
                        means,
                        scales,
                    }
                }
            })
            .collect();
        Preprocessor { features }
    }

    /// Number of columns a row becomes.
    pub fn width(&self) -> usize {
        self.features.iter().map(FeatureTransform::width).sum()
    }

    /// For each column, the index of the feature it came from.
    pub fn column_features(&self) -> Vec<usize> {
        self.features
            .iter()
            .enumerate()
            .flat_map(|(j, f)| std::iter::repeat_n(j, f.width()))
            .collect()
    }

    /// Writes the standardized columns of `row` into `out` (length [`Self::width`]).
    pub fn transform_into(&self, row: &Row, out: &mut [f64]) {
        let mut col = 0;
        for (transform, value) in self.features.iter().zip(&row.0) {
            match transform {
                FeatureTransform::Number {
                    median,
                    mean,
                    scale,
                    ..
                } => {
                    let v = match value {
                        Value::Number(v) => *v,
                        _ => *median,
                    };
                    out[col] = (v - mean) / scale;
                    col += 1;
                }
                FeatureTransform::Category { means, scales, .. } => {
                    let hot = match value {
                        Value::Category(c) => *c as usize,
                        _ => usize::MAX,
                    };
                    for (k, (mean, scale)) in means.iter().zip(scales).enumerate() {
                        let indicator = if k == hot { 1.0 } else { 0.0 };
                        out[col + k] = (indicator - mean) / scale;
                    }
                    col += means.len();
                }
            }
        }
    }

    /// The row-major design matrix of `rows`.
    pub fn transform_all(&self, rows: &[&Row]) -> Vec<f64> {
        let p = self.width();
        let mut x = vec![0.0; rows.len() * p];
        for (row, out) in rows.iter().zip(x.chunks_exact_mut(p.max(1))) {
            self.transform_into(row, out);
        }
        x
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::schema::Feature;
    use crate::schema::MissingRule;

    fn schema() -> Schema {
        let number = |name: &str| Feature {
            name: name.into(),
            kind: FeatureKind::Number,
            min: None,
            max: None,
            categories: vec![],
            missing: MissingRule::Median,
        };
        let colour = Feature {
            name: "colour".into(),
            kind: FeatureKind::Category,
            min: None,
            max: None,
            categories: vec!["red".into(), "blue".into()],
            missing: MissingRule::Reject,
        };
        Schema::new(vec![number("a"), colour], "y".into())
    }

    #[test]
    fn numbers_are_imputed_with_the_median_then_standardized() {
        let rows = [
            Row(vec![Value::Number(1.0), Value::Category(0)]),
            Row(vec![Value::Number(3.0), Value::Category(1)]),
            Row(vec![Value::Missing, Value::Category(1)]),
        ];
        let refs: Vec<&Row> = rows.iter().collect();
        let p = Preprocessor::fit(&schema(), &refs);
        // Median of {1, 3} is 2; imputed column {1, 3, 2}: mean 2, population std sqrt(2/3).
        let FeatureTransform::Number {
            median,
            mean,
            scale,
            ..
        } = &p.features[0]
        else {
            panic!()
        };
        assert_eq!((*median, *mean), (2.0, 2.0));
        assert!((scale - (2.0f64 / 3.0).sqrt()).abs() < 1e-15);
        let x = p.transform_all(&refs);
        assert_eq!(p.width(), 3);
        assert_eq!(x[2 * 3], 0.0, "the imputed row sits at the mean");
        // Columns are centred: each sums to zero over the training rows.
        for c in 0..3 {
            let sum: f64 = (0..3).map(|r| x[r * 3 + c]).sum();
            assert!(sum.abs() < 1e-12, "column {c} sums to {sum}");
        }
        assert_eq!(p.column_features(), vec![0, 1, 1]);
    }
}
