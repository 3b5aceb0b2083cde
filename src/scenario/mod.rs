//! The demo scenario: a fictional recycling plant, and the label attacks the tests and benchmarks plant.
//!
//! # The plant
//!
//! Items ride a sorting belt past a bank of sensors; a sorting model classifies each item into one of eight
//! material classes ([`CLASS_NAMES`]) so that air jets can blow it into the right bin. The model is trained
//! on labels from contracted labeling vendors, who label recorded items from the sensor data and a camera
//! image. Each item is described by 32 sensor readings ([`FEATURE_NAMES`]): twelve near-infrared (NIR)
//! reflectance bands from 1050 nm to 1600 nm, the camera's mean colour, gloss and transparency, weight,
//! footprint area, thickness and height from a laser profile, a density estimate, eddy-current and magnetic
//! response, X-ray transmission, a moisture index, shape descriptors (aspect ratio, compactness, crumple
//! index), the pitch of the impact sound, thermal emissivity and the fraction of the surface covered by
//! print.
//!
//! Every class is a mixture of **sub-populations** ([`Plant::subpopulations`]) — clear, coloured and black
//! PET; dry and wet cardboard; clear, green and brown glass; cans and foil trays; ... — so class regions are
//! not convex and a linear model on the raw readings gets roughly 85–95% of items right (checked in this
//! module's tests against the `linfa-logistic` crate). Two sub-populations are the plant's known trouble
//! spots, and the natural targets of a vendor's *systematic* mistakes:
//!
//! * **black plastics** (black PET, HDPE and PP): carbon black absorbs near-infrared light, so their NIR
//!   bands are flat and dark and only density, gloss and the impact sound tell the polymers apart;
//! * **wet cardboard**: water absorbs around 1450 nm and darkens the colour, which moves it towards paper.
//!
//! Readings are calibrated sensor outputs with additive noise (twice the nominal sensor noise, so that the
//! classes overlap as they do on a real belt), so a physically non-negative quantity such as the magnetic
//! response of a plastic bottle can read slightly below zero; about 10% of items touch a neighbour and show
//! a blend of both. The plant's physics is fixed; [`Plant::new`]'s seed sets small per-plant calibration offsets and gains of
//! the sensors, and every sampling call takes its own seed, so every draw is reproducible.
//!
//! # Attacks
//!
//! The attack functions are pure and seeded and return the new labels with a mask of the flipped items.
//! Their recipes are published (see `tests/reference/check-values.md` §3):
//!
//! * [`uniform_flips`]: flip `⌊εn⌋` random items to a random other class — the random baseline of Xiao,
//!   Xiao & Eckert, "Adversarial Label Flips Attack on Support Vector Machines", ECAI 2012;
//! * [`targeted_flips`]: within class `a`, flip a fraction `ρ` to class `b` — the common pair
//!   (class-conditional) label-noise protocol;
//! * [`region_flips`]: flip the items inside one region of feature space (the items nearest to a random
//!   centre) to one class — the systematic-bias setting of Zhang, Zhu & Wright, "Training Set Debugging
//!   Using Trusted Items", AAAI 2018;
//! * [`subpopulation_flips`]: the same systematic error expressed in the plant's terms (a vendor labels wet
//!   cardboard as paper).

use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};

pub mod embed;
mod flips;

pub use flips::{
    region_flips, region_flips_around, subpopulation_flips, targeted_flips, uniform_flips,
    write_csv, write_jsonl,
};

/// The eight material classes, sorted, so that class index `k` here is also the index
/// [`crate::data::Classes`] gives the same names.
pub const CLASS_NAMES: [&str; 8] = [
    "aluminium",
    "cardboard",
    "glass",
    "hdpe",
    "paper",
    "pet",
    "pp",
    "steel",
];

