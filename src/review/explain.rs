//! What `quarantine show` and the review page explain about a batch beyond its scores: the engine's signals
//! in plain words, the flagged items grouped by (given → proposed), and per flagged item its feature values
//! against the class profiles of the trusted items and its nearest trusted items.
//!
//! Everything here is a suspicion for review, not proof.

use std::collections::HashMap;

use serde::{Deserialize, Serialize};

use crate::data::Table;
use crate::model::Assessment;
use crate::store::{BatchRecord, TrustedItem, WorkspaceMeta};

use super::MovedItem;

/// A repair cost below this is negligible: the repair moved no label materially, so no item is listed
/// as moved by it (its flagged items are still listed as flagged).
pub const NEGLIGIBLE_REPAIR_COST: f64 = 0.005;

/// An item counts as moved by the repair when at least this share of its label mass left the given class.
pub const MOVED_MASS: f64 = 0.5;

/// Flagged items explained in detail (the most suspicious first).
pub const DETAILED_SUSPECTS: usize = 25;

/// One of the engine's signals, in plain words.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SignalNote {
    /// Short name.
    pub name: String,
    /// Its value for this batch, as text.
    pub value: String,
    /// What it means.
    pub meaning: String,
}

/// Flagged items sharing a (given → proposed) pair.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SuspectGroup {
    /// Given label.
    pub label: String,
    /// Proposed label.
    pub proposed_label: String,
    /// Item ids, most suspicious first.
    pub ids: Vec<String>,
    /// Mean suspicion of the group.
    pub mean_suspicion: f64,
    /// Among the nearest trusted items of the group's detailed items, how many carry the proposed label,
    /// and of how many looked at.
    pub trusted_nearby_proposed: (usize, usize),
}

/// One feature of a flagged item against the trusted items' class profiles.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FeatureContrast {
    /// Feature name.
    pub feature: String,
    /// The item's value.
    pub value: f64,
    /// Mean over the trusted items of the given class (`None` when the class has none).
    pub given_class_mean: Option<f64>,
    /// Mean over the trusted items of the proposed class.
    pub proposed_class_mean: Option<f64>,
}

/// A trusted item near a flagged item.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct NearTrusted {
    /// Trusted item id.
    pub id: String,
    /// Its verified label.
    pub label: String,
    /// Distance in standardised feature units.
    pub distance: f64,
}

/// A flagged item explained.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SuspectDetail {
    /// Item id as delivered.
    pub id: String,
    /// 1-based data row in the delivered file.
    pub row: usize,
    /// Given label.
    pub label: String,
    /// Proposed label.
    pub proposed_label: String,
    /// Suspicion.
    pub suspicion: f64,
    /// The repair signal, the reference model's doubt, the trusted-anchored doubt and the repair weight
    /// (when the full report was kept).
    pub signals: Option<[f64; 4]>,
    /// The features that most set the proposed class apart from the given one, for this item.
    pub features: Vec<FeatureContrast>,
    /// The nearest trusted items.
    pub nearest_trusted: Vec<NearTrusted>,
}

/// The moved items grouped by (given → proposed), largest group first. (The stored record keeps only
/// the detailed items' features, so the nearby trusted items are counted over those; `assess`, which has
/// every item's features, groups with [`crate::model::suspect_stories`].)
pub fn suspect_groups(moved: &[MovedItem], details: &[SuspectDetail]) -> Vec<SuspectGroup> {
    let mut groups: Vec<SuspectGroup> = Vec::new();
    for m in moved {
        let g = match groups
            .iter_mut()
            .position(|g| g.label == m.label && g.proposed_label == m.proposed_label)
        {
            Some(k) => &mut groups[k],
            None => {
                groups.push(SuspectGroup {
                    label: m.label.clone(),
                    proposed_label: m.proposed_label.clone(),
                    ids: Vec::new(),
                    mean_suspicion: 0.0,
                    trusted_nearby_proposed: (0, 0),
                });
                groups.last_mut().expect("just pushed")
            }
        };
        g.ids.push(m.id.clone());
        g.mean_suspicion += m.suspicion;
        if let Some(d) = details.iter().find(|d| d.id == m.id) {
            g.trusted_nearby_proposed.1 += d.nearest_trusted.len();
            g.trusted_nearby_proposed.0 += d
                .nearest_trusted
                .iter()
                .filter(|t| t.label == m.proposed_label)
                .count();
        }
    }
    for g in &mut groups {
        g.mean_suspicion /= g.ids.len().max(1) as f64;
    }
    groups.sort_by_key(|g| std::cmp::Reverse(g.ids.len()));
    groups
}

