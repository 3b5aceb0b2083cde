//! Data for the benchmark: the sources, their splits into trusted set, pool and batch, and the attacks.

use super::*;

use ndarray::{Array1, ArrayView2, Axis};
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use crate::model::Standardizer;
use crate::scenario::{self, Plant};

pub(super) fn sizes(name: &str, quick: bool) -> (usize, usize) {
    match (name, quick) {
        ("iris", _) => (60, 60),
        ("winequality", true) => (600, 300),
        ("winequality", false) => (1000, 500),
        (_, true) => (1000, 300),
        (_, false) => (3000, 500),
    }
}

/// Repetitions per source. A 60-item iris batch holds 3 bugs at 5 %, so one rank swap moves its average
/// precision by ~0.05: 3 repetitions cannot tell the methods apart, 20 can (and cost milliseconds each).
pub(super) fn repetitions(name: &str, quick: bool) -> usize {
    match (name, quick) {
        (_, true) => 1,
        ("iris", false) => 20,
        ("winequality", false) => 10,
        (_, false) => 5,
    }
}

/// Renumber targets to `0..K` in sorted order.
pub(super) fn dense(targets: &[usize]) -> (Vec<usize>, usize) {
    let mut classes = targets.to_vec();
    classes.sort_unstable();
    classes.dedup();
    let y = targets
        .iter()
        .map(|t| classes.binary_search(t).unwrap_or(0))
        .collect();
    (y, classes.len())
}

pub(super) fn open_sources() -> Vec<Source> {
    let iris = linfa_datasets::iris();
    let (y, k) = dense(
        iris.targets()
            .as_slice()
            .unwrap_or(&iris.targets().to_vec()),
    );
    let wine = linfa_datasets::winequality();
    let (wy, wk) = dense(
        wine.targets()
            .as_slice()
            .unwrap_or(&wine.targets().to_vec()),
    );
    vec![
        Source {
            name: "iris",
            x: iris.records().to_owned(),
            y,
            n_classes: k,
        },
        Source {
            name: "winequality",
            x: wine.records().to_owned(),
            y: wy,
            n_classes: wk,
        },
    ]
}

/// At most 10 trusted items per class (at most a third of the class), then pool and batch from the rest.
pub(super) fn split_open(src: &Source, pool_n: usize, batch_n: usize, seed: u64) -> Split {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut trusted = Vec::new();
    let mut rest = Vec::new();
    for c in 0..src.n_classes {
        let mut members: Vec<usize> = (0..src.y.len()).filter(|&i| src.y[i] == c).collect();
        members.shuffle(&mut rng);
        let t = 10.min(members.len() / 3).max(1.min(members.len()));
        trusted.extend_from_slice(&members[..t]);
        rest.extend_from_slice(&members[t..]);
    }
    rest.shuffle(&mut rng);
    let batch_n = batch_n.min(rest.len() / 2);
    let pool_n = pool_n.min(rest.len() - batch_n);
    let pool = &rest[..pool_n];
    let batch = &rest[pool_n..pool_n + batch_n];
    let pick = |idx: &[usize]| {
        (
            src.x.select(Axis(0), idx),
            idx.iter().map(|&i| src.y[i]).collect::<Vec<_>>(),
        )
    };
    let (trusted_x, trusted_y) = pick(&trusted);
    let (pool_x, pool_y) = pick(pool);
    let (batch_x, batch_y) = pick(batch);
    Split {
        trusted_x,
        trusted_y,
        pool_x,
        pool_y,
        batch_x,
        batch_y,
        batch_sub: None,
    }
}

pub(super) fn split_plant(plant: &Plant, pool_n: usize, batch_n: usize, seed: u64) -> Split {
    let (trusted_x, trusted_y) = plant.sample_per_class(10, seed ^ 0x7157);
    let (pool_x, pool_y) = plant.sample(pool_n, seed ^ 0x9001);
    let b = plant.sample_detailed(batch_n, seed ^ 0xBA7C);
    Split {
        trusted_x,
        trusted_y,
        pool_x,
        pool_y,
        batch_x: b.x,
        batch_y: b.y,
        batch_sub: Some(b.subpopulation),
    }
}