/// Class indices, for readability in tests and the demo.
pub mod class {
    /// Aluminium cans and foil.
    pub const ALUMINIUM: usize = 0;
    /// Corrugated cardboard.
    pub const CARDBOARD: usize = 1;
    /// Container glass.
    pub const GLASS: usize = 2;
    /// High-density polyethylene.
    pub const HDPE: usize = 3;
    /// Paper.
    pub const PAPER: usize = 4;
    /// Polyethylene terephthalate.
    pub const PET: usize = 5;
    /// Polypropylene.
    pub const PP: usize = 6;
    /// Steel (tin-plated) cans.
    pub const STEEL: usize = 7;
}

/// NIR band centres in nanometres (features 0..12).
pub const NIR_BANDS_NM: [f64; 12] = [
    1050.0, 1100.0, 1150.0, 1200.0, 1250.0, 1300.0, 1350.0, 1400.0, 1450.0, 1500.0, 1550.0, 1600.0,
];

/// The 32 sensor readings, in column order.
pub const FEATURE_NAMES: [&str; 32] = [
    "nir_1050",
    "nir_1100",
    "nir_1150",
    "nir_1200",
    "nir_1250",
    "nir_1300",
    "nir_1350",
    "nir_1400",
    "nir_1450",
    "nir_1500",
    "nir_1550",
    "nir_1600",
    "colour_r",
    "colour_g",
    "colour_b",
    "gloss",
    "transparency",
    "weight_g",
    "area_cm2",
    "thickness_mm",
    "height_mm",
    "density_g_cm3",
    "eddy_current",
    "magnetic_response",
    "xray_transmission",
    "moisture_index",
    "aspect_ratio",
    "compactness",
    "crumple_index",
    "impact_pitch_khz",
    "thermal_emissivity",
    "ink_coverage",
];

/// Feature names as owned strings (the schema of every file in the scenario).
pub fn feature_names() -> Vec<String> {
    FEATURE_NAMES.iter().map(|s| s.to_string()).collect()
}

/// Class names as owned strings.
pub fn class_names() -> Vec<String> {
    CLASS_NAMES.iter().map(|s| s.to_string()).collect()
}

/// The class names of the given class indices.
pub fn label_names(y: &[usize]) -> Vec<String> {
    y.iter().map(|&k| CLASS_NAMES[k].to_string()).collect()
}

/// Item ids `PREFIX-000001`, `PREFIX-000002`, ...
pub fn item_ids(prefix: &str, n: usize) -> Vec<String> {
    (1..=n).map(|i| format!("{prefix}-{i:06}")).collect()
}

/// A material's NIR reflectance: a base level with Gaussian absorption dips `(centre nm, depth, width nm)`
/// and a linear slope per 100 nm.
#[derive(Debug, Clone, Copy)]
struct Spectrum {
    base: f64,
    slope: f64,
    dips: &'static [(f64, f64, f64)],
}

impl Spectrum {
    fn at(&self, nm: f64) -> f64 {
        let mut r = self.base + self.slope * (nm - 1300.0) / 100.0;
        for &(c, depth, w) in self.dips {
            r -= depth * (-(nm - c).powi(2) / (2.0 * w * w)).exp();
        }
        r
    }
}

// Shapes after the absorption features of the polymers and of cellulose and water; illustrative, not
// measured spectra.
const PET: Spectrum = Spectrum {
    base: 0.74,
    slope: -0.01,
    dips: &[
        (1130.0, 0.22, 40.0),
        (1410.0, 0.10, 45.0),
        (1600.0, 0.18, 50.0),
    ],
};
const HDPE: Spectrum = Spectrum {
    base: 0.80,
    slope: 0.0,
    dips: &[
        (1210.0, 0.26, 35.0),
        (1400.0, 0.18, 40.0),
        (1550.0, 0.08, 50.0),
    ],
};
const PP: Spectrum = Spectrum {
    base: 0.78,
    slope: 0.0,
    dips: &[
        (1190.0, 0.24, 35.0),
        (1380.0, 0.20, 40.0),
        (1520.0, 0.09, 50.0),
    ],
};
const PAPER: Spectrum = Spectrum {
    base: 0.70,
    slope: -0.015,
    dips: &[(1200.0, 0.08, 60.0), (1490.0, 0.26, 55.0)],
};
const CARDBOARD: Spectrum = Spectrum {
    base: 0.56,
    slope: 0.01,
    dips: &[(1200.0, 0.10, 60.0), (1490.0, 0.24, 55.0)],
};
const GLASS: Spectrum = Spectrum {
    base: 0.33,
    slope: 0.02,
    dips: &[],
};
const ALUMINIUM: Spectrum = Spectrum {
    base: 0.82,
    slope: 0.005,
    dips: &[],
};
const STEEL: Spectrum = Spectrum {
    base: 0.56,
    slope: 0.01,
    dips: &[],
};
/// Relative water absorption per band (peak near 1450 nm).
const WATER: Spectrum = Spectrum {
    base: 0.0,
    slope: 0.0,
    dips: &[(1450.0, -1.0, 60.0), (1200.0, -0.3, 40.0)],
};

