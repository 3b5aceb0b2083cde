//! The label-repair engine: numerics only.
//!
//! This module takes arrays and returns reports. It knows nothing of files, tokio, sled or paths, so the
//! daemon can call it from its scoring worker thread and tests can call it directly.
//!
//! # Method
//!
//! The engine implements bilevel label repair after Zhang, Zhu & Wright, "Training Set Debugging Using
//! Trusted Items", AAAI 2018. A vendor batch `B` is a small change to a clean training pipeline; we look for
//! the smallest change to `B`'s labels that makes the retrained model satisfy a post-condition: "fit the
//! trusted items at least as well as it should".
//!
//! * **Learner** ([`learner`]): L2-regularised multinomial logistic regression on standardised features
//!   (intercept not penalised), optionally on `[z, rff(z)]` with random Fourier features (Rahimi & Recht,
//!   "Random Features for Large-Scale Kernel Machines", NIPS 2007).
//! * **Relaxation**: each batch label `ŷ_i` becomes a point `Y_i` on the class simplex; the cost of a repair
//!   is the moved label mass `C(Y) = (1/n_B) Σ_i (1 − Y_i[ŷ_i])`, a number in `[0, 1]`.
//! * **Post-condition**: the confidence-weighted cross-entropy of the trusted items, `Φ(W)`.
//! * **Inner problem → optimality conditions**: `W*(Y)` satisfies `∇_W L(W*, Y) = 0`; by the implicit
//!   function theorem `∂Φ/∂Y_ik = (1/N) φ_iᵀ q_k` with `H q = ∇_W Φ` — one linear solve serves every label
//!   of the batch because the softmax Hessian `H` does not depend on the labels (Böhning 1992).
//! * **Penalty path** ([`repair`]): minimise `Φ(W*(Y)) + γ C(Y)` for a decreasing sequence of `γ` with warm
//!   starts; items are ranked by how early (at which `γ`) the repair moves their label mass.
//! * **Pool summary** ([`summary`]): the accepted pool enters through a second-order model of its mean loss
//!   around its optimum (gradient and Hessian), so scoring a batch costs the same whatever the pool size;
//!   a reservoir of pool items corrects the model beyond second order when a batch is a large share of the
//!   pool (exactly, while the pool fits in the reservoir); an exact mode re-solves over the pool's items to
//!   validate it.
//!
//! A flag is a suspicion for human review, not proof.

mod anchor;
pub mod calibration;
pub mod features;
pub mod kron;
pub mod learner;
pub mod linalg;
mod neighbours;
pub mod repair;
pub mod stories;
pub mod summary;
pub mod sweep;
pub mod truncated;

#[cfg(test)]
mod testkit;
#[cfg(test)]
mod tests;

use serde::{Deserialize, Serialize};

pub use anchor::TrustedAudit;
pub use features::{FeatureMap, Standardizer};
pub use learner::{Learner, TrainReport};
pub use repair::{
    assess, Assessment, Convergence, ItemScore, LabelFit, PoolInput, Timings, TrustedInput,
    TrustedItemReport,
};
pub use stories::{suspect_stories, SuspectStory};
pub use summary::{PoolSummary, PoolTerm};
pub use sweep::{SweepItem, SweepScorer};

/// Which feature map the learner uses on top of the standardised features.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case", deny_unknown_fields)]
pub enum FeatureMapKind {
    /// The standardised features themselves (plus an intercept).
    Linear,
    /// Standardised features followed by `dim` random Fourier features of an RBF kernel with the given
    /// bandwidth (Rahimi & Recht 2007); a bandwidth of 0 means `√d`.
    RandomFourier {
        /// Number of random features `D`.
        dim: usize,
        /// Kernel bandwidth `σ` in standardised units; 0 picks `√d`.
        bandwidth: f64,
    },
}

