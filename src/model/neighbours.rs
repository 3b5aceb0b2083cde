//! The trusted neighbours' labels model: what the expert-verified items near a batch item say its label
//! is, with no learner and no vendor's label involved.
//!
//! For a point `x` and class `c`, let `d_c(x)` be the distance (in the learner's feature space) to the
//! nearest trusted item verified as `c`. The neighbours' probability of `c` is
//!
//! `p_N(c | x) = ε/K + (1 − ε) · d_c^{−α} / Σ_{c′} d_{c′}^{−α}`,
//!
//! a class's weight falling with the distance to its nearest verified example (a class without a trusted
//! item weighs 0; `ε = 0.05` keeps every probability away from 0). For two classes the neighbours' doubt
//! `1 − p_N(given)` is an increasing function of the nearest-trusted-neighbour ratio
//! `d_same / (d_same + d_other)` (`crate::eval::baselines::nearest_trusted`), so it ranks items exactly
//! as that baseline does; for more classes it weighs every class's nearest verified item, not only the
//! nearest one. `α` is chosen from a short grid by the trusted items' leave-one-out log-likelihood
//! `Σ_t ln p_N^{(−t)}(y_t | x_t)`: sharp where the verified classes are well apart, soft where they
//! overlap. (A distance-weighted nearest-neighbour rule: Dudani, "The Distance-Weighted
//! k-Nearest-Neighbor Rule", IEEE Trans. SMC 1976; the per-class nearest distance and the choice of `α`
//! by leave-one-out are ours, common practice with no single source.)
//!
//! Why it is in the engine: a reference model that has learned a vendor's bias — from a poisoned pool, or
//! from the batch itself at cold start — agrees with the biased labels, and so does a model anchored on
//! the trusted items but trained beside the same data; the verified items near a biased item do not. The
//! fusion (`repair::fusion`) reads the neighbours' doubt where the trusted audit has found the reference
//! unsound, beside the trusted-anchored doubt.

use ndarray::{Array2, ArrayView2};

/// Floor mass `ε` of the neighbours' model.
const FLOOR: f64 = 0.05;
/// The grid `α` is chosen from.
const SHARPNESS_GRID: [f64; 6] = [0.5, 1.0, 2.0, 4.0, 8.0, 16.0];

/// The trusted neighbours' labels model for a batch.
#[derive(Debug, Clone)]
pub(crate) struct NeighbourModel {
    /// `p_N(c | x_j)` for each batch item `j` and class `c` (`n_B × K`).
    pub(crate) p: Array2<f64>,
    /// The chosen sharpness `α` (0 when there were too few trusted items to choose one).
    pub(crate) sharpness: f64,
}

impl NeighbourModel {
    /// No trusted evidence (fewer than two trusted items, or one class): `p_N` uniform, the doubt of every
    /// label `1 − 1/K`, the same for every item and label, so it orders nothing. (With fewer than two
    /// trusted items the trusted audit raises no weight either, and the fusion never reads it.)
    pub(crate) fn uniform(n_b: usize, k: usize) -> Self {
        Self {
            p: Array2::from_elem((n_b, k), 1.0 / k.max(1) as f64),
            sharpness: 0.0,
        }
    }

    /// The neighbours' doubt of item `j` carrying label `c`: `1 − p_N(c | x_j)`.
    pub(crate) fn doubt(&self, j: usize, c: usize) -> f64 {
        (1.0 - self.p[[j, c]]).clamp(0.0, 1.0)
    }
}

/// Squared Euclidean distances between the rows of `a` and of `b`: `‖a_i‖² + ‖b_j‖² − 2 a_i·b_j`, floored
/// at 0 (rounding).
pub(crate) fn squared_distances(a: ArrayView2<'_, f64>, b: ArrayView2<'_, f64>) -> Array2<f64> {
    let na: Vec<f64> = a.rows().into_iter().map(|r| r.dot(&r)).collect();
    let nb: Vec<f64> = b.rows().into_iter().map(|r| r.dot(&r)).collect();
    let mut d = a.dot(&b.t());
    for ((i, j), v) in d.indexed_iter_mut() {
        *v = (na[i] + nb[j] - 2.0 * *v).max(0.0);
    }
    d
}

/// `ln d_c` to the nearest trusted item of each class (`None` for a class without one, the item `skip`
/// left out), from one row of squared distances. Coincident points get a tiny distance instead of
/// `ln 0 = −∞`.
fn log_nearest(
    row: ndarray::ArrayView1<'_, f64>,
    y_t: &[usize],
    k: usize,
    skip: Option<usize>,
) -> Vec<Option<f64>> {
    let mut best = vec![f64::INFINITY; k];
    for (t, (&d2, &c)) in row.iter().zip(y_t).enumerate() {
        if Some(t) != skip && d2 < best[c] {
            best[c] = d2;
        }
    }
    best.into_iter()
        .map(|d2| d2.is_finite().then(|| 0.5 * d2.max(1e-24).ln()))
        .collect()
}