/// How an item's colour is drawn.
#[derive(Debug, Clone, Copy)]
enum Colour {
    /// Around a fixed RGB.
    Fixed([f64; 3]),
    /// A random saturated hue (coloured plastics, printed cans).
    AnyHue,
}

/// Mean readings of one sub-population (before per-item variation and sensor noise).
#[derive(Debug, Clone, Copy)]
struct Sub {
    name: &'static str,
    class: usize,
    /// Share within its class.
    share: f64,
    spectrum: Spectrum,
    /// Fraction of NIR light absorbed by pigment (black plastics ≈ 0.9).
    darkness: f64,
    colour: Colour,
    gloss: f64,
    transparency: f64,
    /// Log-normal footprint area: median cm², log-sd.
    area: (f64, f64),
    thickness_mm: f64,
    height_mm: f64,
    density: f64,
    eddy: f64,
    magnetic: f64,
    xray: f64,
    moisture: f64,
    aspect: f64,
    compactness: f64,
    crumple: f64,
    pitch_khz: f64,
    emissivity: f64,
    ink: f64,
}

/// A plastic bottle or tub; the polymer-specific numbers are set per sub-population.
const PLASTIC: Sub = Sub {
    name: "",
    class: 0,
    share: 1.0,
    spectrum: PET,
    darkness: 0.0,
    colour: Colour::Fixed([0.8, 0.82, 0.85]),
    gloss: 0.6,
    transparency: 0.1,
    area: (120.0, 0.45),
    thickness_mm: 0.4,
    height_mm: 70.0,
    density: 1.0,
    eddy: 0.02,
    magnetic: 0.01,
    xray: 0.85,
    moisture: 0.05,
    aspect: 2.2,
    compactness: 0.65,
    crumple: 0.35,
    pitch_khz: 2.0,
    emissivity: 0.92,
    ink: 0.2,
};

const FIBRE: Sub = Sub {
    spectrum: PAPER,
    colour: Colour::Fixed([0.9, 0.9, 0.88]),
    gloss: 0.15,
    transparency: 0.0,
    area: (300.0, 0.5),
    thickness_mm: 0.3,
    height_mm: 12.0,
    density: 0.8,
    xray: 0.9,
    moisture: 0.12,
    aspect: 1.5,
    compactness: 0.7,
    crumple: 0.45,
    pitch_khz: 0.6,
    emissivity: 0.93,
    ink: 0.25,
    ..PLASTIC
};

const METAL: Sub = Sub {
    spectrum: ALUMINIUM,
    colour: Colour::AnyHue,
    gloss: 0.8,
    transparency: 0.0,
    area: (90.0, 0.3),
    thickness_mm: 0.12,
    height_mm: 65.0,
    density: 2.7,
    xray: 0.55,
    moisture: 0.03,
    aspect: 1.8,
    compactness: 0.8,
    crumple: 0.25,
    pitch_khz: 4.5,
    emissivity: 0.2,
    ink: 0.6,
    ..PLASTIC
};

