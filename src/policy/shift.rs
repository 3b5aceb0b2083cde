//! Shift is not blame: a batch whose *items* are unlike the pool and the trusted set is reported as such
//! (`items_unlike_pool`, routed to operations), never as label trouble, and the labels of those items are
//! not judged (the trusted set does not reach them). Pure: arrays in, a report out.
//!
//! # Method: a Mahalanobis-distance share
//!
//! The reference sample `R` (the trusted items and the pool's reservoir, standardised features) gives a
//! mean `μ` and a covariance `Σ` with a ridge `ρ I` (so a small or degenerate sample still has an
//! inverse). An item's squared distance is `d²(x) = (x − μ)ᵀ (Σ + ρ I)⁻¹ (x − μ)` (Mahalanobis, "On the
//! generalised distance in statistics", 1936). An item is *beyond reach* when `d²` exceeds
//! `t = max(q̂, χ²_p(1 − ε))`, where `q̂` is the `unlike_quantile` empirical quantile of `d²` over `R`
//! and `χ²_p(1 − ε)` the chi-squared quantile with `p` degrees of freedom at `ε = 0.001`, from the
//! Wilson–Hilferty approximation `p (1 − 2/(9p) + z √(2/(9p)))³` (Wilson & Hilferty, "The distribution of
//! chi-square", PNAS 1931). The share of `R` beyond `t`, `τ` (at least `1 − unlike_quantile`), is what a
//! batch from the same population shows.
//!
//! A batch of `n` items with `u` beyond reach is *unlike the pool* when `u/n ≥ unlike_min_share` and
//! `P(X ≥ u | Bin(n, τ)) < unlike_alpha`. We chose the distance share over a kernel two-sample test
//! (Gretton et al., "A Kernel Two-Sample Test", JMLR 2012) because it also says *which* items lie beyond
//! reach, which the label rules need, at `O(n p²)` per batch.

use ndarray::{Array1, Array2, ArrayView2, Axis};
use serde::{Deserialize, Serialize};

use super::evidence::binomial_upper_tail;
use super::PolicySettings;
use crate::model::linalg::Cholesky;

/// `z` of the standard normal at 0.999 (tables; `Φ⁻¹(0.999) = 3.090232`).
const Z_0999: f64 = 3.090_232;

/// The chi-squared quantile at 0.999 with `p` degrees of freedom, by Wilson & Hilferty (1931):
/// `p (1 − 2/(9p) + z √(2/(9p)))³` with `z = Φ⁻¹(0.999)`.
pub fn chi2_quantile_0999(p: usize) -> f64 {
    let pf = p.max(1) as f64;
    let a = 2.0 / (9.0 * pf);
    pf * (1.0 - a + Z_0999 * a.sqrt()).powi(3)
}

/// The reach of a reference sample: its mean, the inverse-covariance factor and the distance threshold.
#[derive(Debug, Clone)]
pub struct Reach {
    mean: Array1<f64>,
    factor: Cholesky,
    /// The squared-distance threshold `t`.
    pub threshold: f64,
    /// `τ = 1 − unlike_quantile` (at least `1e-6`): the share of the reference sample beyond `t` is at
    /// most this (see [`Reach::fit`]).
    pub tail: f64,
    /// Items in the reference sample.
    pub reference_items: usize,
}

/// What the shift check found for one batch.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShiftReport {
    /// Per item of the batch: beyond the reference's reach.
    pub beyond: Vec<bool>,
    /// Items beyond reach.
    pub unlike_items: usize,
    /// The share of the reference beyond reach, `τ`.
    pub tail: f64,
}

impl Reach {
    /// Fit on a reference sample of standardised features (rows are items). `None` with fewer than 2
    /// items or a non-finite value.
    pub fn fit(settings: &PolicySettings, reference: ArrayView2<'_, f64>) -> Option<Self> {
        let (m, p) = reference.dim();
        if m < 2 || p == 0 || reference.iter().any(|v| !v.is_finite()) {
            return None;
        }
        let mean = reference.mean_axis(Axis(0))?;
        let centred = &reference - &mean;
        let mut cov = centred.t().dot(&centred) / (m as f64 - 1.0);
        for i in 0..p {
            cov[[i, i]] += settings.unlike_ridge;
        }
        let factor = Cholesky::factor(cov)?;
        let mut reach = Self {
            mean,
            factor,
            threshold: 0.0,
            tail: 0.0,
            reference_items: m,
        };
        let mut d = reach.distances(reference);
        d.sort_by(f64::total_cmp);
        let q = settings.unlike_quantile.clamp(0.5, 1.0);
        let idx = ((q * m as f64).ceil() as usize).clamp(1, m) - 1;
        reach.threshold = d[idx].max(chi2_quantile_0999(p));
        // The share of the reference beyond the threshold is at most `1 − q`: the threshold is at least
        // the reference's own `q` point, `d[idx]` with `idx + 1 = ⌈q m⌉`, and only the `m − ⌈q m⌉ ≤
        // (1 − q) m` items above that can lie beyond it. So the tail is `1 − q` (a mutation run found the
        // count of those items could never change it).
        reach.tail = (1.0 - q).max(1e-6);
        Some(reach)
    }

