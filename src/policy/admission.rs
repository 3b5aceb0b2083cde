//! Item-level admission: what happens to the *flagged* and the *unsure* items of a batch the policy
//! accepts.
//!
//! A batch verdict is about the batch; accepting it does not mean every item in it is right. An item is
//! flagged when the engine proposes a label other than the one given (its suspicion reached
//! `[model] flag_threshold`). Letting those items into the pool with their given labels would let through
//! most of the poison an accepted batch carries, so by default they wait for a reviewer
//! ([`FlaggedItems::Hold`]). A flag is a suspicion for review, not proof: a held item is not rejected, and
//! a reviewer can admit it with its given label, with the proposed label, or drop it.
//!
//! # Unsure items
//!
//! An attacker that knows the defence flips only the items the reference model is least sure of — those
//! on a class boundary. There a clean batch's labels fall on either side about as often as the model's
//! probabilities say, so flipping them swaps which items are flagged without changing how many: no count
//! over the batch can see it, and the flips the model happens to agree with are flagged by nothing. What
//! stays visible is *where* they are: every flip sits among the batch's highest unflagged suspicions. So
//! the `⌈unsure_share · n⌉` unflagged items with the highest suspicion, where it reaches
//! `unsure_min_suspicion`, wait for a reviewer as well ([`unsure_items`]): the engine cannot vouch for
//! their labels. The cost is review load, bounded by `unsure_share` of each accepted batch; measured with
//! `labelweir bench casebook` (see `config/labelweir.toml`).
//!
//! The rules are ours (common practice for human-in-the-loop data intake; no published source).

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
    /// The share of an accepted batch's items, taken from its unflagged items with the highest suspicion,
    /// that also wait for review as unsure (see the module documentation). 0 turns the rule off.
    pub unsure_share: f64,
    /// The least suspicion for an unflagged item to be unsure.
    pub unsure_min_suspicion: f64,
    /// An unflagged item whose suspicion reaches this is *in doubt* and waits like an unsure one, whatever
    /// the share ([`doubtful_items`]): where the classes
    /// overlap, a batch's flag line ([`crate::model::Assessment::flag_line`]) rises above
    /// `[model] flag_threshold` so that a flag stays rare on right labels, and the items between the floor
    /// and the line still wait for a reviewer rather than enter the pool. Default 0.5 (the floor's
    /// default); 1 turns it off.
    pub hold_suspicion: f64,
}