/// Model settings: the `[model]` section of the configuration file.
///
/// Defaults work on standardised data out of the box; see `config/labelweir.toml` for each key's meaning
/// and unit.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct ModelSettings {
    /// L2 weight `λ` on the non-intercept coefficients (mean-loss convention).
    pub l2: f64,
    /// Feature map.
    pub feature_map: FeatureMapKind,
    /// Seed for the random Fourier features and cross-fitting folds.
    pub seed: u64,
    /// Inner solve: stop when the gradient's Euclidean norm is below this.
    pub inner_tol: f64,
    /// Inner solve: iteration bound.
    pub inner_max_iters: u64,
    /// Linear solves (CG): relative residual tolerance.
    pub cg_tol: f64,
    /// Linear solves (CG): iteration bound.
    pub cg_max_iters: usize,
    /// Use a dense Cholesky factorisation instead of CG when the parameter count is at most this.
    pub dense_max_params: usize,
    /// Number of `γ` values on the decreasing penalty path.
    pub path_steps: usize,
    /// Ratio between the last and the first `γ` on the path.
    pub path_min_ratio: f64,
    /// Projected-gradient iterations per path step.
    pub repair_iters: usize,
    /// Times the learner is re-solved (re-linearised) at the repaired labels along the path.
    pub relinearisations: usize,
    /// Slack (nats) added to the trusted-loss target before a repair counts as sufficient.
    pub target_slack: f64,
    /// Weight of the repair-path signal in the combined suspicion while the reference model is cross-fitted
    /// (a pool too small for `min_reference_pool` and `reference_items_per_param`); the rest is the given label's disagreement with a
    /// reference model that has not seen the item.
    pub repair_weight: f64,
    /// Weight of the repair's signal once the pool model is the reference. The signal is then the label
    /// mass the repair moves at the target crossing (the items the post-condition needs relabelled),
    /// rather than the path score: a pool of accepted items, which the batch cannot have influenced, orders
    /// the other items better than the path does.
    pub pool_reference_repair_weight: f64,
    /// Folds used to cross-fit the reference model when the pool is too small to serve as one.
    pub cv_folds: usize,
    /// Pools with fewer items than this are not used alone as the reference model (unless
    /// `reference_items_per_param` says the pool is already large for the learner).
    pub min_reference_pool: usize,
    /// A pool with at least this many items per learner parameter (`p·K`) is the reference model even below
    /// `min_reference_pool`. A cross-fit over the batch's own folds has more data but learns the batch's
    /// systematic errors with it, while the pool cannot have seen them; which wins depends on how well the
    /// pool alone pins the learner down. Default 2, measured: on iris (15 parameters, pool 60, 20
    /// repetitions, `labelweir bench engine`) the pool reference lifts region flips at 20 % from AP 0.947
    /// to 0.997; on the recycling plant (264 parameters) pools of 100–150 items stay cross-fitted, where
    /// the pool reference doubled the cold-start false alarms (0 → 2–4 of 12 clean 300-item batches,
    /// `examples/policy_calibration.rs` with extra regimes).
    pub reference_items_per_param: f64,
    /// Wall-clock budget for one assessment, in milliseconds (every solve is also bounded by iterations).
    pub time_budget_ms: u64,
    /// The floor of a batch's flag line: no item whose suspicion is below this is flagged. Items whose
    /// suspicion reaches the batch's line ([`Assessment::flag_line`]) are flagged: their proposed label
    /// becomes the best alternative class.
    pub flag_threshold: f64,
    /// The share of a batch's items that may be flagged when the batch carries the right labels: each
    /// batch's flag line is raised above `flag_threshold` until a batch labelled the way the (calibrated)
    /// reference model expects would flag at most this share (see [`Assessment::flag_line`]). 1 keeps the
    /// line at `flag_threshold`.
    pub clean_flag_rate: f64,
    /// Capacity of the pool summary's reservoir, a uniform sample of pool items (0 turns it off). While the
    /// pool has at most this many items the summary is exact; beyond, the sample corrects the quadratic
    /// model of the pool's loss (see [`PoolSummary::term`]). Memory: `8·p` bytes per item.
    pub pool_reservoir: usize,
    /// The reservoir enters the training objective only when the batch has at least this share of the
    /// pool's size (`n_B ≥ share · n_P`); smaller batches move the model too little for the quadratic
    /// model to be off, and are scored at a cost that does not depend on the pool size.
    pub reservoir_min_share: f64,
    /// The published objective's confidence `c̄` on the trusted loss (Zhang, Zhu & Wright 2018 weight each
    /// trusted item with a large confidence; the value here is ours, chosen with `labelweir bench engine`).
    /// The trusted loss is a mean over the trusted items, so `c̄` is its weight against the relabelled
    /// data's mean training loss.
    pub trusted_confidence: f64,
    /// Weight `c̄_A` of the trusted items' mean loss in the trusted-anchored model (fitted jointly to the
    /// trusted items and pool ∪ batch as delivered); the share of the trusted items in its objective is
    /// `c̄_A / (1 + c̄_A)`.
    pub anchor_confidence: f64,
    /// Halvings of `γ` on the published objective's repair path (Algorithm 1).
    pub anchor_steps: usize,
    /// Trusted items nearest to a batch item that the trusted audit of the reference model looks at.
    pub trusted_neighbours: usize,
    /// Prior mean of a batch's share of wrong labels (the noise rate behind the suspicion).
    pub label_noise_prior: f64,
    /// Weight of that prior, in items: the batch's own estimate counts its items against this many.
    pub label_noise_prior_items: f64,
    /// Compute the clean level (the flags a batch carrying the right labels shows) with the reference
    /// model's *measured* sharpness instead of the model as it is (see [`calibration`]). The sharpness
    /// is measured and reported either way. On by default: measured with `labelweir bench casebook`
    /// (paired), it holds attacks sooner with the same clean-stream false alarms (see
    /// `config/labelweir.toml`).
    pub calibrate_clean_level: bool,
}

