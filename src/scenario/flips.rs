//! Label-flip recipes (the attacks the benchmark and the demo plant) and writing a sample as a file.

use std::path::Path;

use ndarray::{ArrayView2, Axis};
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// Clamp a rate to `[0, 1]`; NaN counts as 0.
fn clamp_rate(rate: f64) -> f64 {
    if rate.is_nan() {
        0.0
    } else {
        rate.clamp(0.0, 1.0)
    }
}

/// Uniform random flips: `⌊rate · n⌋` items chosen at random, each moved to a class drawn uniformly from
/// the other `n_classes − 1`.
///
/// Recipe: the random label-flip baseline of Xiao, Xiao & Eckert, "Adversarial Label Flips Attack on
/// Support Vector Machines", ECAI 2012 (ε from 0 to 0.2 there). Returns the new labels and the mask of
/// flipped items; with fewer than two classes nothing is flipped. `rate` is clamped to `[0, 1]`.
pub fn uniform_flips(
    y: &[usize],
    n_classes: usize,
    rate: f64,
    seed: u64,
) -> (Vec<usize>, Vec<bool>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut out = y.to_vec();
    let mut mask = vec![false; y.len()];
    if n_classes < 2 {
        return (out, mask);
    }
    let m = (clamp_rate(rate) * y.len() as f64).floor() as usize;
    let mut idx: Vec<usize> = (0..y.len()).collect();
    idx.shuffle(&mut rng);
    for &i in idx.iter().take(m) {
        // A uniform draw among the other classes: draw from n_classes − 1 and skip the given one.
        let mut k = rng.random_range(0..n_classes - 1);
        if k >= y[i] {
            k += 1;
        }
        out[i] = k;
        mask[i] = true;
    }
    (out, mask)
}

/// Class-targeted (pair) flips: within class `from`, `⌊rate · n_from⌋` items chosen at random get label
/// `to`.
///
/// Recipe: the common pair / class-conditional label-noise protocol (`rate` < 0.5 there, so that `from`
/// stays the majority label of its items; larger rates are allowed here). Returns the new labels and the
/// flipped mask; nothing is flipped when `from == to`. `rate` is clamped to `[0, 1]`.
pub fn targeted_flips(
    y: &[usize],
    from: usize,
    to: usize,
    rate: f64,
    seed: u64,
) -> (Vec<usize>, Vec<bool>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut out = y.to_vec();
    let mut mask = vec![false; y.len()];
    if from == to {
        return (out, mask);
    }
    let mut members: Vec<usize> = (0..y.len()).filter(|&i| y[i] == from).collect();
    let m = (clamp_rate(rate) * members.len() as f64).floor() as usize;
    members.shuffle(&mut rng);
    for &i in members.iter().take(m) {
        out[i] = to;
        mask[i] = true;
    }
    (out, mask)
}

/// Region (systematic) flips: the `⌊rate · n⌋` items nearest to a random centre, among those not already
/// labeled `to`, get label `to`.
///
/// The centre is a random item not labeled `to` (drawn from `seed`); see [`region_flips_around`] for the
/// distance. Recipe: the systematic-bias setting of Zhang, Zhu & Wright, "Training Set Debugging Using
/// Trusted Items", AAAI 2018 (flip the items inside one region of feature space to one class). Returns the
/// new labels and the flipped mask. `rate` is clamped to `[0, 1]`.
///
/// On the plant's 32 noisy readings such a region spans several neighbouring sub-populations; for a
/// vendor's mistake in the plant's own terms (wet cardboard labeled paper) use [`subpopulation_flips`].
pub fn region_flips(
    x: ArrayView2<'_, f64>,
    y: &[usize],
    to: usize,
    rate: f64,
    seed: u64,
) -> (Vec<usize>, Vec<bool>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let candidates: Vec<usize> = (0..y.len().min(x.nrows()))
        .filter(|&i| y[i] != to)
        .collect();
    if candidates.is_empty() {
        return (y.to_vec(), vec![false; y.len()]);
    }
    let centre = candidates[rng.random_range(0..candidates.len())];
    region_flips_around(x, y, centre, to, rate)
}

