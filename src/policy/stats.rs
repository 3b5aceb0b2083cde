//! The statistics behind the policy: median, modified z-scores, the one-sided CUSUM and its average run
//! length, the standard normal distribution function.

use super::{MEAN_AD_CONSISTENCY, MODIFIED_Z_FACTOR};

/// Median of a non-empty slice (mean of the two middle values for even lengths); 0 for an empty one.
pub fn median(values: &[f64]) -> f64 {
    if values.is_empty() {
        return 0.0;
    }
    let mut v = values.to_vec();
    v.sort_by(f64::total_cmp);
    let n = v.len();
    if n % 2 == 1 {
        v[n / 2]
    } else {
        0.5 * (v[n / 2 - 1] + v[n / 2])
    }
}

/// Iglewicz & Hoaglin's modified z-scores of a sample, `M_i = 0.6745 (x_i − median) / MAD`; when MAD = 0,
/// `(x_i − median) / (1.253314 · meanAD)` (common practice). Returns `None` when both scales are 0.
pub fn modified_z_scores(values: &[f64]) -> Option<Vec<f64>> {
    let m = median(values);
    let dev: Vec<f64> = values.iter().map(|x| (x - m).abs()).collect();
    let mad = median(&dev);
    if mad > 0.0 {
        return Some(
            values
                .iter()
                .map(|x| MODIFIED_Z_FACTOR * (x - m) / mad)
                .collect(),
        );
    }
    let mean_ad = dev.iter().sum::<f64>() / values.len().max(1) as f64;
    (mean_ad > 0.0).then(|| {
        values
            .iter()
            .map(|x| (x - m) / (MEAN_AD_CONSISTENCY * mean_ad))
            .collect()
    })
}

/// One step of the upper tabular CUSUM on a standardised value: `S_i = max(0, S_{i−1} + z_i − k)`
/// (Montgomery & Runger, with target 0 and `K = k` in σ units).
pub fn cusum_step(previous: f64, z: f64, k: f64) -> f64 {
    (previous + z - k).max(0.0)
}
