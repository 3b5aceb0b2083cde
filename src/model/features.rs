//! Feature standardisation and the optional random Fourier feature map.

use ndarray::{s, Array1, Array2, ArrayView2, Axis};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal, Uniform};
use serde::{Deserialize, Serialize};

use super::{FeatureMapKind, ModelError};

/// Per-column affine map `z = (x − μ) / s` with `s` the population standard deviation (1 for constant
/// columns, so constant and duplicated features never divide by zero).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Standardizer {
    /// Column means `μ`.
    pub mean: Vec<f64>,
    /// Column scales `s` (> 0).
    pub scale: Vec<f64>,
}

impl Standardizer {
    /// Fit on the rows of every given matrix (all must have the same column count).
    ///
    /// Uses a two-pass mean/variance per column so that huge magnitudes (1e12 and up) do not lose the
    /// spread to cancellation.
    pub fn fit(parts: &[ArrayView2<'_, f64>]) -> Result<Self, ModelError> {
        let d = parts
            .first()
            .map(|p| p.ncols())
            .ok_or_else(|| ModelError::Degenerate("no data to standardise".into()))?;
        if parts.iter().any(|p| p.ncols() != d) {
            return Err(ModelError::Shape("feature column counts differ".into()));
        }
        let n: usize = parts.iter().map(|p| p.nrows()).sum();
        if n == 0 {
            return Err(ModelError::Degenerate("no rows to standardise".into()));
        }
        let mut mean = vec![0.0; d];
        for p in parts {
            for row in p.rows() {
                for (m, v) in mean.iter_mut().zip(row.iter()) {
                    *m += v / n as f64;
                }
            }
        }
        let mut var = vec![0.0; d];
        for p in parts {
            for row in p.rows() {
                for ((s, v), m) in var.iter_mut().zip(row.iter()).zip(&mean) {
                    *s += (v - m) * (v - m) / n as f64;
                }
            }
        }
        let scale = var
            .iter()
            .zip(&mean)
            .map(|(v, m)| {
                let sd = v.sqrt();
                // A column is constant when its spread is negligible against its magnitude.
                if !sd.is_finite() || sd <= 1e-12 * m.abs().max(1.0) {
                    1.0
                } else {
                    sd
                }
            })
            .collect();
        Ok(Self { mean, scale })
    }

    /// The identity map for `d` columns.
    pub fn identity(d: usize) -> Self {
        Self {
            mean: vec![0.0; d],
            scale: vec![1.0; d],
        }
    }

    /// Number of raw feature columns.
    pub fn dim(&self) -> usize {
        self.mean.len()
    }

    /// Standardise `x` (rows are items).
    pub fn transform(&self, x: ArrayView2<'_, f64>) -> Result<Array2<f64>, ModelError> {
        if x.ncols() != self.dim() {
            return Err(ModelError::Shape(format!(
                "expected {} feature columns, got {}",
                self.dim(),
                x.ncols()
            )));
        }
        let mut z = x.to_owned();
        for (r, mut row) in z.rows_mut().into_iter().enumerate() {
            for (c, v) in row.iter_mut().enumerate() {
                if !v.is_finite() {
                    return Err(ModelError::NonFinite { row: r, column: c });
                }
                *v = (*v - self.mean[c]) / self.scale[c];
            }
        }
        Ok(z)
    }
}

/// The learner's feature map `φ(x)`: standardised features, optional random Fourier features, and a
/// trailing intercept column of ones.
///
/// With random Fourier features (Rahimi & Recht, NIPS 2007),
/// `rff(z) = √(2/D) cos(Ω z + b)`, `Ω_jl ~ N(0, σ⁻²)`, `b_j ~ U[0, 2π)`, so that
/// `E[rff(z)·rff(z')] = exp(−‖z − z'‖² / (2σ²))`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FeatureMap {
    /// Standardisation applied first.
    pub standardizer: Standardizer,
    /// `Ω` (D × d), empty for the linear map.
    pub omega: Array2<f64>,
    /// `b` (D), empty for the linear map.
    pub offset: Array1<f64>,
}

impl FeatureMap {
    /// Build the map for the given kind; the random draw is fixed by `seed`.
    pub fn new(
        standardizer: Standardizer,
        kind: FeatureMapKind,
        seed: u64,
    ) -> Result<Self, ModelError> {
        let d = standardizer.dim();
        let (omega, offset) = match kind {
            FeatureMapKind::Linear => (Array2::zeros((0, d)), Array1::zeros(0)),
            FeatureMapKind::RandomFourier { dim, bandwidth } => {
                if dim == 0 || !bandwidth.is_finite() || bandwidth < 0.0 {
                    return Err(ModelError::Settings(
                        "random_fourier needs dim > 0 and a finite bandwidth ≥ 0".into(),
                    ));
                }
                let sigma = if bandwidth == 0.0 {
                    (d.max(1) as f64).sqrt()
                } else {
                    bandwidth
                };
                let mut rng = ChaCha8Rng::seed_from_u64(seed);
                let omega = Array2::from_shape_fn((dim, d), |_| {
                    let g: f64 = StandardNormal.sample(&mut rng);
                    g / sigma
                });
                let unif = Uniform::new(0.0, std::f64::consts::TAU)
                    .map_err(|e| ModelError::Settings(e.to_string()))?;
                let offset = Array1::from_shape_fn(dim, |_| unif.sample(&mut rng));
                (omega, offset)
            }
        };
        Ok(Self {
            standardizer,
            omega,
            offset,
        })
    }

    /// Raw feature count `d`.
    pub fn input_dim(&self) -> usize {
        self.standardizer.dim()
    }

    /// Output dimension `p` (standardised features + random features + intercept).
    pub fn output_dim(&self) -> usize {
        self.input_dim() + self.omega.nrows() + 1
    }

    /// `φ(x)` for every row of `x`: `[z, rff(z), 1]`.
    pub fn apply(&self, x: ArrayView2<'_, f64>) -> Result<Array2<f64>, ModelError> {
        let z = self.standardizer.transform(x)?;
        let (n, d) = z.dim();
        let dr = self.omega.nrows();
        let mut phi = Array2::zeros((n, d + dr + 1));
        phi.slice_mut(s![.., ..d]).assign(&z);
        if dr > 0 {
            let mut proj = z.dot(&self.omega.t());
            let c = (2.0 / dr as f64).sqrt();
            for mut row in proj.rows_mut() {
                for (v, b) in row.iter_mut().zip(self.offset.iter()) {
                    *v = c * (*v + b).cos();
                }
            }
            phi.slice_mut(s![.., d..d + dr]).assign(&proj);
        }
        phi.index_axis_mut(Axis(1), d + dr).fill(1.0);
        Ok(phi)
    }
}
