//! The evaluation kit: ranking metrics, two baselines and the attack benchmark behind `labelweir bench`.
//!
//! The engine ([`crate::model`]) claims that the items whose labels a bilevel repair (Zhang, Zhu & Wright,
//! "Training Set Debugging Using Trusted Items", AAAI 2018) moves first are the mislabeled ones. This module
//! measures that claim: it plants label flips with known ground truth, scores the batch with the engine and
//! with two simple baselines, and reports item-level ranking metrics for each.
//!
//! * [`metrics`]: AUROC (Mann–Whitney with ties), average precision, precision at a recall level,
//!   proposed-label accuracy among the top `k`, Spearman's ρ.
//! * [`baselines`]: nearest-trusted-neighbour label disagreement and the given label's cross-validated loss.
//!
//! A high score is a suspicion for human review, not proof that a vendor mislabeled anything.

pub mod baselines;
pub mod benchmark;
pub mod casebook;
pub mod metrics;
pub mod scale;
pub mod throughput;