    /// Squared Mahalanobis distances `d²` of the rows of `x`.
    pub fn distances(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        x.rows()
            .into_iter()
            .map(|r| {
                let v = &r - &self.mean;
                let w = self.factor.solve(&v);
                v.dot(&w)
            })
            .collect()
    }

    /// Which rows of the batch `x` lie beyond reach (non-finite distances count as beyond).
    pub fn check(&self, x: ArrayView2<'_, f64>) -> ShiftReport {
        let beyond: Vec<bool> = self
            .distances(x)
            .into_iter()
            .map(|d| d.is_nan() || d > self.threshold)
            .collect();
        ShiftReport {
            unlike_items: beyond.iter().filter(|&&b| b).count(),
            beyond,
            tail: self.tail,
        }
    }
}

/// The reference sample: the standardised trusted items stacked on the first `d` columns (the
/// standardised features) of the pool reservoir's mapped features.
pub fn reference_sample(
    trusted_z: ArrayView2<'_, f64>,
    reservoir_phi: ArrayView2<'_, f64>,
) -> Array2<f64> {
    let d = trusted_z.ncols();
    let pool_rows = if reservoir_phi.ncols() >= d {
        reservoir_phi.nrows()
    } else {
        0
    };
    let mut out = Array2::zeros((trusted_z.nrows() + pool_rows, d));
    out.slice_mut(ndarray::s![..trusted_z.nrows(), ..])
        .assign(&trusted_z);
    if pool_rows > 0 {
        out.slice_mut(ndarray::s![trusted_z.nrows().., ..])
            .assign(&reservoir_phi.slice(ndarray::s![.., ..d]));
    }
    out
}