/// Standardised features: `z = (x − μ) / s` with the workspace's standardisation (identity when it has
/// none for these columns).
fn standardise(meta: &WorkspaceMeta, x: &[f64]) -> Vec<f64> {
    let st = &meta.feature_map.standardizer;
    x.iter()
        .enumerate()
        .map(|(j, v)| match (st.mean.get(j), st.scale.get(j)) {
            (Some(m), Some(s)) if *s > 0.0 => (v - m) / s,
            _ => *v,
        })
        .collect()
}

/// Per-class means of the trusted items, raw and standardised.
struct Profiles {
    raw: HashMap<String, Vec<f64>>,
    z: HashMap<String, Vec<f64>>,
}

fn profiles(meta: &WorkspaceMeta, trusted: &[TrustedItem]) -> Profiles {
    let mut sums: HashMap<String, (Vec<f64>, usize)> = HashMap::new();
    for t in trusted {
        let e = sums
            .entry(t.label.clone())
            .or_insert_with(|| (vec![0.0; t.features.len()], 0));
        if e.0.len() == t.features.len() {
            for (a, b) in e.0.iter_mut().zip(&t.features) {
                *a += b;
            }
            e.1 += 1;
        }
    }
    let raw: HashMap<String, Vec<f64>> = sums
        .into_iter()
        .map(|(k, (s, n))| (k, s.iter().map(|v| v / n.max(1) as f64).collect()))
        .collect();
    let z = raw
        .iter()
        .map(|(k, v)| (k.clone(), standardise(meta, v)))
        .collect();
    Profiles { raw, z }
}

