//! A small, named Fisher matrix: the common currency of the CMB and survey engines and
//! the combiner.
//!
//! Conventions: the conditional error of parameter i (all others fixed) is
//! 1/sqrt(F_ii); the marginalized error is sqrt[(F^-1)_ii]. Marginalizing nuisance
//! parameters out of a Fisher matrix is the Schur complement
//! F_aa - F_an F_nn^-1 F_na. Inversions go through a Cholesky factorization with a
//! relative jitter check, so a singular (degenerate) matrix is reported, not hidden.

use serde::Serialize;

/// A symmetric Fisher matrix over named parameters.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FisherMatrix {
    names: Vec<String>,
    /// Row-major n x n.
    data: Vec<f64>,
}

/// Why a Fisher matrix could not be inverted.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum FisherError {
    /// Not positive definite (a parameter is unconstrained or two are degenerate).
    #[error("Fisher matrix is not positive definite (parameter `{0}` unconstrained or degenerate)")]
    Singular(String),
    /// A parameter name that is not in the matrix.
    #[error("unknown parameter `{0}`")]
    Unknown(String),
}

impl FisherMatrix {
    /// A zero matrix over `names`.
    pub fn zeros(names: &[&str]) -> Self {
        let n = names.len();
        Self {
            names: names.iter().map(|s| s.to_string()).collect(),
            data: vec![0.0; n * n],
        }
    }

    /// From names and a row-major matrix (symmetrized).
    pub fn from_rows(names: Vec<String>, data: Vec<f64>) -> Self {
        let n = names.len();
        assert_eq!(data.len(), n * n, "Fisher data must be n*n");
        let mut f = Self { names, data };
        f.symmetrize();
        f
    }

    fn symmetrize(&mut self) {
        let n = self.len();
        for i in 0..n {
            for j in i + 1..n {
                let v = 0.5 * (self.data[i * n + j] + self.data[j * n + i]);
                self.data[i * n + j] = v;
                self.data[j * n + i] = v;
            }
        }
    }

    /// Number of parameters.
    pub fn len(&self) -> usize {
        self.names.len()
    }

    /// True when there are no parameters.
    pub fn is_empty(&self) -> bool {
        self.names.is_empty()
    }

    /// Parameter names in order.
    pub fn names(&self) -> &[String] {
        &self.names
    }

    /// Index of a parameter.
    pub fn index(&self, name: &str) -> Option<usize> {
        self.names.iter().position(|n| n == name)
    }

    /// Element (i, j).
    pub fn get(&self, i: usize, j: usize) -> f64 {
        self.data[i * self.len() + j]
    }

    /// Adds `v` to (i, j) and, for i != j, to (j, i).
    pub fn add_sym(&mut self, i: usize, j: usize, v: f64) {
        let n = self.len();
        self.data[i * n + j] += v;
        if i != j {
            self.data[j * n + i] += v;
        }
    }

    /// Rows as nested vectors (for JSON output).
    pub fn rows(&self) -> Vec<Vec<f64>> {
        self.data
            .chunks(self.len().max(1))
            .map(|r| r.to_vec())
            .collect()
    }

    /// Sum of two Fisher matrices over the union of their parameters (shared names are
    /// added, others padded with zeros): independent probes.
    pub fn combine(&self, other: &FisherMatrix) -> FisherMatrix {
        let mut names = self.names.clone();
        for n in &other.names {
            if !names.contains(n) {
                names.push(n.clone());
            }
        }
        let m = names.len();
        let mut data = vec![0.0; m * m];
        for src in [self, other] {
            let map: Vec<usize> = src
                .names
                .iter()
                .map(|n| names.iter().position(|x| x == n).unwrap_or(0))
                .collect();
            for i in 0..src.len() {
                for j in 0..src.len() {
                    data[map[i] * m + map[j]] += src.get(i, j);
                }
            }
        }
        FisherMatrix { names, data }
    }

    /// Scales every element (e.g. by a sky fraction).
    pub fn scaled(&self, s: f64) -> FisherMatrix {
        FisherMatrix {
            names: self.names.clone(),
            data: self.data.iter().map(|v| v * s).collect(),
        }
    }

