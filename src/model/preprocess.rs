//! The preprocessing pipeline that travels inside a model: median imputation for numbers,
//! one-hot encoding for categories, and standardization of every column.
//!
//! It is fitted on one set of training rows only (a fold's training part, or a run's whole
//! training part) and then applied unchanged, so no statistic leaks from validation or holdout
//! rows into the fit.

use serde::{Deserialize, Serialize};

use crate::schema::{Feature, FeatureKind, Row, Schema, Value};

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

/// The median by selection (linear time), not a full sort: the same order statistics in
/// `f64::total_cmp` order, so the same value a sort would give.
fn median(mut values: Vec<f64>) -> f64 {
    if values.is_empty() {
        return 0.0;
    }
    let odd = values.len() % 2 == 1;
    let mid = values.len() / 2;
    let (lower, &mut upper, _) = values.select_nth_unstable_by(mid, f64::total_cmp);
    if odd {
        upper
    } else {
        // The largest of the lower half is the other middle value.
        let below = lower
            .iter()
            .copied()
            .max_by(f64::total_cmp)
            .unwrap_or(upper);
        (below + upper) / 2.0
    }
}

/// One feature's fitted transform and, for each training row in order, its values before
/// standardization (a number imputed with the median; a category's index, `None` when
/// missing): every statistic is then computed over contiguous memory, not through the rows.
enum Fitted {
    Number(FeatureTransform, Vec<f64>),
    Category(FeatureTransform, Vec<Option<u32>>),
}

/// Fits feature `j` on `rows` in two reads of the rows (the present values for the median,
/// then the imputed column); mean and standard deviation sum the imputed values in row order,
/// exactly as the transform's definition reads.
fn fit_feature(feature: &Feature, j: usize, rows: &[&Row]) -> Fitted {
    match feature.kind {
        FeatureKind::Number => {
            let present: Vec<f64> = rows
                .iter()
                .filter_map(|r| match r.0[j] {
                    Value::Number(v) => Some(v),
                    _ => None,
                })
                .collect();
            let median = median(present);
            let imputed: Vec<f64> = rows
                .iter()
                .map(|r| match r.0[j] {
                    Value::Number(v) => v,
                    _ => median,
                })
                .collect();
            let (mean, std) = mean_and_std(imputed.iter().copied());
            let transform = FeatureTransform::Number {
                name: feature.name.clone(),
                median,
                mean,
                scale: usable_scale(std),
            };
            Fitted::Number(transform, imputed)
        }
        FeatureKind::Category => {
            let k = feature.categories.len();
            let mut counts = vec![0usize; k];
            let hot: Vec<Option<u32>> = rows
                .iter()
                .map(|r| match r.0[j] {
                    Value::Category(c) if (c as usize) < k => {
                        counts[c as usize] += 1;
                        Some(c)
                    }
                    _ => None,
                })
                .collect();
            let n = rows.len().max(1) as f64;
            let means: Vec<f64> = counts.iter().map(|&c| c as f64 / n).collect();
            let scales = means
                .iter()
                .map(|&p| usable_scale((p * (1.0 - p)).sqrt()))
                .collect();
            let transform = FeatureTransform::Category {
                name: feature.name.clone(),
                categories: feature.categories.clone(),
                means,
                scales,
            };
            Fitted::Category(transform, hot)
        }
    }
}

impl Preprocessor {
    /// Fits the pipeline on `rows` (each in `schema` order).
    pub fn fit(schema: &Schema, rows: &[&Row]) -> Preprocessor {
        let features = schema
            .features()
            .iter()
            .enumerate()
            .map(|(j, feature)| match fit_feature(feature, j, rows) {
                Fitted::Number(transform, _) | Fitted::Category(transform, _) => transform,
            })
            .collect();
        Preprocessor { features }
    }

    /// Fits the pipeline on `rows` and returns it with their standardized columns,
    /// column-major (`width` columns of `rows.len()` values, each equal to what
    /// [`Self::transform_into`] writes): one feature at a time, with no row-major copy and no
    /// second reading of the rows.
    pub fn fit_columns(schema: &Schema, rows: &[&Row]) -> (Preprocessor, Vec<f64>) {
        let n = rows.len();
        let width: usize = schema
            .features()
            .iter()
            .map(|f| match f.kind {
                FeatureKind::Number => 1,
                FeatureKind::Category => f.categories.len(),
            })
            .sum();
        let mut columns = vec![0.0; n * width];
        let mut features = Vec::with_capacity(schema.features().len());
        let mut col = 0;
        for (j, feature) in schema.features().iter().enumerate() {
            match fit_feature(feature, j, rows) {
                Fitted::Number(transform, imputed) => {
                    if let FeatureTransform::Number { mean, scale, .. } = &transform {
                        let out = &mut columns[col * n..(col + 1) * n];
                        for (o, v) in out.iter_mut().zip(&imputed) {
                            *o = (v - mean) / scale;
                        }
                    }
                    col += 1;
                    features.push(transform);
                }
                Fitted::Category(transform, hot) => {
                    if let FeatureTransform::Category { means, scales, .. } = &transform {
                        for (k, (mean, scale)) in means.iter().zip(scales).enumerate() {
                            let out = &mut columns[(col + k) * n..(col + k + 1) * n];
                            for (o, h) in out.iter_mut().zip(&hot) {
                                let indicator = if *h == Some(k as u32) { 1.0 } else { 0.0 };
                                *o = (indicator - mean) / scale;
                            }
                        }
                        col += means.len();
                    }
                    features.push(transform);
                }
            }
        }
        (Preprocessor { features }, columns)
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

    /// The median as the definition reads it: sort, take the middle (or the mean of the two).
    fn median_by_sorting(mut values: Vec<f64>) -> f64 {
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

    proptest::proptest! {
        #[test]
        fn the_median_by_selection_is_the_median_by_sorting(
            values in proptest::collection::vec(
                proptest::prop_oneof![-1e6..1e6f64, proptest::sample::select(vec![0.0, -0.0, 1.0, 1.0])],
                0..200,
            ),
        ) {
            let sorted = median_by_sorting(values.clone());
            proptest::prop_assert_eq!(median(values).to_bits(), sorted.to_bits());
        }

        #[test]
        fn fitting_column_by_column_gives_the_same_pipeline_and_the_same_values(
            cells in proptest::collection::vec(
                (proptest::option::of(-50.0..50.0f64), proptest::option::of(0u32..3)),
                1..120,
            ),
        ) {
            // Category 2 is out of range for the two declared ones: counted as no category.
            let rows: Vec<Row> = cells
                .iter()
                .map(|(a, c)| Row(vec![
                    a.map_or(Value::Missing, Value::Number),
                    c.map_or(Value::Missing, Value::Category),
                ]))
                .collect();
            let refs: Vec<&Row> = rows.iter().collect();
            let fitted = Preprocessor::fit(&schema(), &refs);
            let (by_columns, columns) = Preprocessor::fit_columns(&schema(), &refs);
            proptest::prop_assert_eq!(&by_columns, &fitted);
            let n = rows.len();
            let mut z = vec![0.0; fitted.width()];
            for (i, row) in refs.iter().enumerate() {
                fitted.transform_into(row, &mut z);
                for (col, v) in z.iter().enumerate() {
                    proptest::prop_assert_eq!(columns[col * n + i].to_bits(), v.to_bits());
                }
            }
        }
    }
}