const GLASSY: Sub = Sub {
    spectrum: GLASS,
    colour: Colour::Fixed([0.82, 0.86, 0.84]),
    gloss: 0.85,
    transparency: 0.8,
    area: (110.0, 0.35),
    thickness_mm: 3.0,
    height_mm: 90.0,
    density: 2.5,
    eddy: 0.02,
    magnetic: 0.01,
    xray: 0.35,
    moisture: 0.03,
    aspect: 2.6,
    compactness: 0.7,
    crumple: 0.05,
    pitch_khz: 3.2,
    emissivity: 0.9,
    ink: 0.15,
    ..PLASTIC
};

const BLACK: Colour = Colour::Fixed([0.07, 0.07, 0.08]);

/// The plant's sub-populations. Shares within each class sum to one.
const SUBS: [Sub; 23] = [
    // aluminium
    Sub {
        name: "aluminium_can",
        class: 0,
        share: 0.7,
        eddy: 0.85,
        ..METAL
    },
    Sub {
        name: "aluminium_foil_tray",
        class: 0,
        share: 0.3,
        colour: Colour::Fixed([0.76, 0.76, 0.77]),
        area: (150.0, 0.4),
        thickness_mm: 0.05,
        height_mm: 25.0,
        eddy: 0.45,
        crumple: 0.7,
        compactness: 0.5,
        pitch_khz: 2.2,
        ink: 0.05,
        ..METAL
    },
    // cardboard
    Sub {
        name: "dry_cardboard",
        class: 1,
        share: 0.6,
        spectrum: CARDBOARD,
        colour: Colour::Fixed([0.62, 0.47, 0.31]),
        area: (420.0, 0.5),
        thickness_mm: 3.5,
        height_mm: 30.0,
        density: 0.45,
        moisture: 0.1,
        crumple: 0.3,
        pitch_khz: 0.45,
        ink: 0.15,
        ..FIBRE
    },
    Sub {
        name: "folding_carton",
        class: 1,
        share: 0.2,
        spectrum: CARDBOARD,
        colour: Colour::Fixed([0.72, 0.7, 0.66]),
        area: (260.0, 0.5),
        thickness_mm: 0.6,
        height_mm: 20.0,
        density: 0.75,
        gloss: 0.3,
        crumple: 0.4,
        pitch_khz: 0.55,
        ink: 0.5,
        ..FIBRE
    },
    Sub {
        name: "wet_cardboard",
        class: 1,
        share: 0.2,
        spectrum: CARDBOARD,
        colour: Colour::Fixed([0.47, 0.35, 0.24]),
        area: (380.0, 0.5),
        thickness_mm: 2.4,
        height_mm: 18.0,
        density: 0.7,
        moisture: 0.55,
        crumple: 0.55,
        pitch_khz: 0.35,
        ink: 0.15,
        ..FIBRE
    },
    // glass
    Sub {
        name: "clear_glass",
        class: 2,
        share: 0.5,
        ..GLASSY
    },
    Sub {
        name: "green_glass",
        class: 2,
        share: 0.3,
        colour: Colour::Fixed([0.22, 0.5, 0.27]),
        transparency: 0.55,
        ..GLASSY
    },
    Sub {
        name: "brown_glass",
        class: 2,
        share: 0.2,
        colour: Colour::Fixed([0.45, 0.28, 0.12]),
        transparency: 0.45,
        ..GLASSY
    },
    // hdpe
    Sub {
        name: "natural_hdpe",
        class: 3,
        share: 0.5,
        spectrum: HDPE,
        colour: Colour::Fixed([0.9, 0.9, 0.87]),
        transparency: 0.25,
        gloss: 0.35,
        density: 0.95,
        thickness_mm: 0.9,
        pitch_khz: 1.6,
        ..PLASTIC
    },
    Sub {
        name: "coloured_hdpe",
        class: 3,
        share: 0.35,
        spectrum: HDPE,
        colour: Colour::AnyHue,
        transparency: 0.05,
        gloss: 0.4,
        density: 0.96,
        thickness_mm: 0.9,
        pitch_khz: 1.6,
        ..PLASTIC
    },
    Sub {
        name: "black_hdpe",
        class: 3,
        share: 0.15,
        spectrum: HDPE,
        darkness: 0.92,
        colour: BLACK,
        transparency: 0.0,
        gloss: 0.35,
        density: 0.96,
        thickness_mm: 0.9,
        pitch_khz: 1.6,
        ..PLASTIC
    },
    // paper
    Sub {
        name: "office_paper",
        class: 4,
        share: 0.4,
        ..FIBRE
    },
    Sub {
        name: "newsprint",
        class: 4,
        share: 0.3,
        colour: Colour::Fixed([0.76, 0.74, 0.69]),
        density: 0.6,
        ink: 0.55,
        crumple: 0.6,
        ..FIBRE
    },
    Sub {
        name: "kraft_paper_bag",
        class: 4,
        share: 0.15,
        colour: Colour::Fixed([0.66, 0.52, 0.36]),
        thickness_mm: 0.45,
        density: 0.65,
        ink: 0.2,
        crumple: 0.55,
        ..FIBRE
    },
    Sub {
        name: "coated_paper",
        class: 4,
        share: 0.15,
        gloss: 0.55,
        density: 1.1,
        ink: 0.7,
        xray: 0.8,
        ..FIBRE
    },
    // pet
    Sub {
        name: "clear_pet",
        class: 5,
        share: 0.6,
        spectrum: PET,
        transparency: 0.8,
        gloss: 0.75,
        density: 1.38,
        thickness_mm: 0.3,
        pitch_khz: 2.4,
        ..PLASTIC
    },
    Sub {
        name: "coloured_pet",
        class: 5,
        share: 0.25,
        spectrum: PET,
        colour: Colour::AnyHue,
        transparency: 0.5,
        gloss: 0.75,
        density: 1.38,
        thickness_mm: 0.3,
        pitch_khz: 2.4,
        ..PLASTIC
    },
    Sub {
        name: "black_pet",
        class: 5,
        share: 0.15,
        spectrum: PET,
        darkness: 0.92,
        colour: BLACK,
        transparency: 0.0,
        gloss: 0.7,
        density: 1.36,
        thickness_mm: 0.35,
        area: (200.0, 0.4),
        height_mm: 35.0,
        pitch_khz: 2.2,
        ..PLASTIC
    },
    // pp
    Sub {
        name: "natural_pp",
        class: 6,
        share: 0.5,
        spectrum: PP,
        colour: Colour::Fixed([0.88, 0.88, 0.86]),
        transparency: 0.35,
        gloss: 0.45,
        density: 0.905,
        thickness_mm: 0.7,
        area: (160.0, 0.45),
        height_mm: 45.0,
        pitch_khz: 1.8,
        ..PLASTIC
    },
    Sub {
        name: "coloured_pp",
        class: 6,
        share: 0.3,
        spectrum: PP,
        colour: Colour::AnyHue,
        transparency: 0.05,
        gloss: 0.45,
        density: 0.91,
        thickness_mm: 0.7,
        area: (160.0, 0.45),
        height_mm: 45.0,
        pitch_khz: 1.8,
        ..PLASTIC
    },
    Sub {
        name: "black_pp",
        class: 6,
        share: 0.2,
        spectrum: PP,
        darkness: 0.92,
        colour: BLACK,
        transparency: 0.0,
        gloss: 0.4,
        density: 0.91,
        thickness_mm: 0.7,
        area: (180.0, 0.45),
        height_mm: 35.0,
        pitch_khz: 1.75,
        ..PLASTIC
    },
    // steel
    Sub {
        name: "steel_food_can",
        class: 7,
        share: 0.8,
        spectrum: STEEL,
        density: 7.8,
        eddy: 0.55,
        magnetic: 0.9,
        xray: 0.2,
        thickness_mm: 0.2,
        pitch_khz: 3.6,
        emissivity: 0.3,
        ..METAL
    },
    Sub {
        name: "steel_aerosol",
        class: 7,
        share: 0.2,
        spectrum: STEEL,
        density: 7.8,
        eddy: 0.5,
        magnetic: 0.8,
        xray: 0.25,
        thickness_mm: 0.25,
        aspect: 3.2,
        height_mm: 150.0,
        pitch_khz: 3.9,
        emissivity: 0.3,
        ..METAL
    },
];

