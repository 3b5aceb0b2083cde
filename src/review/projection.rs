//! The 2-D projection of a batch beside the trusted items on the review page (principal axes by power
//! iteration).

use std::collections::HashMap;

use ndarray::{Array1, Array2, ArrayView2, Axis};

use crate::data::Table;
use crate::store::{TrustedItem, WorkspaceMeta};

use super::{ProjectedPoint, Projection, ReviewError, PROJECTION_MAX_POINTS};

/// The two leading principal axes of the rows of `z` (standardised features), by power iteration.
///
/// With `Z̄` the column-centred data and `C = Z̄ᵀ Z̄ / n` its covariance, the first axis is the unit
/// eigenvector `v₁` of `C` with the largest eigenvalue `λ₁`: iterate `v ← C v / ‖C v‖` (computed as
/// `Z̄ᵀ (Z̄ v) / n`, never forming `C`) until `‖v_new − v_old‖ < tol`. The second axis iterates the
/// same map with `v₁` projected out after every step (`v ← v − (v₁ᵀ v) v₁`, deflation by
/// Gram–Schmidt). `λ_i = v_iᵀ C v_i`; the explained share is `λ_i / tr C` with `tr C = Σ_ij z̄_ij² / n`.
///
/// Returns `(axes as a d × 2 matrix, [λ₁, λ₂], tr C, column means)`.
pub(crate) fn principal_axes(z: ArrayView2<'_, f64>) -> (Array2<f64>, [f64; 2], f64, Array1<f64>) {
    let (n, d) = z.dim();
    let mean = if n > 0 {
        z.mean_axis(Axis(0)).unwrap_or_else(|| Array1::zeros(d))
    } else {
        Array1::zeros(d)
    };
    let zc = &z - &mean.view().insert_axis(Axis(0));
    let nn = n.max(1) as f64;
    let trace = zc.iter().map(|v| v * v).sum::<f64>() / nn;
    let apply = |v: &Array1<f64>| -> Array1<f64> { zc.t().dot(&zc.dot(v)) / nn };
    let mut axes = Array2::zeros((d, 2));
    let mut lambdas = [0.0; 2];
    for (k, lambda_k) in lambdas.iter_mut().enumerate().take(d.min(2)) {
        // Deterministic start, not orthogonal to any axis in general.
        let mut v = Array1::from_iter((0..d).map(|j| 1.0 + 0.1 * ((j * 7 + k * 3) % 11) as f64));
        let project_out = |v: &mut Array1<f64>, axes: &Array2<f64>| {
            for p in 0..k {
                let a = axes.column(p);
                let c = a.dot(v);
                v.scaled_add(-c, &a);
            }
        };
        project_out(&mut v, &axes);
        let norm = v.dot(&v).sqrt();
        if norm == 0.0 {
            break;
        }
        v /= norm;
        for _ in 0..1000 {
            let mut w = apply(&v);
            project_out(&mut w, &axes);
            let nw = w.dot(&w).sqrt();
            if nw <= 1e-300 {
                break;
            }
            w /= nw;
            // Fix the sign so that convergence is measured on the direction.
            if w.dot(&v) < 0.0 {
                w.mapv_inplace(|x| -x);
            }
            let diff = (&w - &v).mapv(|x| x * x).sum().sqrt();
            v = w;
            if diff < 1e-10 {
                break;
            }
        }
        *lambda_k = v.dot(&apply(&v));
        axes.column_mut(k).assign(&v);
    }
    (axes, lambdas, trace, mean)
}

pub(super) fn build_projection(
    meta: &WorkspaceMeta,
    table: &Table,
    suspicion: &[Option<f64>],
    proposed: &HashMap<&str, &str>,
    trusted: &[TrustedItem],
) -> Result<Projection, ReviewError> {
    let d = meta.features.len();
    let std = &meta.feature_map.standardizer;
    // Batch items: keep the most suspicious when there are too many.
    let mut order: Vec<usize> = (0..table.len()).collect();
    order.sort_by(|&a, &b| {
        let sa = suspicion.get(a).copied().flatten().unwrap_or(-1.0);
        let sb = suspicion.get(b).copied().flatten().unwrap_or(-1.0);
        sb.total_cmp(&sa).then(a.cmp(&b))
    });
    let mut omitted = 0;
    if order.len() > PROJECTION_MAX_POINTS {
        omitted += order.len() - PROJECTION_MAX_POINTS;
        order.truncate(PROJECTION_MAX_POINTS);
    }
    order.sort_unstable();
    let usable: Vec<&TrustedItem> = trusted.iter().filter(|t| t.features.len() == d).collect();
    let step = usable.len().div_ceil(PROJECTION_MAX_POINTS).max(1);
    let shown: Vec<&TrustedItem> = usable.iter().step_by(step).copied().collect();
    omitted += usable.len() - shown.len();
    let nb = order.len();
    let mut raw = Array2::zeros((nb + shown.len(), d));
    for (r, &i) in order.iter().enumerate() {
        raw.row_mut(r).assign(&table.features.row(i));
    }
    for (r, t) in shown.iter().enumerate() {
        raw.row_mut(nb + r)
            .assign(&ndarray::ArrayView1::from(&t.features[..]));
    }
    let z = std
        .transform(raw.view())
        .map_err(|e| ReviewError::Model(e.to_string()))?;
    let (axes, lambdas, trace, mean) = principal_axes(z.view());
    let coords = (&z - &mean.view().insert_axis(Axis(0))).dot(&axes);
    let mut points = Vec::with_capacity(coords.nrows());
    for (r, &i) in order.iter().enumerate() {
        let id = &table.ids[i];
        points.push(ProjectedPoint {
            group: "batch".into(),
            id: id.clone(),
            label: table.labels[i].clone(),
            proposed_label: proposed.get(id.as_str()).map(|s| s.to_string()),
            suspicion: suspicion.get(i).copied().flatten(),
            x: coords[[r, 0]],
            y: coords[[r, 1]],
        });
    }
    for (r, t) in shown.iter().enumerate() {
        points.push(ProjectedPoint {
            group: "trusted".into(),
            id: t.id.clone(),
            label: t.label.clone(),
            proposed_label: None,
            suspicion: None,
            x: coords[[nb + r, 0]],
            y: coords[[nb + r, 1]],
        });
    }
    let share = |l: f64| if trace > 0.0 { l / trace } else { 0.0 };
    Ok(Projection {
        method: "principal components of the standardised features (power iteration), batch and trusted items together".into(),
        explained: [share(lambdas[0]), share(lambdas[1])],
        points,
        omitted,
    })
}