/// Region flips around a given centre item: the `⌊rate · n⌋` items nearest to row `centre`, among those
/// not labeled `to`, get label `to` (ties by row order).
///
/// Distances are Euclidean on the features standardised by the batch's own column means and (population)
/// standard deviations; constant columns are ignored. A `centre` out of range flips nothing.
pub fn region_flips_around(
    x: ArrayView2<'_, f64>,
    y: &[usize],
    centre: usize,
    to: usize,
    rate: f64,
) -> (Vec<usize>, Vec<bool>) {
    let mut out = y.to_vec();
    let mut mask = vec![false; y.len()];
    let n = y.len().min(x.nrows());
    if centre >= n {
        return (out, mask);
    }
    let candidates: Vec<usize> = (0..n).filter(|&i| y[i] != to).collect();
    let m = ((clamp_rate(rate) * y.len() as f64).floor() as usize).min(candidates.len());
    let mean = x
        .mean_axis(Axis(0))
        .unwrap_or_else(|| ndarray::Array1::zeros(x.ncols()));
    let sd = x.std_axis(Axis(0), 0.0);
    let dist = |i: usize| -> f64 {
        (0..x.ncols())
            .filter(|&j| sd[j] > 1e-12 * mean[j].abs().max(1.0))
            .map(|j| ((x[[i, j]] - x[[centre, j]]) / sd[j]).powi(2))
            .sum()
    };
    let mut by_dist: Vec<(f64, usize)> = candidates.iter().map(|&i| (dist(i), i)).collect();
    by_dist.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
    for &(_, i) in by_dist.iter().take(m) {
        out[i] = to;
        mask[i] = true;
    }
    (out, mask)
}

/// Systematic flips in the plant's own terms: `⌊rate · n_S⌋` random items of the given sub-populations `S`
/// (indices into [`super::Plant::subpopulations`]), among those not already labeled `to`, get label `to` — e.g. a
/// vendor who labels wet cardboard as paper. The same systematic-bias setting as [`region_flips`] (Zhang,
/// Zhu & Wright 2018), with the region given by the sub-population. `rate` is clamped to `[0, 1]`.
pub fn subpopulation_flips(
    y: &[usize],
    subpopulation: &[usize],
    which: &[usize],
    to: usize,
    rate: f64,
    seed: u64,
) -> (Vec<usize>, Vec<bool>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut out = y.to_vec();
    let mut mask = vec![false; y.len()];
    let mut members: Vec<usize> = (0..y.len().min(subpopulation.len()))
        .filter(|&i| which.contains(&subpopulation[i]) && y[i] != to)
        .collect();
    let m = (clamp_rate(rate) * members.len() as f64).floor() as usize;
    members.shuffle(&mut rng);
    for &i in members.iter().take(m) {
        out[i] = to;
        mask[i] = true;
    }
    (out, mask)
}

/// Write a labeled table to `path` as CSV (header `id,label,<names>`).
pub fn write_csv(
    path: &Path,
    ids: &[String],
    labels: &[String],
    names: &[String],
    x: ArrayView2<'_, f64>,
) -> std::io::Result<()> {
    let f = std::io::BufWriter::new(std::fs::File::create(path)?);
    crate::data::write_csv(f, ("id", "label"), ids, labels, names, x)
}

/// Write a labeled table to `path` as JSON Lines (keys `id`, `label`, `<names>`).
pub fn write_jsonl(
    path: &Path,
    ids: &[String],
    labels: &[String],
    names: &[String],
    x: ArrayView2<'_, f64>,
) -> std::io::Result<()> {
    let f = std::io::BufWriter::new(std::fs::File::create(path)?);
    crate::data::write_jsonl(f, ("id", "label"), ids, labels, names, x)
}