/// Share of items that touch a neighbour on the belt, so that the sensors see a blend of two items.
const TOUCHING_SHARE: f64 = 0.10;

/// Multiplier on [`SENSOR_NOISE`].
const NOISE_SCALE: f64 = 2.0;

/// Class shares on the belt (municipal mixed recyclables; illustrative).
const CLASS_SHARES: [f64; 8] = [0.08, 0.2, 0.12, 0.12, 0.18, 0.14, 0.08, 0.08];

/// Per-feature sensor noise (standard deviation, in the feature's unit) on top of the item's own
/// variation. Physical readings (eddy current, X-ray) are noisier than the camera's colour.
const SENSOR_NOISE: [f64; 32] = [
    0.05, 0.05, 0.05, 0.05, 0.05, 0.05, 0.05, 0.05, 0.05, 0.05, 0.05, 0.05, // NIR
    0.06, 0.06, 0.06, // colour
    0.12, 0.12, // gloss, transparency
    0.0, 0.0, 0.0, 0.0, // weight, area, thickness, height: log-normal item variation instead
    0.0, // density: relative noise below
    0.1, 0.1, 0.1,  // eddy, magnetic, X-ray
    0.07, // moisture
    0.35, 0.1, 0.12, // aspect, compactness, crumple
    0.0,  // pitch: relative noise below
    0.06, 0.12, // emissivity, ink
];