    /// Adds a Gaussian prior of width sigma on a parameter.
    ///
    /// # Errors
    /// [`FisherError::Unknown`] for a name not in the matrix.
    pub fn add_prior(&mut self, name: &str, sigma: f64) -> Result<(), FisherError> {
        let i = self
            .index(name)
            .ok_or_else(|| FisherError::Unknown(name.into()))?;
        self.add_sym(i, i, 1.0 / (sigma * sigma));
        Ok(())
    }

    /// The sub-matrix over `keep` with all other parameters fixed (conditional).
    ///
    /// # Errors
    /// [`FisherError::Unknown`].
    pub fn select(&self, keep: &[&str]) -> Result<FisherMatrix, FisherError> {
        let idx = keep
            .iter()
            .map(|k| {
                self.index(k)
                    .ok_or_else(|| FisherError::Unknown((*k).into()))
            })
            .collect::<Result<Vec<_>, _>>()?;
        let m = idx.len();
        let mut data = vec![0.0; m * m];
        for (a, &i) in idx.iter().enumerate() {
            for (b, &j) in idx.iter().enumerate() {
                data[a * m + b] = self.get(i, j);
            }
        }
        Ok(FisherMatrix {
            names: keep.iter().map(|s| s.to_string()).collect(),
            data,
        })
    }

    /// Marginalizes over every parameter not in `keep` (Schur complement).
    ///
    /// # Errors
    /// [`FisherError::Unknown`], or [`FisherError::Singular`] when the nuisance block is
    /// degenerate.
    pub fn marginalize_to(&self, keep: &[&str]) -> Result<FisherMatrix, FisherError> {
        let cov = self.inverse()?;
        let sub = cov.select(keep)?;
        sub.inverse()
    }

    /// Conditional error of a parameter: 1/sqrt(F_ii) (infinite when F_ii = 0).
    pub fn sigma_conditional(&self, i: usize) -> f64 {
        let f = self.get(i, i);
        if f > 0.0 {
            1.0 / f.sqrt()
        } else {
            f64::INFINITY
        }
    }

    /// Marginalized errors of every parameter.
    ///
    /// # Errors
    /// [`FisherError::Singular`].
    pub fn sigma_marginal(&self) -> Result<Vec<f64>, FisherError> {
        let c = self.inverse()?;
        Ok((0..self.len()).map(|i| c.get(i, i).sqrt()).collect())
    }

    /// Marginalized errors; parameters without information (F_ii = 0) get `inf` and are
    /// left out of the marginalization of the others (all `inf` if the rest is singular).
    pub fn sigma_marginal_or_inf(&self) -> Vec<f64> {
        let informative: Vec<usize> = (0..self.len()).filter(|&i| self.get(i, i) > 0.0).collect();
        let mut out = vec![f64::INFINITY; self.len()];
        let names: Vec<&str> = informative
            .iter()
            .map(|&i| self.names[i].as_str())
            .collect();
        if let Ok(sub) = self.select(&names)
            && let Ok(sig) = sub.sigma_marginal()
        {
            for (a, &i) in informative.iter().enumerate() {
                out[i] = sig[a];
            }
        }
        out
    }

    /// Matrix inverse via Cholesky (the covariance).
    ///
    /// # Errors
    /// [`FisherError::Singular`] when not positive definite to 1e-12 relative precision.
    pub fn inverse(&self) -> Result<FisherMatrix, FisherError> {
        let n = self.len();
        // Scale to unit diagonal for conditioning.
        let d: Vec<f64> = (0..n).map(|i| self.get(i, i)).collect();
        for (i, &v) in d.iter().enumerate() {
            if v.is_nan() || v <= 0.0 || !v.is_finite() {
                return Err(FisherError::Singular(self.names[i].clone()));
            }
        }
        let s: Vec<f64> = d.iter().map(|v| 1.0 / v.sqrt()).collect();
        let mut l = vec![0.0; n * n];
        for i in 0..n {
            for j in 0..=i {
                let mut sum = self.get(i, j) * s[i] * s[j];
                for k in 0..j {
                    sum -= l[i * n + k] * l[j * n + k];
                }
                if i == j {
                    if sum <= 1e-12 {
                        return Err(FisherError::Singular(self.names[i].clone()));
                    }
                    l[i * n + i] = sum.sqrt();
                } else {
                    l[i * n + j] = sum / l[j * n + j];
                }
            }
        }
        // Invert L, then C = L^-T L^-1.
        let mut linv = vec![0.0; n * n];
        for i in 0..n {
            linv[i * n + i] = 1.0 / l[i * n + i];
            for j in 0..i {
                let mut sum = 0.0;
                for k in j..i {
                    sum -= l[i * n + k] * linv[k * n + j];
                }
                linv[i * n + j] = sum / l[i * n + i];
            }
        }
        let mut data = vec![0.0; n * n];
        for i in 0..n {
            for j in 0..=i {
                let mut sum = 0.0;
                for k in i..n {
                    sum += linv[k * n + i] * linv[k * n + j];
                }
                let v = sum * s[i] * s[j];
                data[i * n + j] = v;
                data[j * n + i] = v;
            }
        }
        Ok(FisherMatrix {
            names: self.names.clone(),
            data,
        })
    }