/// `p_N(· | x)` into `out` from the log-distances to each class's nearest trusted item (module docs),
/// computed as a softmax of `−α ln d_c` for numerical range.
fn probabilities(log_d: &[Option<f64>], alpha: f64, out: &mut [f64]) {
    let k = out.len();
    let top = log_d
        .iter()
        .flatten()
        .map(|&l| -alpha * l)
        .fold(f64::NEG_INFINITY, f64::max);
    let mut total = 0.0;
    for (o, l) in out.iter_mut().zip(log_d) {
        *o = l.map_or(0.0, |l| (-alpha * l - top).exp());
        total += *o;
    }
    for o in out.iter_mut() {
        let share = if total > 0.0 {
            *o / total
        } else {
            1.0 / k as f64
        };
        *o = FLOOR / k as f64 + (1.0 - FLOOR) * share;
    }
}

/// The trusted neighbours' labels model for the batch items, from the trusted items `phi_t` (the
/// learner's feature space), their verified labels `y_t` and `d_bt`, the squared distances from each batch
/// item to each trusted item ([`squared_distances`]; module docs).
pub(crate) fn neighbour_model(
    phi_t: ArrayView2<'_, f64>,
    y_t: &[usize],
    d_bt: ArrayView2<'_, f64>,
    k: usize,
) -> NeighbourModel {
    let (m, n_b) = (y_t.len(), d_bt.nrows());
    if m < 2 || k < 2 || y_t.iter().any(|&c| c >= k) {
        return NeighbourModel::uniform(n_b, k);
    }
    let d_tt = squared_distances(phi_t, phi_t);
    let loo: Vec<Vec<Option<f64>>> = (0..m)
        .map(|t| log_nearest(d_tt.row(t), y_t, k, Some(t)))
        .collect();
    let mut p = vec![0.0; k];
    let mut loo_log_likelihood = |alpha: f64| -> f64 {
        (0..m)
            .map(|t| {
                probabilities(&loo[t], alpha, &mut p);
                p[y_t[t]].ln()
            })
            .sum()
    };
    let alpha = SHARPNESS_GRID
        .iter()
        .map(|&a| (a, loo_log_likelihood(a)))
        .max_by(|a, b| a.1.total_cmp(&b.1))
        .map_or(1.0, |(a, _)| a);
    let mut probs = Array2::zeros((n_b, k));
    let mut row = vec![0.0; k];
    for j in 0..n_b {
        probabilities(&log_nearest(d_bt.row(j), y_t, k, None), alpha, &mut row);
        for (c, &v) in row.iter().enumerate() {
            probs[[j, c]] = v;
        }
    }
    NeighbourModel {
        p: probs,
        sharpness: alpha,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    /// Two classes: the doubt ranks items exactly as the nearest-trusted-neighbour ratio
    /// `d_same / (d_same + d_other)` does (`crate::eval::baselines`), and with `α = 1` it is that ratio
    /// squeezed into `[ε/2, 1 − ε/2]`: `1 − p_N(g) = ε/2 + (1 − ε)·d_g/(d_g + d_o)` (worked from the
    /// definition in the module docs).
    #[test]
    fn with_two_classes_the_doubt_orders_items_as_the_nearest_neighbour_ratio() {
        let log_d = |dg: f64, d_o: f64| vec![Some(dg.ln()), Some(d_o.ln())];
        let mut p = [0.0; 2];
        for (dg, d_o) in [(1.0, 9.0), (3.0, 2.0), (5.0, 5.0), (0.5, 4.0)] {
            probabilities(&log_d(dg, d_o), 1.0, &mut p);
            let want = FLOOR / 2.0 + (1.0 - FLOOR) * dg / (dg + d_o);
            assert!(
                (1.0 - p[0] - want).abs() < 1e-12,
                "{dg} {d_o}: {} vs {want}",
                1.0 - p[0]
            );
        }
        // Trusted: class 0 at x = 0 and 1, class 1 at x = 10 and 11. Batch items labelled 0 at x = 2, 6,
        // 9: the ratio rises with x, and so must the doubt, whatever α the leave-one-out picks.
        let t = array![[0.0], [1.0], [10.0], [11.0]];
        let b = array![[2.0], [6.0], [9.0]];
        let model = neighbour_model(
            t.view(),
            &[0, 0, 1, 1],
            squared_distances(b.view(), t.view()).view(),
            2,
        );
        let d: Vec<f64> = (0..3).map(|j| model.doubt(j, 0)).collect();
        assert!(d[0] < d[1] && d[1] < d[2], "{d:?}");
        assert!(d[0] < 0.5 && d[2] > 0.5, "{d:?}");
        assert!(model.sharpness > 0.0);
    }

    /// Each row is a distribution with every class at least `ε/K`; a class with no trusted item gets
    /// exactly the floor; the leave-one-out choice of `α` picks the sharpest grid value on well-separated
    /// classes (every trusted item's own class is nearest).
    #[test]
    fn rows_are_distributions_and_separated_classes_are_sharp() {
        let t = array![[0.0, 0.0], [0.0, 1.0], [5.0, 0.0], [5.0, 1.0]];
        let b = array![[0.1, 0.0], [2.5, 0.5], [4.0, 0.5]];
        let model = neighbour_model(
            t.view(),
            &[0, 0, 1, 1],
            squared_distances(b.view(), t.view()).view(),
            3,
        );
        for row in model.p.rows() {
            assert!((row.sum() - 1.0).abs() < 1e-12);
            assert!(row.iter().all(|&v| v >= FLOOR / 3.0 - 1e-15));
            assert!(
                (row[2] - FLOOR / 3.0).abs() < 1e-12,
                "class 2 has no trusted item"
            );
        }
        assert_eq!(model.sharpness, SHARPNESS_GRID[SHARPNESS_GRID.len() - 1]);
        assert!(model.p[[0, 0]] > 0.9 && model.p[[2, 1]] > 0.9);
        // Halfway between the two classes the neighbours cannot tell.
        assert!((model.p[[1, 0]] - model.p[[1, 1]]).abs() < 1e-9);
    }

    /// The nearest trusted item of each class is the *nearest*, not the last one read, and the item left
    /// out is left out: squared distances `[1, 4, 16, 9]` to items of classes `[0, 0, 1, 1]` give
    /// `ln d = (ln 1, ln 3)`; leaving item 0 out, `(ln 2, ln 3)`; a class with no item, `None` (worked by
    /// hand; `ln d = ½ ln d²`).
    #[test]
    fn the_nearest_item_of_each_class_counts_and_the_left_out_one_does_not() {
        let row = array![1.0, 4.0, 16.0, 9.0];
        let close = |got: &[Option<f64>], want: &[Option<f64>]| {
            got.len() == want.len()
                && got.iter().zip(want).all(|(g, w)| match (g, w) {
                    (Some(g), Some(w)) => (g - w).abs() < 1e-12,
                    (None, None) => true,
                    _ => false,
                })
        };
        let all = log_nearest(row.view(), &[0, 0, 1, 1], 3, None);
        assert!(close(&all, &[Some(0.0), Some(3f64.ln()), None]), "{all:?}");
        let loo = log_nearest(row.view(), &[0, 0, 1, 1], 3, Some(0));
        assert!(
            close(&loo, &[Some(2f64.ln()), Some(3f64.ln()), None]),
            "{loo:?}"
        );
    }

    /// The weights are computed shifted by their largest exponent, so distances far below 1 at a sharp
    /// `α` stay finite: `ln d = (−60, −59)` at `α = 16` would be `e^960` unshifted (∞, and ∞/∞ = NaN);
    /// shifted, `p_N(0) = ε/2 + (1 − ε)/(1 + e^{−16})`. With no trusted item of any class the model is
    /// uniform (worked by hand from the module docs' formula).
    #[test]
    fn extreme_distances_stay_finite_and_no_evidence_is_uniform() {
        let mut p = [0.0; 2];
        probabilities(&[Some(-60.0), Some(-59.0)], 16.0, &mut p);
        let want = FLOOR / 2.0 + (1.0 - FLOOR) / (1.0 + (-16f64).exp());
        assert!(
            (p[0] - want).abs() < 1e-12 && (p[0] + p[1] - 1.0).abs() < 1e-12,
            "{p:?}"
        );
        let mut q = [0.0; 4];
        probabilities(&[None, None, None, None], 2.0, &mut q);
        assert!(q.iter().all(|&v| (v - 0.25).abs() < 1e-12), "{q:?}");
    }

    /// Too little trusted evidence (one item, or a label outside the classes): uniform, no sharpness; two
    /// items are enough.
    #[test]
    fn one_trusted_item_says_nothing() {
        let t = array![[0.0]];
        let d = squared_distances(array![[3.0], [4.0]].view(), t.view());
        let model = neighbour_model(t.view(), &[1], d.view(), 3);
        assert!(model.p.iter().all(|&v| (v - 1.0 / 3.0).abs() < 1e-12));
        assert_eq!(model.sharpness, 0.0);
        // A label outside the classes (the engine checks labels before, this is the guard): uniform too.
        let t2 = array![[0.0], [10.0]];
        let d2 = squared_distances(array![[1.0]].view(), t2.view());
        let bad = neighbour_model(t2.view(), &[0, 7], d2.view(), 3);
        assert!(bad.p.iter().all(|&v| (v - 1.0 / 3.0).abs() < 1e-12));
        // Two trusted items are enough: the item at x = 1 is class 0's.
        let two = neighbour_model(t2.view(), &[0, 1], d2.view(), 3);
        assert!(two.sharpness > 0.0 && two.p[[0, 0]] > 0.5, "{:?}", two.p);
    }
}