/// One of the plant's sub-populations (e.g. wet cardboard).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Subpopulation {
    /// Its name, e.g. `wet_cardboard`.
    pub name: &'static str,
    /// The class it belongs to.
    pub class: usize,
}

/// A sample from the plant with each item's sub-population.
#[derive(Debug, Clone, PartialEq)]
pub struct PlantSample {
    /// Sensor readings, one row per item, columns as [`FEATURE_NAMES`].
    pub x: Array2<f64>,
    /// True class of each item.
    pub y: Vec<usize>,
    /// Index into [`Plant::subpopulations`] of each item.
    pub subpopulation: Vec<usize>,
}

/// The fictional recycling plant's sorting line: a seeded generator of sensor readings.
#[derive(Debug, Clone, PartialEq)]
pub struct Plant {
    /// Multiplier on every sensor's noise.
    noise: f64,
    /// Share of items that touch a neighbour (see [`TOUCHING_SHARE`]).
    touching: f64,
    /// Per-feature calibration gain of this plant's sensors (≈ 1).
    gain: Vec<f64>,
    /// Per-feature calibration offset, in units of that feature's sensor noise.
    offset: Vec<f64>,
}

impl Plant {
    /// Number of classes.
    pub const N_CLASSES: usize = 8;
    /// Number of sensor readings per item.
    pub const N_FEATURES: usize = 32;