/// The class whose pool centroid (standardised) is nearest to class `a`'s.
pub(super) fn nearest_class(
    st: &Standardizer,
    x: ArrayView2<'_, f64>,
    y: &[usize],
    k: usize,
    a: usize,
) -> usize {
    let z = match st.transform(x) {
        Ok(z) => z,
        Err(_) => return (a + 1) % k,
    };
    let centroid = |c: usize| -> Option<Array1<f64>> {
        let rows: Vec<usize> = (0..y.len()).filter(|&i| y[i] == c).collect();
        (!rows.is_empty()).then(|| {
            z.select(Axis(0), &rows)
                .mean_axis(Axis(0))
                .unwrap_or_default()
        })
    };
    let Some(ca) = centroid(a) else {
        return (a + 1) % k;
    };
    (0..k)
        .filter(|&c| c != a)
        .filter_map(|c| centroid(c).map(|cc| (c, (&cc - &ca).mapv(|v| v * v).sum())))
        .min_by(|u, v| u.1.total_cmp(&v.1))
        .map_or((a + 1) % k, |(c, _)| c)
}

/// Apply an attack; returns the delivered labels and the mask of planted bugs.
pub(super) fn apply_attack(
    attack: Attack,
    split: &Split,
    st: &Standardizer,
    k: usize,
    seed: u64,
) -> (Vec<usize>, Vec<bool>) {
    let y = &split.batch_y;
    let n = y.len();
    match attack {
        Attack::Clean => (y.clone(), vec![false; n]),
        Attack::Uniform { rate } => scenario::uniform_flips(y, k, rate, seed),
        Attack::Targeted { rate } => {
            let mut counts = vec![0usize; k];
            for &c in y {
                counts[c] += 1;
            }
            let a = (0..k)
                .max_by_key(|&c| (counts[c], std::cmp::Reverse(c)))
                .unwrap_or(0);
            let b = nearest_class(st, split.pool_x.view(), &split.pool_y, k, a);
            let within = (rate * n as f64 / counts[a].max(1) as f64).min(0.45);
            scenario::targeted_flips(y, a, b, within, seed)
        }
        Attack::FeatureRule { .. } | Attack::Confusion { .. } => {
            systematic_labels(attack, split, st, k, seed, split.batch_x.view(), y)
        }
        Attack::Region { rate } => {
            let to = ChaCha8Rng::seed_from_u64(seed ^ 0x4E61).random_range(0..k);
            scenario::region_flips(split.batch_x.view(), y, to, rate, seed)
        }
        Attack::WetCardboardAsPaper => {
            let plant = Plant::new(0);
            let wet = plant
                .subpopulation_index("wet_cardboard")
                .unwrap_or(usize::MAX);
            let subs = split.batch_sub.clone().unwrap_or_default();
            scenario::subpopulation_flips(y, &subs, &[wet], scenario::class::PAPER, 1.0, seed)
        }
    }
}
/// The systematic attacks' labels for one set of items: `(labels, mask)`. The rule's feature, class and the
/// confused pair are fixed by `seed` and the pool (so a batch and a biased pool share the same bias).
pub(super) fn systematic_labels(
    attack: Attack,
    split: &Split,
    st: &Standardizer,
    k: usize,
    seed: u64,
    x: ArrayView2<'_, f64>,
    y: &[usize],
) -> (Vec<usize>, Vec<bool>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0x5359_5354);
    match attack {
        Attack::FeatureRule { rate, .. } => {
            let f = rng.random_range(0..x.ncols().max(1));
            let to = rng.random_range(0..k);
            let mut col: Vec<f64> = x.column(f).to_vec();
            col.sort_by(f64::total_cmp);
            let cut_at = ((1.0 - rate) * col.len() as f64).floor() as usize;
            let cut = col.get(cut_at.min(col.len().saturating_sub(1))).copied();
            let mut out = y.to_vec();
            let mut mask = vec![false; y.len()];
            if let Some(cut) = cut {
                for i in 0..y.len() {
                    if x[[i, f]] >= cut && y[i] != to {
                        out[i] = to;
                        mask[i] = true;
                    }
                }
            }
            (out, mask)
        }
        Attack::Confusion { share, .. } => {
            let mut counts = vec![0usize; k];
            for &c in &split.pool_y {
                counts[c] += 1;
            }
            let a = (0..k)
                .max_by_key(|&c| (counts[c], std::cmp::Reverse(c)))
                .unwrap_or(0);
            let b = nearest_class(st, split.pool_x.view(), &split.pool_y, k, a);
            scenario::targeted_flips(y, a, b, share, rng.random())
        }
        _ => (y.to_vec(), vec![false; y.len()]),
    }
}