impl Default for ModelSettings {
    fn default() -> Self {
        Self {
            l2: 1e-3,
            feature_map: FeatureMapKind::Linear,
            seed: 7,
            inner_tol: 1e-7,
            inner_max_iters: 500,
            cg_tol: 1e-8,
            cg_max_iters: 500,
            dense_max_params: 2048,
            path_steps: 12,
            path_min_ratio: 1e-2,
            repair_iters: 4,
            relinearisations: 1,
            target_slack: 0.0,
            repair_weight: 0.2,
            pool_reference_repair_weight: 0.2,
            cv_folds: 5,
            min_reference_pool: 200,
            reference_items_per_param: 2.0,
            time_budget_ms: 30_000,
            flag_threshold: 0.5,
            clean_flag_rate: 0.03,
            pool_reservoir: 4096,
            reservoir_min_share: 0.02,
            trusted_confidence: 100.0,
            anchor_confidence: 3.0,
            anchor_steps: 12,
            trusted_neighbours: 10,
            label_noise_prior: 0.02,
            label_noise_prior_items: 50.0,
            calibrate_clean_level: true,
        }
    }
}

/// Errors from the numerics: only malformed arguments; a solve that did not converge is reported in the
/// result, not raised.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ModelError {
    /// Array shapes disagree.
    #[error("shape mismatch: {0}")]
    Shape(String),
    /// A label index is not below the number of classes.
    #[error("label {label} at row {row} is not below the class count {classes}")]
    Label {
        /// Row of the offending item.
        row: usize,
        /// The label index given.
        label: usize,
        /// The number of classes.
        classes: usize,
    },
    /// A feature value is NaN or infinite.
    #[error("non-finite feature value at row {row}, column {column}")]
    NonFinite {
        /// Row of the offending item.
        row: usize,
        /// Column of the offending value.
        column: usize,
    },
    /// Fewer than two classes, or an empty trusted set.
    #[error("degenerate problem: {0}")]
    Degenerate(String),
    /// Settings out of range.
    #[error("invalid model settings: {0}")]
    Settings(String),
}

impl ModelSettings {
    /// The wall-clock budget as a duration.
    pub fn time_budget(&self) -> std::time::Duration {
        std::time::Duration::from_millis(self.time_budget_ms)
    }

