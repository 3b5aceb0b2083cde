//! Small problems shared by the engine's unit tests: three Gaussian classes in two features, settings that
//! solve them tightly, and a deadline that never bites.

use std::time::{Duration, Instant};

use ndarray::Array2;
use rand::{Rng, SeedableRng};

use crate::model::ModelSettings;

/// Three Gaussian classes in two features (plus the intercept column the learner expects last):
/// `n` rows, class `i % 3`, centres on a triangle.
pub(crate) fn blobs(n: usize, seed: u64) -> (Array2<f64>, Vec<usize>) {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let centres = [(-1.5, 0.0), (1.5, 0.0), (0.0, 2.0)];
    let mut phi = Array2::zeros((n, 3));
    let mut y = Vec::with_capacity(n);
    for i in 0..n {
        let c = i % 3;
        phi[[i, 0]] = centres[c].0 + rng.random_range(-0.8..0.8);
        phi[[i, 1]] = centres[c].1 + rng.random_range(-0.8..0.8);
        phi[[i, 2]] = 1.0;
        y.push(c);
    }
    (phi, y)
}

/// Settings that solve the small problems to near machine precision.
pub(crate) fn tight() -> ModelSettings {
    ModelSettings {
        l2: 0.05,
        inner_tol: 1e-11,
        inner_max_iters: 200,
        trusted_confidence: 5.0,
        ..ModelSettings::default()
    }
}

/// A deadline a minute away.
pub(crate) fn far() -> Instant {
    Instant::now() + Duration::from_secs(60)
}