/// The detailed flagged items: for each of the first [`DETAILED_SUSPECTS`] moved items, its four most
/// telling features and its three nearest trusted items. A feature tells more the closer the item's value
/// is to the proposed class's trusted mean than to the given class's, in standardised units:
/// `|z − μ_given| − |z − μ_proposed|`, largest first.
pub fn suspect_details(
    meta: &WorkspaceMeta,
    table: &Table,
    trusted: &[TrustedItem],
    moved: &[MovedItem],
    assessment: Option<&Assessment>,
) -> Vec<SuspectDetail> {
    let prof = profiles(meta, trusted);
    let trusted_z: Vec<Vec<f64>> = trusted
        .iter()
        .map(|t| standardise(meta, &t.features))
        .collect();
    let rows: HashMap<&str, usize> = table
        .ids
        .iter()
        .enumerate()
        .map(|(i, id)| (id.as_str(), i))
        .collect();
    let scores: HashMap<usize, [f64; 4]> = assessment
        .filter(|a| a.items.len() == table.len())
        .map(|a| {
            a.items
                .iter()
                .map(|s| {
                    (
                        s.index,
                        [
                            s.repair_signal,
                            s.learner_doubt,
                            s.anchored_doubt,
                            s.repair_weight,
                        ],
                    )
                })
                .collect()
        })
        .unwrap_or_default();
    moved
        .iter()
        .take(DETAILED_SUSPECTS)
        .filter_map(|m| {
            let i = *rows.get(m.id.as_str())?;
            let x = table.features.row(i).to_vec();
            let z = standardise(meta, &x);
            let (gz, pz) = (prof.z.get(&m.label), prof.z.get(&m.proposed_label));
            let mut order: Vec<(usize, f64)> = (0..x.len())
                .map(|j| {
                    let tell = match (gz, pz) {
                        (Some(g), Some(p)) => (z[j] - g[j]).abs() - (z[j] - p[j]).abs(),
                        _ => 0.0,
                    };
                    (j, tell)
                })
                .collect();
            order.sort_by(|a, b| b.1.total_cmp(&a.1));
            let features = order
                .iter()
                .take(4)
                .map(|&(j, _)| FeatureContrast {
                    feature: meta
                        .features
                        .get(j)
                        .cloned()
                        .unwrap_or_else(|| j.to_string()),
                    value: x[j],
                    given_class_mean: prof.raw.get(&m.label).and_then(|v| v.get(j).copied()),
                    proposed_class_mean: prof
                        .raw
                        .get(&m.proposed_label)
                        .and_then(|v| v.get(j).copied()),
                })
                .collect();
            let mut near: Vec<NearTrusted> = trusted
                .iter()
                .zip(&trusted_z)
                .filter(|(_, tz)| tz.len() == z.len())
                .map(|(t, tz)| NearTrusted {
                    id: t.id.clone(),
                    label: t.label.clone(),
                    distance: tz
                        .iter()
                        .zip(&z)
                        .map(|(a, b)| (a - b) * (a - b))
                        .sum::<f64>()
                        .sqrt(),
                })
                .collect();
            near.sort_by(|a, b| a.distance.total_cmp(&b.distance));
            near.truncate(3);
            Some(SuspectDetail {
                id: m.id.clone(),
                row: i + 1,
                label: m.label.clone(),
                proposed_label: m.proposed_label.clone(),
                suspicion: m.suspicion,
                signals: scores.get(&i).copied(),
                features,
                nearest_trusted: near,
            })
        })
        .collect()
}

/// The items the repair itself moved (at least [`MOVED_MASS`] of their label mass), from the full report;
/// none when the repair cost is negligible ([`NEGLIGIBLE_REPAIR_COST`]).
pub fn repair_moved(
    rec: &BatchRecord,
    table: Option<&Table>,
    assessment: Option<&Assessment>,
    classes: &[String],
) -> Vec<MovedItem> {
    let cost = rec.scores.as_ref().map_or(0.0, |s| s.repair_cost);
    let (Some(a), Some(t)) = (assessment, table) else {
        return Vec::new();
    };
    // A NaN cost (unknown) lists nothing either.
    if cost.is_nan() || cost < NEGLIGIBLE_REPAIR_COST || a.items.len() != t.len() {
        return Vec::new();
    }
    let name = |k: usize| classes.get(k).cloned().unwrap_or_else(|| k.to_string());
    let mut v: Vec<MovedItem> = a
        .items
        .iter()
        .filter(|s| s.repair_mass >= MOVED_MASS)
        .map(|s| MovedItem {
            id: t.ids.get(s.index).cloned().unwrap_or_default(),
            label: name(s.label),
            proposed_label: name(s.repair_label),
            suspicion: s.suspicion,
            confidence: s.confidence,
        })
        .collect();
    v.sort_by(|a, b| b.suspicion.total_cmp(&a.suspicion));
    v
}