    /// Check ranges; the message names the offending key.
    pub fn validate(&self) -> Result<(), ModelError> {
        let bad = |k: &str, why: &str| Err(ModelError::Settings(format!("model.{k}: {why}")));
        if !self.l2.is_finite() || self.l2 <= 0.0 {
            return bad(
                "l2",
                "must be a finite number > 0 (the softmax is not identifiable without it)",
            );
        }
        if self.inner_tol.is_nan() || self.inner_tol <= 0.0 {
            return bad("inner_tol", "must be > 0");
        }
        if self.inner_max_iters == 0 || self.cg_max_iters == 0 {
            return bad("inner_max_iters / cg_max_iters", "must be ≥ 1");
        }
        if self.cg_tol.is_nan() || self.cg_tol <= 0.0 {
            return bad("cg_tol", "must be > 0");
        }
        if self.path_steps < 2 {
            return bad("path_steps", "must be ≥ 2");
        }
        if !(self.path_min_ratio > 0.0 && self.path_min_ratio < 1.0) {
            return bad("path_min_ratio", "must be in (0, 1)");
        }
        if self.repair_iters == 0 {
            return bad("repair_iters", "must be ≥ 1");
        }
        if !self.target_slack.is_finite() || self.target_slack < 0.0 {
            return bad("target_slack", "must be ≥ 0");
        }
        if !(0.0..=1.0).contains(&self.repair_weight) {
            return bad("repair_weight", "must be in [0, 1]");
        }
        if !(0.0..=1.0).contains(&self.pool_reference_repair_weight) {
            return bad("pool_reference_repair_weight", "must be in [0, 1]");
        }
        if self.reference_items_per_param.is_nan() || self.reference_items_per_param < 0.0 {
            return bad("reference_items_per_param", "must be ≥ 0 (inf: never)");
        }
        if self.cv_folds < 2 {
            return bad("cv_folds", "must be ≥ 2");
        }
        if !(0.0..=1.0).contains(&self.flag_threshold) {
            return bad("flag_threshold", "must be in [0, 1]");
        }
        if !(0.0..=1.0).contains(&self.clean_flag_rate) {
            return bad("clean_flag_rate", "must be in [0, 1]");
        }
        if self.pool_reservoir > 1 << 20 {
            return bad("pool_reservoir", "must be ≤ 1048576 items");
        }
        if !self.reservoir_min_share.is_finite() || self.reservoir_min_share < 0.0 {
            return bad("reservoir_min_share", "must be a finite number ≥ 0");
        }
        if !self.trusted_confidence.is_finite() || self.trusted_confidence < 0.0 {
            return bad("trusted_confidence", "must be a finite number ≥ 0");
        }
        if !self.anchor_confidence.is_finite() || self.anchor_confidence < 0.0 {
            return bad("anchor_confidence", "must be a finite number ≥ 0");
        }
        if self.anchor_steps == 0 || self.anchor_steps > 60 {
            return bad("anchor_steps", "must be in 1..=60");
        }
        if self.trusted_neighbours == 0 {
            return bad("trusted_neighbours", "must be ≥ 1");
        }
        if !(self.label_noise_prior > 0.0 && self.label_noise_prior < 0.5) {
            return bad("label_noise_prior", "must be in (0, 0.5)");
        }
        if !self.label_noise_prior_items.is_finite() || self.label_noise_prior_items < 0.0 {
            return bad("label_noise_prior_items", "must be a finite number ≥ 0");
        }
        if let FeatureMapKind::RandomFourier { dim, bandwidth } = self.feature_map {
            if dim == 0 || dim > 4096 || !bandwidth.is_finite() || bandwidth < 0.0 {
                return bad(
                    "feature_map",
                    "random_fourier needs 1 ≤ dim ≤ 4096 and bandwidth ≥ 0",
                );
            }
        }
        Ok(())
    }
}

/// Check that every label is below the class count.
pub(crate) fn check_labels(y: &[usize], classes: usize) -> Result<(), ModelError> {
    if classes < 2 {
        return Err(ModelError::Degenerate(format!(
            "need at least two classes, got {classes}"
        )));
    }
    match y.iter().enumerate().find(|(_, &l)| l >= classes) {
        Some((row, &label)) => Err(ModelError::Label {
            row,
            label,
            classes,
        }),
        None => Ok(()),
    }
}
