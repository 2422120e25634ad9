//! The design matrix the solver reads: standardized once, stored column by column, shared by
//! every lambda and every `l1_ratio` of a search so no grid value copies the data.

/// The design matrix, standardized once and stored column by column.
///
/// Built once per training set and shared by every lambda and every `l1_ratio`, so a search
/// never copies the data per grid value.
#[derive(Debug, Clone)]
pub struct Design {
    pub(super) n: usize,
    pub(super) p: usize,
    /// Column-major `p × n` standardized values; a constant column is all zeros.
    pub(super) columns: Vec<f64>,
    pub(super) mean: Vec<f64>,
    pub(super) scale: Vec<f64>,
    /// False for a column with no spread: it never enters the model.
    pub(super) usable: Vec<bool>,
}

impl Design {
    /// Standardizes the row-major `n × p` matrix `x`.
    pub fn from_rows(x: &[f64], p: usize) -> Design {
        let n = x.len().checked_div(p).unwrap_or(0);
        Design::from_row_writer(n, p, |i, row| row.copy_from_slice(&x[i * p..(i + 1) * p]))
    }

    /// Builds the design from `n` rows of width `p` that `write_row(i, buffer)` writes one at
    /// a time, so no row-major copy of the whole matrix is ever held beside it.
    pub fn from_row_writer(
        n: usize,
        p: usize,
        mut write_row: impl FnMut(usize, &mut [f64]),
    ) -> Design {
        let mut columns = vec![0.0; n * p];
        let mut row = vec![0.0; p];
        for i in 0..n {
            write_row(i, &mut row);
            for (j, &value) in row.iter().enumerate() {
                columns[j * n + i] = value;
            }
        }
        Design::from_columns(columns, n, p)
    }

    /// Standardizes `columns`, a column-major `p × n` matrix (column `j` is
    /// `columns[j * n..(j + 1) * n]`), in place: no copy of the data.
    pub fn from_columns(mut columns: Vec<f64>, n: usize, p: usize) -> Design {
        debug_assert_eq!(
            columns.len(),
            n * p,
            "a column-major matrix of n × p values"
        );
        let mut mean = vec![0.0; p];
        let mut scale = vec![1.0; p];
        let mut usable = vec![false; p];
        for j in 0..p {
            let column = &mut columns[j * n..(j + 1) * n];
            let m = column.iter().sum::<f64>() / n.max(1) as f64;
            let var = column.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / n.max(1) as f64;
            let sd = var.sqrt();
            mean[j] = m;
            if sd.is_finite() && sd > 1e-12 * m.abs().max(1.0) {
                scale[j] = sd;
                usable[j] = true;
                column.iter_mut().for_each(|v| *v = (*v - m) / sd);
            } else {
                column.iter_mut().for_each(|v| *v = 0.0);
            }
        }
        Design {
            n,
            p,
            columns,
            mean,
            scale,
            usable,
        }
    }

    pub fn rows(&self) -> usize {
        self.n
    }

    pub fn width(&self) -> usize {
        self.p
    }

    pub(super) fn column(&self, j: usize) -> &[f64] {
        &self.columns[j * self.n..(j + 1) * self.n]
    }

    /// Maps standardized-scale coefficients to the scale of the matrix given to
    /// [`Design::from_rows`]: `w_j / s_j`, and the intercept absorbs the centring.
    pub fn to_input_scale(&self, intercept: f64, weights: &[f64]) -> (f64, Vec<f64>) {
        let input: Vec<f64> = weights
            .iter()
            .zip(&self.scale)
            .map(|(w, s)| w / s)
            .collect();
        let shift: f64 = input.iter().zip(&self.mean).map(|(w, m)| w * m).sum();
        (intercept - shift, input)
    }
}