    /// A plant whose sensors carry calibration offsets and gains drawn from `seed`.
    pub fn new(seed: u64) -> Self {
        let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0x5EED_F1A7);
        let gain = (0..32).map(|_| 1.0 + 0.03 * normal(&mut rng)).collect();
        let offset = (0..32).map(|_| 0.3 * normal(&mut rng)).collect();
        Self {
            noise: NOISE_SCALE,
            touching: TOUCHING_SHARE,
            gain,
            offset,
        }
    }

    /// The sub-populations, in index order.
    pub fn subpopulations(&self) -> Vec<Subpopulation> {
        SUBS.iter()
            .map(|s| Subpopulation {
                name: s.name,
                class: s.class,
            })
            .collect()
    }

    /// Index of a sub-population by name.
    pub fn subpopulation_index(&self, name: &str) -> Option<usize> {
        SUBS.iter().position(|s| s.name == name)
    }

    /// Indices of the black-plastic sub-populations (black PET, HDPE, PP).
    pub fn black_plastics(&self) -> Vec<usize> {
        SUBS.iter()
            .enumerate()
            .filter(|(_, s)| s.darkness > 0.5)
            .map(|(i, _)| i)
            .collect()
    }

    /// `n` items in the belt's class mix.
    pub fn sample(&self, n: usize, seed: u64) -> (Array2<f64>, Vec<usize>) {
        let s = self.sample_detailed(n, seed);
        (s.x, s.y)
    }

    /// `n` items in the belt's class mix, with their sub-populations.
    pub fn sample_detailed(&self, n: usize, seed: u64) -> PlantSample {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let subs: Vec<usize> = (0..n)
            .map(|_| {
                let k = pick(&mut rng, &CLASS_SHARES);
                pick_sub(&mut rng, k)
            })
            .collect();
        self.draw(&subs, &mut rng)
    }

    /// `per_class` items of every class (e.g. a trusted set), classes in index order, sub-populations in
    /// their shares.
    pub fn sample_per_class(&self, per_class: usize, seed: u64) -> (Array2<f64>, Vec<usize>) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let subs: Vec<usize> = (0..Self::N_CLASSES)
            .flat_map(|k| std::iter::repeat_n(k, per_class))
            .map(|k| pick_sub(&mut rng, k))
            .collect::<Vec<_>>();
        let s = self.draw(&subs, &mut rng);
        (s.x, s.y)
    }

    /// `n` items of one sub-population.
    pub fn sample_subpopulation(&self, sub: usize, n: usize, seed: u64) -> PlantSample {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let subs = vec![sub.min(SUBS.len() - 1); n];
        self.draw(&subs, &mut rng)
    }

    /// Draw one item per entry of `subs`.
    fn draw(&self, subs: &[usize], rng: &mut ChaCha8Rng) -> PlantSample {
        let n = subs.len();
        let mut x = Array2::zeros((n, 32));
        for (i, &s) in subs.iter().enumerate() {
            let mut row = self.item(&SUBS[s], rng);
            // Touching items: the sensors see part of a neighbour on the belt. The item keeps its class;
            // its readings become `(1 − a)·own + a·neighbour` with `a ~ U[0.15, 0.5)`.
            if rng.random::<f64>() < self.touching {
                let k = pick(rng, &CLASS_SHARES);
                let other = self.item(&SUBS[pick_sub(rng, k)], rng);
                let a = 0.15 + 0.35 * rng.random::<f64>();
                for (v, o) in row.iter_mut().zip(other) {
                    *v = (1.0 - a) * *v + a * o;
                }
            }
            x.row_mut(i).assign(&ndarray::ArrayView1::from(&row[..]));
        }
        PlantSample {
            x,
            y: subs.iter().map(|&s| SUBS[s].class).collect(),
            subpopulation: subs.to_vec(),
        }
    }

    /// One item's readings.
    ///
    /// Item-level variation (shared by several readings, so features are correlated):
    /// illumination `g ~ N(1, 0.06)` scales every optical reading; surface dirt `u ~ U[0, 0.25]` darkens
    /// the NIR bands and the colour and lowers the gloss; the pigment darkness `δ` of black plastics scales
    /// the NIR reflectance by `1 − δ`; moisture `m` deepens the water bands (`R_j ← R_j (1 − 0.6 m w_j)`)
    /// and darkens the colour; weight is density × area × thickness × a fill factor, so size, thickness and
    /// density enter multiplicatively. Then each reading gets independent sensor noise and the plant's
    /// calibration `x ← gain·x + offset·noise`.
    fn item(&self, s: &Sub, rng: &mut ChaCha8Rng) -> [f64; 32] {
        let mut v = [0.0; 32];
        let illum = 1.0 + 0.06 * normal(rng);
        let dirt = 0.25 * rng.random::<f64>();
        let dark = (s.darkness + 0.04 * normal(rng)).clamp(0.0, 0.98);
        let moisture = (s.moisture * (1.0 + 0.35 * normal(rng))).clamp(0.0, 1.0);
        for (j, nm) in NIR_BANDS_NM.iter().enumerate() {
            let water = WATER.at(*nm);
            v[j] = illum
                * (1.0 - dark)
                * (1.0 - dirt)
                * s.spectrum.at(*nm)
                * (1.0 - 0.6 * moisture * water);
        }
        let rgb = match s.colour {
            Colour::Fixed(c) => c.map(|c| c + 0.05 * normal(rng)),
            Colour::AnyHue => hue(rng.random::<f64>()),
        };
        let wet_dark = 1.0 - 0.5 * moisture;
        for c in 0..3 {
            v[12 + c] = illum * (1.0 - dirt) * wet_dark * rgb[c];
        }
        v[15] = s.gloss * (1.0 - 1.5 * dirt);
        v[16] = s.transparency * (1.0 - dirt);
        let area = s.area.0 * (s.area.1 * normal(rng)).exp();
        let thick = s.thickness_mm * (0.2 * normal(rng)).exp();
        let height = s.height_mm * (0.25 * normal(rng)).exp();
        let density = s.density * (0.08 * normal(rng)).exp();
        // A hollow container's walls make up a small fraction of its footprint × thickness volume twice over
        // (front and back) plus the base; fill factor ≈ 2.5 with item-level spread.
        let fill = 2.5 * (0.15 * normal(rng)).exp();
        v[17] = density * area * thick / 10.0 * fill;
        v[18] = area;
        v[19] = thick;
        v[20] = height;
        v[21] = density;
        v[22] = s.eddy;
        v[23] = s.magnetic;
        v[24] = s.xray * (1.0 - 0.2 * (thick / (s.thickness_mm + 1e-9) - 1.0)).clamp(0.5, 1.5);
        v[25] = moisture;
        v[26] = s.aspect * (0.15 * normal(rng)).exp();
        v[27] = s.compactness;
        v[28] = s.crumple;
        v[29] = s.pitch_khz * (0.12 * normal(rng)).exp();
        v[30] = s.emissivity;
        v[31] = s.ink;
        for (j, x) in v.iter_mut().enumerate() {
            let noise = self.noise * SENSOR_NOISE[j].max(0.02 * x.abs());
            *x = self.gain[j] * (*x + noise * normal(rng)) + self.offset[j] * noise;
        }
        v
    }
}