/// Whether a batch of `items` items with `unlike_items` beyond reach is unlike the pool, and the
/// binomial tail behind it.
pub fn unlike_pool(
    settings: &PolicySettings,
    items: usize,
    unlike_items: usize,
    tail: f64,
) -> (bool, f64) {
    if items == 0 || unlike_items == 0 {
        return (false, 1.0);
    }
    let p = binomial_upper_tail(unlike_items as u64, items as u64, tail);
    let share = unlike_items as f64 / items as f64;
    (
        share >= settings.unlike_min_share && p < settings.unlike_alpha,
        p,
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::Standardizer;
    use crate::scenario::Plant;

    #[test]
    fn wilson_hilferty_is_close_to_the_tabled_chi_squared_quantiles() {
        // Upper 0.001 points of chi-squared from the standard tables (e.g. Abramowitz & Stegun, table
        // 26.8): 10 df 29.588, 32 df 62.487 (values from memory of the tables; the approximation's
        // error is well under 1 % at these df).
        for (p, table) in [(10, 29.588), (32, 62.487)] {
            let q = chi2_quantile_0999(p);
            assert!((q - table).abs() / table < 0.01, "{p} df: {q} vs {table}");
        }
    }

    /// The plant's reference sample (standardised on itself) and a batch, standardised alike.
    fn plant(shift: f64, n: usize) -> (Array2<f64>, Array2<f64>) {
        let plant = Plant::new(11);
        let (r, _) = plant.sample(600, 1);
        let (mut b, _) = plant.sample(n, 2);
        for mut row in b.rows_mut() {
            for c in 0..8 {
                row[c] += shift;
            }
        }
        let st = Standardizer::fit(&[r.view()]).expect("fit");
        (
            st.transform(r.view()).unwrap(),
            st.transform(b.view()).unwrap(),
        )
    }

    #[test]
    fn a_batch_from_the_pool_population_is_not_unlike_it_and_a_shifted_one_is() {
        let s = PolicySettings::default();
        let (r, same) = plant(0.0, 300);
        let reach = Reach::fit(&s, r.view()).expect("reach");
        assert!(reach.tail >= 0.01 && reach.tail < 0.05, "{}", reach.tail);
        let rep = reach.check(same.view());
        assert!(
            !unlike_pool(&s, 300, rep.unlike_items, rep.tail).0,
            "{}",
            rep.unlike_items
        );
        // A sensor drift: eight readings offset (in raw units, several of the plant's spreads).
        let (_, shifted) = plant(4.0, 300);
        let rep = reach.check(shifted.view());
        let (unlike, p) = unlike_pool(&s, 300, rep.unlike_items, rep.tail);
        assert!(unlike, "{} of 300 beyond reach, tail {p}", rep.unlike_items);
        assert_eq!(rep.beyond.len(), 300);
    }

    #[test]
    fn a_degenerate_reference_gives_no_reach() {
        let s = PolicySettings::default();
        assert!(Reach::fit(&s, Array2::<f64>::zeros((1, 3)).view()).is_none());
        let mut bad = Array2::<f64>::zeros((5, 2));
        bad[[0, 0]] = f64::NAN;
        assert!(Reach::fit(&s, bad.view()).is_none());
    }

    /// `Reach::fit` refuses what cannot measure a reach, as documented: one item, no feature, a
    /// non-finite value; two items are enough (the ridge keeps the covariance positive definite). Written
    /// for a mutation run's missed mutants in its guard.
    #[test]
    fn a_reach_needs_two_items_some_features_and_finite_values() {
        let s = PolicySettings::default();
        let two = ndarray::array![[0.0, 1.0], [1.0, 0.0]];
        assert!(Reach::fit(&s, two.view()).is_some());
        assert!(Reach::fit(&s, two.slice(ndarray::s![..1, ..])).is_none());
        assert!(Reach::fit(&s, Array2::<f64>::zeros((5, 0)).view()).is_none());
        let mut bad = ndarray::array![[0.0, 1.0], [1.0, 0.0], [0.5, 0.5]];
        bad[[2, 1]] = f64::NAN;
        assert!(Reach::fit(&s, bad.view()).is_none());
        bad[[2, 1]] = f64::INFINITY;
        assert!(Reach::fit(&s, bad.view()).is_none());
    }

    /// `Reach::fit` worked by hand on two items of one feature, 1 and 3: mean 2, sample variance
    /// `((−1)² + 1²)/(2 − 1) = 2`, plus the ridge 0.1, so the squared distance of 5 is `3²/2.1` and of each
    /// reference item `1/2.1`. Neither reference item lies beyond the threshold (at least the chi-squared
    /// 0.999 point for one degree of freedom, 10.83 in the tables), so the tail is its floor
    /// `1 − unlike_quantile` = 0.01. Written for a mutation run's missed mutants in the centring, the
    /// `m − 1` divisor and the tail's floor.
    #[test]
    fn a_reach_is_the_ridged_sample_covariance_worked_by_hand() {
        let s = PolicySettings::default();
        assert_eq!((s.unlike_ridge, s.unlike_quantile), (0.1, 0.99));
        let r = Reach::fit(&s, ndarray::array![[1.0], [3.0]].view()).unwrap();
        let d = r.distances(ndarray::array![[5.0], [1.0], [3.0]].view());
        for (got, want) in d.iter().zip([9.0 / 2.1, 1.0 / 2.1, 1.0 / 2.1]) {
            assert!((got - want).abs() < 1e-12, "{d:?}");
        }
        assert!(r.threshold > 10.0 && r.threshold < 11.5, "{}", r.threshold);
        assert!((r.tail - 0.01).abs() < 1e-12, "{}", r.tail);
        assert_eq!(r.reference_items, 2);
    }

    /// The threshold is the `unlike_quantile` point of the reference's own distances when that lies above
    /// the chi-squared floor: 19 items at 0 and one at 100 (mean 5, sample variance
    /// `(19·5² + 95²)/19 = 500`, plus the ridge), the 0.99 point is the largest distance, `95²/500.1`
    /// (18.05 > 10.83), and nothing lies beyond it.
    #[test]
    fn the_threshold_is_the_reference_quantile_above_the_chi_squared_floor() {
        let s = PolicySettings::default();
        let mut x = Array2::<f64>::zeros((20, 1));
        x[[19, 0]] = 100.0;
        let r = Reach::fit(&s, x.view()).unwrap();
        let want = 95.0f64.powi(2) / 500.1;
        assert!(
            (r.threshold - want).abs() < 1e-9,
            "{} vs {want}",
            r.threshold
        );
        assert!(r.check(x.view()).beyond.iter().all(|b| !b));
        assert!((r.tail - 0.01).abs() < 1e-12);
    }

    /// With a reference large enough that its 0.99 point is not its largest distance, the threshold is
    /// that point: 197 items at 0 and three at 60, 80 and 100 (mean 1.2, sample variance
    /// `(197·1.2² + 58.8² + 78.8² + 98.8²)/199 = 19,712/199`, plus the ridge 0.1); `⌈0.99 · 200⌉ = 198`,
    /// so the threshold is the 198th distance, the item at 60: `58.8²/(19,712/199 + 0.1)` ≈ 34.87
    /// (above the floor 10.83), and the two items beyond it are the reference's 1 %. Written for a
    /// mutation run's missed mutant (`q * m` → `q + m` in the index gives the largest distance instead,
    /// which a 20-item reference could not tell apart).
    #[test]
    fn a_large_reference_puts_the_threshold_at_its_quantile_not_its_maximum() {
        let s = PolicySettings::default();
        let mut x = Array2::<f64>::zeros((200, 1));
        for (i, v) in [60.0, 80.0, 100.0].into_iter().enumerate() {
            x[[197 + i, 0]] = v;
        }
        let r = Reach::fit(&s, x.view()).unwrap();
        let want = 58.8f64.powi(2) / (19_712.0 / 199.0 + 0.1);
        assert!(
            (r.threshold - want).abs() < 1e-9,
            "{} vs {want}",
            r.threshold
        );
        let beyond = r.check(x.view()).beyond;
        assert_eq!(beyond.iter().filter(|b| **b).count(), 2, "80 and 100");
    }

    /// The reference sample: the trusted rows, then the reservoir's rows cut to the first `d` columns (its
    /// mapped features start with the standardised ones; the intercept and any further map columns are
    /// left out); a reservoir narrower than the trusted features (none yet) adds nothing. Written for a
    /// mutation run's missed mutants: no test called it directly.
    #[test]
    fn the_reference_sample_stacks_the_trusted_items_on_the_reservoirs_first_columns() {
        let trusted = ndarray::array![[1.0, 2.0], [3.0, 4.0]];
        let reservoir = ndarray::array![[5.0, 6.0, 1.0], [7.0, 8.0, 1.0], [9.0, 10.0, 1.0]];
        let both = reference_sample(trusted.view(), reservoir.view());
        assert_eq!(
            both,
            ndarray::array![[1.0, 2.0], [3.0, 4.0], [5.0, 6.0], [7.0, 8.0], [9.0, 10.0]]
        );
        // Exactly as wide as the trusted features: every row, every column.
        let exact = reference_sample(trusted.view(), reservoir.slice(ndarray::s![.., ..2]));
        assert_eq!(exact.nrows(), 5);
        let none = reference_sample(trusted.view(), Array2::<f64>::zeros((0, 3)).view());
        assert_eq!(none, trusted);
        let narrow = reference_sample(trusted.view(), Array2::<f64>::ones((4, 1)).view());
        assert_eq!(narrow, trusted);
    }

    /// `unlike_pool` worked by hand: nothing to judge without items or without items beyond reach; a
    /// share under `unlike_min_share` (0.25) is not unlike the pool however small its binomial tail (200
    /// of 1,000 where the pool has 1 %); 300 of 1,000 is. Written for a mutation run's missed mutants
    /// (the guard, the share, the conjunction).
    #[test]
    fn unlike_pool_needs_both_the_share_and_the_tail() {
        let s = PolicySettings::default();
        assert_eq!(unlike_pool(&s, 0, 5, 0.01), (false, 1.0));
        assert_eq!(unlike_pool(&s, 100, 0, 0.01), (false, 1.0));
        let (unlike, p) = unlike_pool(&s, 1_000, 200, 0.01);
        assert!(!unlike && p < s.unlike_alpha, "{p}");
        let (unlike, p) = unlike_pool(&s, 1_000, 300, 0.01);
        assert!(unlike && p < s.unlike_alpha, "{p}");
        // Many items beyond reach where the pool itself has many there: a share, but no surprise.
        let (unlike, p) = unlike_pool(&s, 1_000, 300, 0.3);
        assert!(!unlike && p > s.unlike_alpha, "{p}");
    }
}