/// The engine's signals for this batch, in plain words (from the full report where it was kept, else
/// from the record's scores).
pub fn signal_notes(rec: &BatchRecord, assessment: Option<&Assessment>) -> Vec<SignalNote> {
    let mut v = Vec::new();
    let note = |name: &str, value: String, meaning: &str| SignalNote {
        name: name.into(),
        value,
        meaning: meaning.into(),
    };
    if let Some(s) = &rec.scores {
        v.push(note(
            "repair cost",
            format!("{:.4}", s.repair_cost),
            "The share of the batch's label mass that has to change before a model trained with it fits the plant's trusted items as well as required. Near 0: the trusted items have nothing against the batch.",
        ));
        v.push(note(
            "damage",
            format!("{:.4} nats", s.damage),
            "How much worse the model does on the trusted items when the batch is added as delivered. Above 0 means the batch pulls the model away from what the experts verified.",
        ));
    }
    let Some(a) = assessment else {
        return v;
    };
    v.push(note(
        "target",
        if a.target_reached {
            format!("reached (set by {})", a.target_basis)
        } else {
            format!(
                "not reached: {} trusted items still wrong at the deepest repair (set by {})",
                a.trusted_still_wrong, a.target_basis
            )
        },
        "What the repair aims for on the trusted items. When it is not reached, the repair cost is what the path got to, not the whole story.",
    ));
    v.push(note(
        "repair signal",
        "per item, 0 to 1".into(),
        "How early the repair, pulling the model onto the trusted items, moves an item's label off the given class: 1 for the first step, 0 when it never does. It stands on the trusted items alone.",
    ));
    v.push(note(
        "reference model's doubt",
        "per item, 0 to 1".into(),
        "One minus the probability that a model which has not seen the item (trained on the accepted pool, or on the rest of the batch) gives the item's label. It can be fooled when the pool itself carries the same bias.",
    ));
    v.push(note(
        "trusted-anchored doubt",
        "per item, 0 to 1".into(),
        "One minus the probability of the item's label under the model fitted together with the trusted items, weighted up: doubt that holds even where the pool is biased.",
    ));
    v.push(note(
        "trusted neighbours' doubt",
        if a.trusted_audit.neighbour_sharpness > 0.0 {
            format!("per item, 0 to 1 (sharpness {})", a.trusted_audit.neighbour_sharpness)
        } else {
            "per item, 0 to 1".into()
        },
        "One minus the share the verified items nearest to the item give its label, each class weighed by how close its nearest verified item lies: no model in between, so a bias the pool or the batch has taught the model does not hide it. It counts, beside the trusted-anchored doubt (whichever is larger), where the repair weight is raised.",
    ));
    v.push(note(
        "repair weight",
        format!(
            "mean {:.2} (base {:.2}); raised for {} items",
            a.trusted_audit.mean_repair_weight,
            a.trusted_audit.base_repair_weight,
            a.trusted_audit.items_reweighted
        ),
        "How much an item's suspicion leans on the trusted evidence (the repair signal, the trusted-anchored doubt, the trusted neighbours' doubt) rather than on the reference model. The trusted audit raises it near trusted items the reference model gets wrong.",
    ));
    v.push(note(
        "trusted audit",
        format!(
            "{} of {} trusted items wrong under the {} model",
            a.trusted_audit.trusted_wrong, a.trusted_audit.trusted_items, a.trusted_audit.audited
        ),
        &a.trusted_audit.summary,
    ));
    v.push(note(
        "estimated wrong share",
        format!("{:.3}", a.estimated_wrong_share),
        "The batch's estimated share of wrong labels, behind every item's suspicion.",
    ));
    if a.flag_line > 0.0 {
        let flagged = a
            .items
            .iter()
            .filter(|i| i.proposed_label != i.label)
            .count();
        let in_doubt = rec
            .decision
            .as_ref()
            .and_then(|d| d.signals.as_ref())
            .map_or(String::new(), |s| {
                format!("; {} in doubt", s.flagged_items())
            });
        v.push(note(
            "flag line",
            format!("{:.3} ({flagged} flagged{in_doubt})", a.flag_line),
            "The suspicion at which an item of this batch is flagged and gets a proposed label: a batch carrying the right labels would have at most [model] clean_flag_rate of its items (3 % by default) above it, whatever the data. Items below it but at [model] flag_threshold or more are in doubt: the policy counts them and an accepted batch holds them for review, but no label is proposed for them.",
        ));
    }
    v
}
