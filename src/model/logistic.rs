//! The logistic function, the fit errors every family shares, and smartcore's L2 logistic fit,
//! kept only as an independent cross-check of our own solver in tests (`elastic_net`).
//!
//! smartcore minimizes the *summed* log-loss plus alpha/2·‖w‖² with the intercept unpenalized
//! (smartcore 0.7 `linear::logistic_regression`), and it returns coefficients but no
//! probabilities. Our grids speak the glmnet convention, mean log-loss plus lambda/2·‖w‖²
//! (Friedman, Hastie & Tibshirani 2010, eq. for alpha = 0), so alpha = N·lambda.

#[cfg(test)]
use smartcore::linalg::basic::arrays::Array;
#[cfg(test)]
use smartcore::linalg::basic::matrix::DenseMatrix;
#[cfg(test)]
use smartcore::linear::logistic_regression::{LogisticRegression, LogisticRegressionParameters};

/// A fitted linear log-odds model on standardized columns.
#[cfg(test)]
#[derive(Debug, Clone, PartialEq)]
pub struct LogisticFit {
    pub weights: Vec<f64>,
    pub intercept: f64,
}

#[derive(Debug, thiserror::Error)]
pub enum FitError {
    #[error("training rows hold only one class")]
    OneClass,
    #[error("no training rows")]
    Empty,
    #[error("solver failed: {0}")]
    Solver(String),
    #[error("solver produced non-finite coefficients")]
    NonFinite,
}

/// Fits on the row-major `n × p` matrix `x` with 0/1 labels `y` and penalty `lambda`.
#[cfg(test)]
pub fn fit_l2(x: &[f64], p: usize, y: &[u8], lambda: f64) -> Result<LogisticFit, FitError> {
    let n = y.len();
    if n == 0 || p == 0 {
        return Err(FitError::Empty);
    }
    let positives = y.iter().filter(|&&v| v == 1).count();
    if positives == 0 || positives == n {
        return Err(FitError::OneClass);
    }
    let matrix =
        DenseMatrix::new(n, p, x.to_vec(), false).map_err(|e| FitError::Solver(e.to_string()))?;
    let labels: Vec<i32> = y.iter().map(|&v| i32::from(v)).collect();
    let params = LogisticRegressionParameters::default().with_alpha(n as f64 * lambda);
    let fitted = LogisticRegression::fit(&matrix, &labels, params)
        .map_err(|e| FitError::Solver(e.to_string()))?;
    let weights: Vec<f64> = (0..p).map(|j| *fitted.coefficients().get((0, j))).collect();
    let intercept = *fitted.intercept().get((0, 0));
    if !intercept.is_finite() || weights.iter().any(|w| !w.is_finite()) {
        return Err(FitError::NonFinite);
    }
    Ok(LogisticFit { weights, intercept })
}

/// The logistic function, written to stay finite for large |z|.
pub fn sigmoid(z: f64) -> f64 {
    if z >= 0.0 {
        1.0 / (1.0 + (-z).exp())
    } else {
        let e = z.exp();
        e / (1.0 + e)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[derive(serde::Deserialize)]
    struct Reference {
        rows: usize,
        fits: Vec<ReferenceFit>,
    }

    #[derive(serde::Deserialize)]
    struct ReferenceFit {
        lambda: f64,
        intercept: f64,
        weights: Vec<f64>,
    }

    /// The Wisconsin diagnostic breast-cancer data as smartcore ships it, standardized with the
    /// population standard deviation (the same recipe as the reference script).
    fn breast_cancer_standardized() -> (Vec<f64>, usize, Vec<u8>) {
        let data = smartcore::dataset::breast_cancer::load_dataset();
        let (n, p) = (data.num_samples, data.num_features);
        let mut x: Vec<f64> = data.data.iter().map(|&v| f64::from(v)).collect();
        for j in 0..p {
            let mean = (0..n).map(|i| x[i * p + j]).sum::<f64>() / n as f64;
            let var = (0..n).map(|i| (x[i * p + j] - mean).powi(2)).sum::<f64>() / n as f64;
            for i in 0..n {
                x[i * p + j] = (x[i * p + j] - mean) / var.sqrt();
            }
        }
        let y = data.target.iter().map(|&t| t as u8).collect();
        (x, p, y)
    }

    #[test]
    fn l2_fit_matches_scikit_learn_on_breast_cancer() {
        // Reference: scikit-learn 1.9.1 LogisticRegression(lbfgs, tol=1e-12) with C = 1/(N·lambda)
        // on the same standardized data; recipe and versions in
        // tests/reference/logistic_l2_breast_cancer.py and its fixture.
        let reference: Reference = serde_json::from_str(include_str!(
            "../../tests/fixtures/logistic_l2_breast_cancer.json"
        ))
        .unwrap();
        let (x, p, y) = breast_cancer_standardized();
        assert_eq!(y.len(), reference.rows);
        for fit in &reference.fits {
            let ours = fit_l2(&x, p, &y, fit.lambda).unwrap();
            // smartcore stops when the largest gradient component of its summed objective is
            // below 1e-8, or after 1,000 iterations (smartcore 0.7.0 source,
            // src/optimization/first_order/lbfgs.rs, `LBFGS::default()`: g_atol = g_rtol = 1e-8,
            // max_iter = 1000; src/linear/logistic_regression.rs fits with that default).
            // Measured here the largest gap was 2.0e-6 at lambda 0.001 (the flattest
            // objective), 3.1e-7 at 0.01 and 1.2e-8 at 0.1. 1e-5 leaves room for that solver tolerance while
            // staying far below anything that moves a probability in the fourth decimal.
            let worst = ours
                .weights
                .iter()
                .zip(&fit.weights)
                .map(|(a, b)| (a - b).abs())
                .fold((ours.intercept - fit.intercept).abs(), f64::max);
            assert!(
                worst < 1e-5,
                "lambda {}: largest coefficient gap {worst}",
                fit.lambda
            );
        }
    }

    #[test]
    fn one_class_is_refused() {
        assert!(matches!(
            fit_l2(&[1.0, 2.0], 1, &[1, 1], 0.1),
            Err(FitError::OneClass)
        ));
    }

    #[test]
    fn sigmoid_is_finite_and_symmetric() {
        assert_eq!(sigmoid(0.0), 0.5);
        assert!((sigmoid(3.0) + sigmoid(-3.0) - 1.0).abs() < 1e-15);
        assert!(sigmoid(-800.0) >= 0.0 && sigmoid(800.0) <= 1.0);
    }
}
