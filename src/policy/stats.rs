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

/// Average run length of the one-sided upper CUSUM `S_i = max(0, S_{i−1} + z_i − k)`, signal when
/// `S_i > h`, for `z_i ~ N(shift, 1)` starting from `S_0 = 0`, by the Markov-chain approximation of
/// Brook & Evans ("An approach to the probability distribution of CUSUM run length", Biometrika 1972).
///
/// The interval `[0, h]` is cut into `states` cells of width `w = 2h / (2·states − 1)`; cell 0 is the
/// atom at 0 (values in `[0, w/2)`), cell `i ≥ 1` has midpoint `i·w`. With `Φ` the standard normal CDF the
/// transition probabilities of the transient cells are
///
/// `p_i0 = Φ(w/2 − i·w + k − shift)`, `p_ij = Φ((j − i)w + w/2 + k − shift) − Φ((j − i)w − w/2 + k − shift)`,
///
/// and the run lengths solve `(I − R) L = 1`; the result is `L_0`.
///
/// Used to document the false-alarm rate of the configured `h`; the two-sided ARL follows from
/// `1/ARL = 1/ARL⁺ + 1/ARL⁻`.
pub fn cusum_arl(k: f64, h: f64, shift: f64, states: usize) -> f64 {
    let n = states.max(2);
    let w = 2.0 * h / (2.0 * n as f64 - 1.0);
    // A = I − R, row-major n × n.
    let mut a = vec![0.0; n * n];
    for i in 0..n {
        for j in 0..n {
            let d = (j as f64 - i as f64) * w;
            let p = if j == 0 {
                normal_cdf(w / 2.0 - i as f64 * w + k - shift)
            } else {
                normal_cdf(d + w / 2.0 + k - shift) - normal_cdf(d - w / 2.0 + k - shift)
            };
            a[i * n + j] = if i == j { 1.0 - p } else { -p };
        }
    }
    let mut b = vec![1.0; n];
    solve_dense(&mut a, &mut b, n);
    b[0]
}

/// Gaussian elimination with partial pivoting, in place; `b` becomes the solution.
fn solve_dense(a: &mut [f64], b: &mut [f64], n: usize) {
    for col in 0..n {
        let piv = (col..n)
            .max_by(|&r, &s| a[r * n + col].abs().total_cmp(&a[s * n + col].abs()))
            .unwrap_or(col);
        if piv != col {
            for c in 0..n {
                a.swap(col * n + c, piv * n + c);
            }
            b.swap(col, piv);
        }
        let d = a[col * n + col];
        for r in col + 1..n {
            let f = a[r * n + col] / d;
            if f != 0.0 {
                for c in col..n {
                    a[r * n + c] -= f * a[col * n + c];
                }
                b[r] -= f * b[col];
            }
        }
    }
    for r in (0..n).rev() {
        let mut s = b[r];
        for c in r + 1..n {
            s -= a[r * n + c] * b[c];
        }
        b[r] = s / a[r * n + r];
    }
}

/// Standard normal CDF `Φ(x) = ½ erfc(−x/√2)`.
pub fn normal_cdf(x: f64) -> f64 {
    0.5 * erfc(-x / std::f64::consts::SQRT_2)
}

/// Complementary error function by the Chebyshev fit of Press et al., *Numerical Recipes* (2nd ed.,
/// §6.2, `erfcc`): fractional error below 1.2·10⁻⁷ everywhere.
fn erfc(x: f64) -> f64 {
    let z = x.abs();
    let t = 1.0 / (1.0 + 0.5 * z);
    let poly = -z * z - 1.265_512_23
        + t * (1.000_023_68
            + t * (0.374_091_96
                + t * (0.096_784_18
                    + t * (-0.186_288_06
                        + t * (0.278_868_07
                            + t * (-1.135_203_98
                                + t * (1.488_515_87 + t * (-0.822_152_23 + t * 0.170_872_77))))))));
    let r = t * poly.exp();
    if x >= 0.0 {
        r
    } else {
        2.0 - r
    }
}
