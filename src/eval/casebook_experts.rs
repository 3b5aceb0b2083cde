//! The casebook's simulated trusted-set experts: they answer each accepted batch's spot check from the
//! true labels (with [`EXPERT_ERROR`] mistakes) some batches later, their answers go into the vendor's
//! spot-check charts as `spot-check answer` does, and the answered items grow the replay's trusted set.

use ndarray::{Array1, Array2};

use super::{CaseReport, Entered, Start, EXPERT_ERROR};
use crate::config::Config;
use crate::policy::spot::Stratum;
use crate::policy::VendorHistory;
use crate::scenario;

/// One batch's spot check as the simulated expert answered it: (batch place, `(stratum, vendor's label ≠
/// the expert's answer)` per picked item, the items' features with the expert's labels, and per picked
/// item that entered the pool `(how it sits in the pool, true class, expert's answer)`).
type Asked = (
    usize,
    Vec<(Stratum, bool)>,
    Vec<(Vec<f64>, usize)>,
    Vec<(super::InPool, usize, usize)>,
);

/// The trusted set of one replay: the workspace's items, then the answered items the experts' spot
/// checks added (at most `[spot_checks] trusted_max`, the oldest retiring first), as the daemon keeps it.
pub(super) struct Trusted {
    pub(super) x: Array2<f64>,
    pub(super) y: Vec<usize>,
    pub(super) w: Array1<f64>,
    pub(super) ids: Vec<String>,
    answered: std::collections::VecDeque<(Vec<f64>, usize)>,
}

impl Trusted {
    pub(super) fn new(s: &Start) -> Self {
        Trusted {
            x: s.trusted_x.clone(),
            y: s.trusted_y.clone(),
            w: Array1::ones(s.trusted_y.len()),
            ids: scenario::item_ids("t", s.trusted_y.len()),
            answered: Default::default(),
        }
    }

    /// Add answered items (features, expert's label) and rebuild the set.
    pub(super) fn grow(&mut self, s: &Start, items: Vec<(Vec<f64>, usize)>) {
        let max = s.config.spot_checks.trusted_max;
        if items.is_empty() || max == 0 {
            return;
        }
        self.answered.extend(items);
        while self.answered.len() > max {
            self.answered.pop_front();
        }
        let (n0, d) = (s.trusted_y.len(), s.trusted_x.ncols());
        let n = n0 + self.answered.len();
        let mut x = Array2::zeros((n, d));
        x.slice_mut(ndarray::s![..n0, ..]).assign(&s.trusted_x);
        let mut y = s.trusted_y.clone();
        for (k, (row, label)) in self.answered.iter().enumerate() {
            x.row_mut(n0 + k)
                .assign(&ndarray::ArrayView1::from(row.as_slice()));
            y.push(*label);
        }
        self.x = x;
        self.y = y;
        self.w = Array1::ones(n);
        self.ids = scenario::item_ids("t", n);
    }
}

/// One accepted batch's rows as the simulated experts see them: ids, true classes, the vendor's labels,
/// and how each row sits in the pool if it entered.
pub(super) struct Delivered<'a> {
    pub(super) ids: &'a [String],
    pub(super) truth: &'a [usize],
    pub(super) given: &'a [usize],
    pub(super) in_pool: &'a [Option<super::InPool>],
}

/// The simulated trusted-set experts: the spot checks they were asked, answered `lag` batches later.
pub(super) struct Experts {
    lag: usize,
    /// (batch place, `(stratum, vendor's label ≠ the expert's answer)` per picked item, and the items'
    /// features with the expert's labels).
    asked: std::collections::VecDeque<Asked>,
    rng: rand_chacha::ChaCha8Rng,
}

impl Experts {
    pub(super) fn new(lag: usize, seed: u64) -> Self {
        use rand::SeedableRng;
        Experts {
            lag,
            asked: Default::default(),
            rng: rand_chacha::ChaCha8Rng::seed_from_u64(seed ^ 0xe4e7),
        }
    }

    /// Batch `b`'s spot check: the expert labels the picked items blind (from their true labels).
    pub(super) fn ask(
        &mut self,
        b: usize,
        check: &crate::store::SpotCheck,
        rows: &Delivered<'_>,
        k: usize,
    ) {
        let (ids, y, given, in_pool) = (rows.ids, rows.truth, rows.given, rows.in_pool);
        let mut answers = Vec::with_capacity(check.items.len());
        let mut items = Vec::with_capacity(check.items.len());
        let mut pooled = Vec::new();
        for it in &check.items {
            let Some(i) = ids.iter().position(|x| *x == it.id) else {
                continue;
            };
            let answer = expert_answer(y[i], k, &mut self.rng);
            answers.push((it.stratum, given[i] != answer));
            items.push((it.features.clone(), answer));
            if let Some(row) = in_pool.get(i).copied().flatten() {
                pooled.push((row, y[i], answer));
            }
        }
        self.asked.push_back((b, answers, items, pooled));
    }

    /// The answers due after batch `b`: answered items still in the pool whose label the expert
    /// contradicts leave it for review, and the answers go into the vendor's charts, as `spot-check answer`
    /// does; a signal holds the
    /// vendor and takes back the batches of the chart's run. Returns the answered items (for the trusted
    /// set).
    pub(super) fn answer_due(
        &mut self,
        b: usize,
        config: &Config,
        history: &mut VendorHistory,
        r: &mut CaseReport,
        accepted: &mut [Entered],
    ) -> Vec<(Vec<f64>, usize)> {
        let mut out = Vec::new();
        while self
            .asked
            .front()
            .is_some_and(|(at, _, _, _)| at + self.lag <= b)
        {
            let Some((at, answers, items, pooled)) = self.asked.pop_front() else {
                break;
            };
            // Answered items still in the pool whose label the expert contradicts leave it for review.
            for (row, truth, answer) in pooled {
                r.hold_contradicted(accepted, at, row, truth, answer);
            }
            out.extend(items);
            r.spot_checked += answers.len();
            r.spot_disagreed += answers.iter().filter(|(_, x)| *x).count();
            let name = format!("b{at}");
            let o = history.spot.take(&name, &answers, &config.spot_checks);
            if let Some(hold) = history.spot.hold(&name, &o) {
                if history.spot_hold.is_none() {
                    history.spot_hold = Some(hold);
                    r.spot_signal_at.get_or_insert(b + 1);
                }
                let places: Vec<usize> = o
                    .reach
                    .iter()
                    .filter_map(|n| n.strip_prefix('b')?.parse().ok())
                    .collect();
                r.recall_batches(accepted, &places);
            }
        }
        out
    }
}

/// The simulated expert's answer for an item whose true class is `truth`: right, except with probability
/// [`EXPERT_ERROR`], then a uniformly drawn other class.
fn expert_answer(truth: usize, k: usize, rng: &mut impl rand::Rng) -> usize {
    if k > 1 && rng.random::<f64>() < EXPERT_ERROR {
        let other = rng.random_range(0..k - 1);
        if other >= truth {
            other + 1
        } else {
            other
        }
    } else {
        truth
    }
}