impl Default for AdmissionSettings {
    fn default() -> Self {
        Self {
            flagged: FlaggedItems::Hold,
            relabel_min_confidence: 0.9,
            unsure_share: 0.05,
            unsure_min_suspicion: 0.25,
            hold_suspicion: 0.5,
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

/// Which unflagged items are in doubt: those not flagged whose suspicion reaches `hold_suspicion`
/// (between the floor of the flag line and the batch's line, where the line rose above the floor). They
/// wait like the unsure items ([`unsure_fate`]).
pub fn doubtful_items(
    settings: &AdmissionSettings,
    suspicion: &[f64],
    flagged: &[bool],
) -> Vec<bool> {
    suspicion
        .iter()
        .zip(flagged)
        .map(|(&s, &f)| !f && s >= settings.hold_suspicion)
        .collect()
}

/// Which unflagged items are unsure: of the items neither flagged nor in doubt ([`doubtful_items`]),
/// the `⌈unsure_share · n⌉` with the highest suspicion (ties by position), among those whose suspicion
/// reaches `unsure_min_suspicion`; `n` counts every item of the batch. A NaN suspicion is never unsure
/// (such an item is flagged by the engine).
pub fn unsure_items(
    settings: &AdmissionSettings,
    suspicion: &[f64],
    flagged: &[bool],
) -> Vec<bool> {
    let n = suspicion.len();
    let quota = (settings.unsure_share * n as f64).ceil() as usize;
    let mut out = vec![false; n];
    let mut candidates: Vec<usize> = (0..n)
        .filter(|&i| {
            !flagged[i]
                && suspicion[i] >= settings.unsure_min_suspicion
                && suspicion[i] < settings.hold_suspicion
        })
        .collect();
    candidates.sort_by(|&a, &b| suspicion[b].total_cmp(&suspicion[a]).then(a.cmp(&b)));
    for &i in candidates.iter().take(quota) {
        out[i] = true;
    }
    out
}

/// The fate of an unsure item: it follows the `flagged` setting, except that with `relabel` it waits
/// for a reviewer (an unflagged item has no other label to enter with).
pub fn unsure_fate(settings: &AdmissionSettings) -> ItemFate {
    match settings.flagged {
        FlaggedItems::Hold | FlaggedItems::Relabel => ItemFate::Held,
        FlaggedItems::Drop => ItemFate::Dropped,
        FlaggedItems::Enter => ItemFate::Enter,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The fate names are a contract: the metric `labelweir_admission_items_total{fate=...}`, the runbook
    /// (`fate="held"`) and the audit details read them. Written for a mutation run's two missed mutants
    /// (`as_str` returning "" or "xyzzy"), which only the integration suite's metric scrape noticed.
    #[test]
    fn fate_names_are_the_ones_the_metrics_and_runbook_use() {
        let names: Vec<&str> = [
            ItemFate::Enter,
            ItemFate::EnterProposed,
            ItemFate::Held,
            ItemFate::Dropped,
        ]
        .iter()
        .map(|f| f.as_str())
        .collect();
        assert_eq!(names, ["entered", "entered_proposed", "held", "dropped"]);
    }

    /// Worked by hand: ten items, two flagged; a 0.2 share is a quota of 2; the unflagged suspicions at or
    /// above 0.25 are 0.45, 0.3, 0.3 and 0.25, so the two highest (0.45, then the first 0.3) are unsure.
    #[test]
    fn the_unflagged_items_with_the_highest_suspicion_are_unsure_up_to_the_share() {
        let s = AdmissionSettings {
            unsure_share: 0.2,
            ..AdmissionSettings::default()
        };
        let sus = [0.1, 0.9, 0.3, 0.45, 0.05, 0.3, 0.6, 0.25, 0.2, 0.0];
        let flagged = sus.map(|v| v >= 0.5);
        let u = unsure_items(&s, &sus, &flagged);
        let picked: Vec<usize> = (0..10).filter(|&i| u[i]).collect();
        assert_eq!(picked, [2, 3]);
        // Fewer candidates than the quota: only those reaching the floor.
        let s = AdmissionSettings {
            unsure_share: 0.9,
            ..s
        };
        let u = unsure_items(&s, &sus, &flagged);
        assert_eq!((0..10).filter(|&i| u[i]).collect::<Vec<_>>(), [2, 3, 5, 7]);
        // Off.
        let s = AdmissionSettings {
            unsure_share: 0.0,
            ..s
        };
        assert!(unsure_items(&s, &sus, &flagged).iter().all(|&v| !v));
        // A flag line above the hold line (0.7 here): the unflagged item at `hold_suspicion` (0.6, exactly
        // at it) is in doubt, and the share's quota is taken from the rest (0.45, then the first 0.3), not
        // from it. (Written for the mutation run of 2026-12-05: `<` → `<=` against `hold_suspicion` in
        // `unsure_items` let the item in doubt take a quota slot, [6, 3].)
        let s = AdmissionSettings {
            unsure_share: 0.2,
            hold_suspicion: 0.6,
            ..s
        };
        let flagged = sus.map(|v| v >= 0.7);
        let d = doubtful_items(&s, &sus, &flagged);
        assert_eq!((0..10).filter(|&i| d[i]).collect::<Vec<_>>(), [6]);
        let u = unsure_items(&s, &sus, &flagged);
        assert_eq!((0..10).filter(|&i| u[i]).collect::<Vec<_>>(), [2, 3]);
        // With the hold line at 1 nothing is in doubt and the quota takes 0.6 and 0.45.
        let s = AdmissionSettings {
            hold_suspicion: 1.0,
            ..s
        };
        assert!(doubtful_items(&s, &sus, &flagged).iter().all(|&v| !v));
        let u = unsure_items(&s, &sus, &flagged);
        assert_eq!((0..10).filter(|&i| u[i]).collect::<Vec<_>>(), [3, 6]);
    }

    #[test]
    fn unsure_items_wait_unless_the_setting_lets_flagged_items_in_or_drops_them() {
        let mut s = AdmissionSettings::default();
        assert_eq!(unsure_fate(&s), ItemFate::Held);
        s.flagged = FlaggedItems::Relabel;
        assert_eq!(unsure_fate(&s), ItemFate::Held);
        s.flagged = FlaggedItems::Drop;
        assert_eq!(unsure_fate(&s), ItemFate::Dropped);
        s.flagged = FlaggedItems::Enter;
        assert_eq!(unsure_fate(&s), ItemFate::Enter);
    }

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
