//! Quarantine review and trusted-set upkeep.
//!
//! A flag is a suspicion for human review, not proof: everything here exists so that a person decides.

use serde::{Deserialize, Serialize};

/// The `[trusted]` section of the configuration: the trusted set's rolling window, balance checks, and the
/// re-check of recently accepted batches after the set changes.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct TrustedSettings {
    /// Keep at most this many trusted items per class; when exceeded the oldest (by verification time)
    /// leave the set. Items; 0 = no limit. Default 0.
    pub max_items_per_class: usize,
    /// Trusted items verified longer ago than this leave the set (but never below
    /// `min_items_per_class` for their class). Days; 0 = no age limit. Default 0.
    pub max_age_days: u32,
    /// A class with fewer trusted items than this cannot be judged reliably: `trusted` commands and the
    /// daemon warn. Items; default 5.
    pub min_items_per_class: usize,
    /// After the trusted set changes, re-score at most this many of the most recently accepted batches.
    /// Batches; 0 disables the re-check. Default 20.
    pub rescore_lookback_batches: usize,
    /// ... and only those accepted within this many days. Days; 0 = no age limit. Default 7.
    pub rescore_lookback_days: u32,
}

impl Default for TrustedSettings {
    fn default() -> Self {
        Self {
            max_items_per_class: 0,
            max_age_days: 0,
            min_items_per_class: 5,
            rescore_lookback_batches: 20,
            rescore_lookback_days: 7,
        }
    }
}