fn normal(rng: &mut ChaCha8Rng) -> f64 {
    Normal::new(0.0, 1.0).map(|d| d.sample(rng)).unwrap_or(0.0)
}

/// Index drawn with probability proportional to `w`.
fn pick(rng: &mut ChaCha8Rng, w: &[f64]) -> usize {
    let total: f64 = w.iter().sum();
    let mut u = rng.random::<f64>() * total;
    for (i, wi) in w.iter().enumerate() {
        if u < *wi {
            return i;
        }
        u -= wi;
    }
    w.len() - 1
}

/// A sub-population of class `k`, in the class's shares.
fn pick_sub(rng: &mut ChaCha8Rng, k: usize) -> usize {
    let members: Vec<usize> = (0..SUBS.len()).filter(|&i| SUBS[i].class == k).collect();
    let w: Vec<f64> = members.iter().map(|&i| SUBS[i].share).collect();
    members[pick(rng, &w)]
}

/// A saturated colour of hue `h ∈ [0, 1)` (HSV with S = 0.8, V = 0.85).
fn hue(h: f64) -> [f64; 3] {
    let (s, v) = (0.8, 0.85);
    let h6 = (h.rem_euclid(1.0)) * 6.0;
    let c = v * s;
    let x = c * (1.0 - ((h6 % 2.0) - 1.0).abs());
    let (r, g, b) = match h6 as u32 {
        0 => (c, x, 0.0),
        1 => (x, c, 0.0),
        2 => (0.0, c, x),
        3 => (0.0, x, c),
        4 => (x, 0.0, c),
        _ => (c, 0.0, x),
    };
    let m = v - c;
    [r + m, g + m, b + m]
}

#[cfg(test)]
mod tests;
