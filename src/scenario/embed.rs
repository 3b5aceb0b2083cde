//! A seeded random encoder of the plant's sensor readings: invented 384-dimension "embeddings" for the
//! features-by-reference demo.
//!
//! **Invented data.** No pretrained model is involved: the encoder is a fixed random two-layer map drawn
//! from a seed, standing in for the image or spectrum encoder a plant team would run before sending items
//! to vendors. Row `x` (the 32 raw readings) becomes
//!
//! ```text
//! e = tanh( W · (x − μ) ⊘ σ / √32 + b ),   W ∈ ℝ^{d×32} standard normal, b uniform in [−0.5, 0.5]
//! ```
//!
//! with `μ`, `σ` the per-reading mean and spread of a reference sample (ChaCha8 seeded draws). `W` has
//! rank 32 almost surely, so the map is injective and close to linear where `|W z| / √32` is small: items
//! of one material stay close and the classes stay about as separable as in the readings, which is what a
//! useful encoder gives. The values are stored as `f32`, as an encoder's output would be.

use ndarray::{Array1, Array2, ArrayView2, Axis};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal, Uniform};

/// A fixed random encoder from the plant's readings to `dim` dimensions.
#[derive(Debug, Clone)]
pub struct Encoder {
    mean: Array1<f64>,
    spread: Array1<f64>,
    w: Array2<f64>,
    b: Array1<f64>,
}

impl Encoder {
    /// An encoder for inputs like `reference` (its rows set the standardisation), to `dim` dimensions,
    /// drawn from `seed`.
    pub fn new(reference: ArrayView2<'_, f64>, dim: usize, seed: u64) -> Self {
        let p = reference.ncols();
        let mean = reference
            .mean_axis(Axis(0))
            .unwrap_or_else(|| Array1::zeros(p));
        let spread = reference
            .std_axis(Axis(0), 0.0)
            .mapv(|s| if s > 1e-12 { s } else { 1.0 });
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let scale = 1.0 / (p.max(1) as f64).sqrt();
        let w = Array2::from_shape_fn((dim, p), |_| {
            let z: f64 = StandardNormal.sample(&mut rng);
            z * scale
        });
        let u = Uniform::new(-0.5, 0.5).unwrap_or_else(|_| unreachable!("valid range"));
        let b = Array1::from_shape_fn(dim, |_| u.sample(&mut rng));
        Self { mean, spread, w, b }
    }

    /// Output dimension.
    pub fn dim(&self) -> usize {
        self.w.nrows()
    }

    /// Encode rows of readings; the result is row-major `n × dim` 32-bit floats.
    pub fn encode(&self, x: ArrayView2<'_, f64>) -> Vec<f32> {
        let z = (&x - &self.mean) / &self.spread;
        let e = (z.dot(&self.w.t()) + &self.b).mapv(|v| v.tanh() as f32);
        e.into_iter().collect()
    }

    /// Column names `emb_000`, `emb_001`, ...
    pub fn names(&self) -> Vec<String> {
        (0..self.dim()).map(|j| format!("emb_{j:03}")).collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::scenario::Plant;

    #[test]
    fn encoding_is_seeded_bounded_and_keeps_items_apart() {
        let plant = Plant::new(3);
        let (x, _) = plant.sample(40, 1);
        let a = Encoder::new(x.view(), 384, 7);
        let e = a.encode(x.view());
        assert_eq!(e.len(), 40 * 384);
        assert!(e.iter().all(|v| v.abs() <= 1.0 && v.is_finite()));
        // Same seed, same encoder; another seed, another one.
        assert_eq!(Encoder::new(x.view(), 384, 7).encode(x.view()), e);
        assert_ne!(Encoder::new(x.view(), 384, 8).encode(x.view()), e);
        // Two different items do not collapse onto one embedding.
        assert_ne!(e[..384], e[384..768]);
        assert_eq!(a.names()[383], "emb_383");
    }
}