    /// True when symmetric and positive semi-definite (within `tol` relative).
    pub fn is_symmetric_psd(&self, tol: f64) -> bool {
        let n = self.len();
        for i in 0..n {
            for j in 0..n {
                let (a, b) = (self.get(i, j), self.get(j, i));
                if (a - b).abs() > tol * (a.abs() + b.abs() + f64::MIN_POSITIVE) {
                    return false;
                }
            }
        }
        // PSD: F + eps*diag must be Cholesky-factorizable.
        let mut g = self.clone();
        for i in 0..n {
            let v = g.get(i, i).abs().max(f64::MIN_POSITIVE) * tol.max(1e-10);
            g.add_sym(i, i, v);
        }
        g.inverse().is_ok() || n == 0
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample() -> FisherMatrix {
        FisherMatrix::from_rows(
            vec!["a".into(), "b".into(), "c".into()],
            vec![4.0, 1.0, 0.5, 1.0, 3.0, 0.2, 0.5, 0.2, 2.0],
        )
    }

    #[test]
    fn inverse_times_matrix_is_identity() {
        let f = sample();
        let c = f.inverse().unwrap();
        for i in 0..3 {
            for j in 0..3 {
                let s: f64 = (0..3).map(|k| f.get(i, k) * c.get(k, j)).sum();
                assert!((s - if i == j { 1.0 } else { 0.0 }).abs() < 1e-12);
            }
        }
    }

    #[test]
    fn marginal_at_least_conditional() {
        let f = sample();
        let m = f.sigma_marginal().unwrap();
        for (i, mi) in m.iter().enumerate() {
            assert!(*mi >= f.sigma_conditional(i) * (1.0 - 1e-12));
        }
    }

    #[test]
    fn schur_complement_matches_covariance_block() {
        let f = sample();
        let m = f.marginalize_to(&["a", "c"]).unwrap();
        let s = m.sigma_marginal().unwrap();
        let full = f.sigma_marginal().unwrap();
        assert!((s[0] - full[0]).abs() < 1e-12 && (s[1] - full[2]).abs() < 1e-12);
    }

    #[test]
    fn singular_is_reported() {
        let f = FisherMatrix::from_rows(vec!["a".into(), "b".into()], vec![1.0, 1.0, 1.0, 1.0]);
        assert!(matches!(f.inverse(), Err(FisherError::Singular(_))));
        assert!(f.is_symmetric_psd(1e-9));
    }

    #[test]
    fn uninformative_parameter_does_not_spoil_the_others() {
        let f = FisherMatrix::from_rows(
            vec!["a".into(), "b".into(), "c".into()],
            vec![4.0, 1.0, 0.0, 1.0, 3.0, 0.0, 0.0, 0.0, 0.0],
        );
        let m = f.sigma_marginal_or_inf();
        let sub = f.select(&["a", "b"]).unwrap().sigma_marginal().unwrap();
        assert_eq!(m[0], sub[0]);
        assert_eq!(m[1], sub[1]);
        assert!(m[2].is_infinite());
    }

    #[test]
    fn combine_adds_shared_parameters() {
        let a = FisherMatrix::from_rows(vec!["x".into(), "y".into()], vec![1.0, 0.0, 0.0, 2.0]);
        let b = FisherMatrix::from_rows(vec!["y".into(), "z".into()], vec![3.0, 0.0, 0.0, 4.0]);
        let c = a.combine(&b);
        assert_eq!(c.names(), &["x", "y", "z"]);
        assert_eq!(c.get(1, 1), 5.0);
        assert_eq!(c.get(2, 2), 4.0);
    }
}
