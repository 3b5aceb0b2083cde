//! Item-level admission: what happens to the *flagged* items of a batch the policy accepts.
//!
//! A batch verdict is about the batch; accepting it does not mean every item in it is right. An item is
//! flagged when the engine proposes a label other than the one given (its suspicion reached
//! `[model] flag_threshold`). Letting those items into the pool with their given labels would let through
//! most of the poison an accepted batch carries, so by default they wait for a reviewer
//! ([`FlaggedItems::Hold`]). A flag is a suspicion for review, not proof: a held item is not rejected, and
//! a reviewer can admit it with its given label, with the proposed label, or drop it.
//!
//! The rule is ours (common practice for human-in-the-loop data intake; no published source).

use serde::{Deserialize, Serialize};

/// What the flagged items of an accepted batch do (the `[admission] flagged` setting).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum FlaggedItems {
    /// Wait for a reviewer (the default): they stay out of the pool until admitted.
    Hold,
    /// Enter with the engine's proposed label where its confidence reaches
    /// [`AdmissionSettings::relabel_min_confidence`]; the others wait for a reviewer.
    Relabel,
    /// Never enter the pool (nothing waits for review).
    Drop,
    /// Enter with their given labels, like the rest of the batch (the behaviour before item-level
    /// admission; not recommended: the flagged items of accepted batches are where poison gets in).
    Enter,
}

/// The `[admission]` section.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct AdmissionSettings {
    /// What the flagged items of an accepted batch do: `"hold"` (default), `"relabel"`, `"drop"` or
    /// `"enter"`.
    pub flagged: FlaggedItems,
    /// With `flagged = "relabel"`: the least confidence in the proposed label (the engine's item
    /// `confidence`, in `[0, 1]`) for an item to enter with it. Default 0.9.
    pub relabel_min_confidence: f64,
}

impl Default for AdmissionSettings {
    fn default() -> Self {
        Self {
            flagged: FlaggedItems::Hold,
            relabel_min_confidence: 0.9,
        }
    }
}

/// Where one item of an accepted batch goes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ItemFate {
    /// Into the pool with its given label.
    Enter,
    /// Into the pool with the proposed label.
    EnterProposed,
    /// Out of the pool until a reviewer decides.
    Held,
    /// Out of the pool for good.
    Dropped,
}

impl ItemFate {
    /// Stable snake_case name (metrics label, audit detail).
    pub fn as_str(self) -> &'static str {
        match self {
            Self::Enter => "entered",
            Self::EnterProposed => "entered_proposed",
            Self::Held => "held",
            Self::Dropped => "dropped",
        }
    }
}

/// The fate of an item of an accepted batch: `flagged` when its proposed label differs from the given
/// one; `confidence` is the engine's confidence in the proposed label. A NaN confidence never reaches the
/// floor (the item is held).
pub fn item_fate(settings: &AdmissionSettings, flagged: bool, confidence: f64) -> ItemFate {
    if !flagged {
        return ItemFate::Enter;
    }
    match settings.flagged {
        FlaggedItems::Hold => ItemFate::Held,
        FlaggedItems::Drop => ItemFate::Dropped,
        FlaggedItems::Enter => ItemFate::Enter,
        FlaggedItems::Relabel if confidence >= settings.relabel_min_confidence => {
            ItemFate::EnterProposed
        }
        FlaggedItems::Relabel => ItemFate::Held,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn unflagged_items_enter_and_flagged_ones_follow_the_setting() {
        let mut s = AdmissionSettings::default();
        assert_eq!(s.flagged, FlaggedItems::Hold, "the safe default");
        assert_eq!(item_fate(&s, false, 0.1), ItemFate::Enter);
        assert_eq!(item_fate(&s, true, 0.99), ItemFate::Held);
        s.flagged = FlaggedItems::Drop;
        assert_eq!(item_fate(&s, true, 0.99), ItemFate::Dropped);
        assert_eq!(item_fate(&s, false, 0.99), ItemFate::Enter);
        s.flagged = FlaggedItems::Enter;
        assert_eq!(item_fate(&s, true, 0.99), ItemFate::Enter);
        s.flagged = FlaggedItems::Relabel;
        s.relabel_min_confidence = 0.8;
        assert_eq!(item_fate(&s, true, 0.8), ItemFate::EnterProposed);
        assert_eq!(item_fate(&s, true, 0.79), ItemFate::Held);
        assert_eq!(item_fate(&s, true, f64::NAN), ItemFate::Held);
    }
}
