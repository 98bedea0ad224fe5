//! The committed, seeded generator of cairn's demo data, and the check that the committed files
//! still match it. It owns every byte of `plans/demo/data/` (subjects.csv, allocation.csv and
//! README.md): those files are never edited by hand, only regenerated with
//! `UPDATE_DEMO=1 cargo test --test demo_data`. It must not depend on anything but `std`, on the
//! platform, on the clock or on hash-map iteration order, and it uses no part of the cairn library,
//! so that a change in cairn can never silently change the demo's inputs.
//!
//! The scenario is INVENTED, for the demo only: DERM-301, a multi-centre, randomised,
//! double-blind, three-arm trial of an invented oral drug, "lumetrine" (placebo, low dose, high
//! dose), in moderate-to-severe atopic dermatitis; 300 subjects over 12 sites of unequal size.
//! No real trial, drug, site or person is described, and the true effects below were chosen only
//! to make a readable demo (a clear high-dose effect, a smaller low-dose effect).
//!
//! Algorithms (all implemented here, each with its reference):
//! - uniform bits: xoshiro256** (Blackman and Vigna, "Scrambled linear pseudorandom number
//!   generators", ACM Trans. Math. Softw. 47(4), 2021), its state filled by SplitMix64 (Steele,
//!   Lea and Flood, "Fast splittable pseudorandom number generators", OOPSLA 2014), as the
//!   xoshiro authors recommend;
//! - uniform integers below n: Lemire's multiply-and-reject method (Lemire, "Fast random integer
//!   generation in an interval", ACM TOMACS 29(1), 2019), which is exactly unbiased;
//! - random permutations: the Fisher–Yates shuffle in Durstenfeld's form (Knuth, TAOCP vol. 2,
//!   3rd ed., §3.4.2, Algorithm P);
//! - standard normals: Marsaglia's polar method (Marsaglia and Bray, SIAM Review 6(3), 1964);
//! - gamma variates (shape ≥ 1): Marsaglia and Tsang, "A simple method for generating gamma
//!   variables", ACM Trans. Math. Softw. 26(3), 2000;
//! - Poisson counts: inversion by sequential search of the CDF (Devroye, "Non-Uniform Random
//!   Variate Generation", Springer 1986, ch. X on the Poisson distribution); a gamma-frailty
//!   Poisson count is negative binomial (NB2) with θ equal to the gamma shape (Greenwood and
//!   Yule 1920; Lawless 1987);
//! - logistic variates and categorical draws: inversion of the CDF (Devroye 1986, ch. II, the
//!   inversion method).
//!
//! Platform independence: the arithmetic is IEEE-754 f64 (`+ − × ÷ sqrt` are correctly rounded
//! everywhere); only `ln` and `exp` come from the platform's maths library and may differ in the
//! last bit. Every real value is written rounded to one decimal (`(x * 10.0).round()` as whole
//! tenths), and every derived value (changes, EASI-75) is computed afterwards in exact integer
//! tenths, so a last-bit difference could change the output only if it moved a value across a
//! rounding or decision boundary — possible in principle, not met in practice. There are no
//! per-platform branches.
//!
//! Each quantity draws from its own random stream (seeded from the study seed and a stream
//! number), so that retuning one quantity does not reshuffle all the others.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

// ---------------------------------------------------------------------------------------------
// Scenario constants (the "truth" of the invented trial).
// ---------------------------------------------------------------------------------------------

/// The study seed; every random stream is derived from it.
const SEED: u64 = 20261202;

/// Sites and their numbers of randomised subjects; S11 and S12 are small (fewer than 10) so that
/// a plan's rule for pooling small strata has something to do.
const SITE_SIZES: [(&str, usize); 12] = [
    ("S01", 45),
    ("S02", 40),
    ("S03", 36),
    ("S04", 32),
    ("S05", 30),
    ("S06", 28),
    ("S07", 26),
    ("S08", 22),
    ("S09", 18),
    ("S10", 10),
    ("S11", 7),
    ("S12", 6),
];

/// Treatment arms, in the order used by every per-arm constant below.
const ARMS: [&str; 3] = ["placebo", "low", "high"];
const N_ARMS: usize = 3;

/// Randomisation: 1:1:1 in permuted blocks of 6 within site.
const BLOCK: [usize; 6] = [0, 0, 1, 1, 2, 2];

/// Age in whole years: normal, truncated to the inclusion range by rejection.
const AGE_MEAN: f64 = 40.0;
const AGE_SD: f64 = 14.0;
const AGE_MIN: i64 = 18;
const AGE_MAX: i64 = 75;
const PROBABILITY_FEMALE: f64 = 0.52;

/// Baseline EASI: log-normal (median 28), truncated to the inclusion range 16.0–72.0.
const EASI_BL_LOG_MEDIAN: f64 = 28.0;
const EASI_BL_LOG_SD: f64 = 0.35;
const EASI_MIN_TENTHS: i64 = 160;
const EASI_MAX_TENTHS: i64 = 720;

/// Baseline IGA: P(severe) = logistic((EASI_BL − centre) / scale), so IGA and EASI agree.
const IGA_BL_SEVERE_CENTRE: f64 = 32.0;
const IGA_BL_SEVERE_SCALE: f64 = 5.0;

/// Baseline peak itch (0–10 scale): normal, truncated to 4.0–10.0 (an inclusion criterion).
const PRURITUS_BL_MEAN: f64 = 7.0;
const PRURITUS_BL_SD: f64 = 1.5;
const PRURITUS_BL_MIN_TENTHS: i64 = 40;
const PRURITUS_MAX_TENTHS: i64 = 100;

/// EASI at week 16: EASI_W16 = EASI_BL × exp(η), with
/// η = μ(arm) + site effect + slope × (EASI_BL − 30)/10 + residual, where μ(arm) is set so that
/// the expected ratio W16/BL equals 1 − the target mean improvement. Capped at 72.0.
const EASI_TARGET_IMPROVEMENT: [f64; N_ARMS] = [0.30, 0.50, 0.65];
const EASI_LOG_RATIO_SITE_SD: f64 = 0.15;
const EASI_LOG_RATIO_RESIDUAL_SD: f64 = 0.50;
/// Subjects with a higher baseline improve slightly more, in relative terms.
const EASI_LOG_RATIO_BASELINE_SLOPE_PER_10: f64 = -0.05;
const EASI_BASELINE_CENTRE: f64 = 30.0;

/// Peak-itch change at week 16: arm mean + site effect + slope × (PRURITUS_BL − 7) + residual,
/// then W16 is clamped to the 0–10 scale.
const PRURITUS_TARGET_CHANGE: [f64; N_ARMS] = [-1.5, -2.5, -3.5];
const PRURITUS_SITE_SD: f64 = 0.3;
const PRURITUS_RESIDUAL_SD: f64 = 1.9;
const PRURITUS_BASELINE_SLOPE: f64 = -0.25;

/// IGA at week 16: a cumulative-logit model, P(Y ≤ j) = logistic(θⱼ − η) with
/// η = β(arm) + β_severe·[IGA_BL = severe] + site effect; higher categories are worse.
const IGA_LEVELS: [&str; 5] = ["clear", "almost-clear", "mild", "moderate", "severe"];
/// Cut-points: placebo subjects with moderate baseline land 5 / 12 / 33 / 35 / 15 % in the five
/// categories (logits of the cumulative 5, 17, 50 and 85 %).
const IGA_CUT_POINTS: [f64; 4] = [-2.944, -1.586, 0.0, 1.735];
/// Log odds ratios of a worse category against placebo (negative = better).
const IGA_ARM_EFFECT: [f64; N_ARMS] = [0.0, -0.9, -1.6];
const IGA_SEVERE_BASELINE_EFFECT: f64 = 1.0;
const IGA_SITE_SD: f64 = 0.3;

/// Flares: Poisson with mean rate(arm) × (days on study / 28) × frailty, frailty ~ Gamma with
/// mean 1 and shape θ, so counts are negative binomial (NB2) with θ = FLARE_FRAILTY_SHAPE.
const FLARE_RATE_PER_28_DAYS: [f64; N_ARMS] = [0.6, 0.4, 0.3];
const FLARE_FRAILTY_SHAPE: f64 = 2.0;
const FLARE_EXPOSURE_UNIT_DAYS: f64 = 28.0;

/// First rescue therapy: a baseline-category logit with "none" as reference. Log odds against
/// "none" = intercept (placebo) + arm effect + itch slope × (PRURITUS_BL − 7) for antihistamine.
/// The intercepts make placebo about 50 / 30 / 15 / 5 %.
const RESCUE_LEVELS: [&str; 4] = ["none", "topical-steroid", "antihistamine", "phototherapy"];
const RESCUE_INTERCEPT: [f64; 3] = [-0.511, -1.204, -2.303];
const RESCUE_ARM_EFFECT: [[f64; 3]; N_ARMS] =
    [[0.0, 0.0, 0.0], [-0.5, -0.4, -0.5], [-1.0, -0.8, -1.0]];
const RESCUE_ANTIHISTAMINE_ITCH_SLOPE: f64 = 0.3;

/// Disposition. A fixed number of randomised subjects never take a dose (FASFL = SAFFL = N);
/// they withdraw early. Dosed subjects drop out with an arm-dependent probability. A few
/// completers have a major protocol deviation. All non-completers are excluded from the
/// per-protocol set.
const N_NEVER_DOSED: usize = 6;
const DROPOUT_PROBABILITY: [f64; N_ARMS] = [0.12, 0.06, 0.05];
const PROTOCOL_DEVIATION_PROBABILITY: f64 = 0.02;
const DAYS_COMPLETER: i64 = 112;
const DAYS_DROPOUT_MIN: i64 = 14;
const DAYS_DROPOUT_MAX: i64 = 105;
const DAYS_NEVER_DOSED_MAX: i64 = 28;

/// The realistic wrinkle: baseline EASI not recorded for a few dosed completers, so the report
/// shows exclusions for a missing covariate.
const N_MISSING_EASI_BL: usize = 3;

/// Random stream numbers, one per quantity.
const STREAM_RANDOMISATION: u64 = 1;
const STREAM_DEMOGRAPHY: u64 = 2;
const STREAM_BASELINE: u64 = 3;
const STREAM_SITE_EFFECTS: u64 = 4;
const STREAM_DISPOSITION: u64 = 5;
const STREAM_EASI: u64 = 6;
const STREAM_PRURITUS: u64 = 7;
const STREAM_IGA: u64 = 8;
const STREAM_FLARES: u64 = 9;
const STREAM_RESCUE: u64 = 10;
const STREAM_WRINKLES: u64 = 11;

// ---------------------------------------------------------------------------------------------
// Random numbers.
// ---------------------------------------------------------------------------------------------

/// SplitMix64 (Steele, Lea and Flood 2014): used only to fill the xoshiro state from a seed.
struct SplitMix64 {
    state: u64,
}

impl SplitMix64 {
    fn next_u64(&mut self) -> u64 {
        self.state = self.state.wrapping_add(0x9E37_79B9_7F4A_7C15);
        mix64(self.state)
    }
}

/// The SplitMix64 output function (a bijective mixer of 64-bit words).
fn mix64(value: u64) -> u64 {
    let mut z = value;
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// xoshiro256** (Blackman and Vigna 2021), with the variate generators built on it.
struct Rng {
    state: [u64; 4],
}

impl Rng {
    /// The generator for one quantity's stream. The SplitMix64 seed is the study seed offset by
    /// a mixed stream number: offsetting by a plain multiple of the SplitMix increment would make
    /// neighbouring streams overlap, shifted by a few outputs.
    fn stream(seed: u64, stream_number: u64) -> Rng {
        let mut seeder = SplitMix64 {
            state: seed.wrapping_add(mix64(stream_number)),
        };
        let state = [
            seeder.next_u64(),
            seeder.next_u64(),
            seeder.next_u64(),
            seeder.next_u64(),
        ];
        Rng { state }
    }

    fn next_u64(&mut self) -> u64 {
        let result = self.state[1].wrapping_mul(5).rotate_left(7).wrapping_mul(9);
        let shifted = self.state[1] << 17;
        self.state[2] ^= self.state[0];
        self.state[3] ^= self.state[1];
        self.state[1] ^= self.state[2];
        self.state[0] ^= self.state[3];
        self.state[2] ^= shifted;
        self.state[3] = self.state[3].rotate_left(45);
        result
    }

    /// A uniform number strictly inside (0, 1): the top 53 bits, centred in their interval, so
    /// that logarithms and logits of it are always finite.
    fn uniform(&mut self) -> f64 {
        ((self.next_u64() >> 11) as f64 + 0.5) * (1.0 / 9_007_199_254_740_992.0)
    }

    /// A uniform integer in 0..n (n > 0), exactly unbiased (Lemire 2019).
    fn below(&mut self, n: u64) -> u64 {
        let mut product = u128::from(self.next_u64()) * u128::from(n);
        let mut low = product as u64;
        if low < n {
            let threshold = n.wrapping_neg() % n;
            while low < threshold {
                product = u128::from(self.next_u64()) * u128::from(n);
                low = product as u64;
            }
        }
        (product >> 64) as u64
    }

    /// A uniform integer in lowest..=highest.
    fn integer_between(&mut self, lowest: i64, highest: i64) -> i64 {
        lowest + self.below((highest - lowest + 1) as u64) as i64
    }

    fn bernoulli(&mut self, probability: f64) -> bool {
        self.uniform() < probability
    }

    /// A standard normal by Marsaglia's polar method. The second variate of each accepted pair
    /// is discarded, so a draw never depends on the history of earlier calls beyond the stream.
    fn normal(&mut self) -> f64 {
        loop {
            let u = 2.0 * self.uniform() - 1.0;
            let v = 2.0 * self.uniform() - 1.0;
            let s = u * u + v * v;
            if s > 0.0 && s < 1.0 {
                return u * (-2.0 * s.ln() / s).sqrt();
            }
        }
    }

    /// A standard logistic variate by inversion: ln(u / (1 − u)).
    fn logistic(&mut self) -> f64 {
        let u = self.uniform();
        (u / (1.0 - u)).ln()
    }

    /// A Gamma(shape, scale) variate for shape ≥ 1 (Marsaglia and Tsang 2000).
    fn gamma(&mut self, shape: f64, scale: f64) -> f64 {
        assert!(
            shape >= 1.0,
            "the Marsaglia–Tsang sampler here needs shape ≥ 1"
        );
        let d = shape - 1.0 / 3.0;
        let c = 1.0 / (9.0 * d).sqrt();
        loop {
            let x = self.normal();
            let t = 1.0 + c * x;
            if t <= 0.0 {
                continue;
            }
            let v = t * t * t;
            let u = self.uniform();
            if u < 1.0 - 0.0331 * x * x * x * x || u.ln() < 0.5 * x * x + d * (1.0 - v + v.ln()) {
                return scale * d * v;
            }
        }
    }

    /// A Poisson count by sequential search of the CDF with one uniform (Devroye 1986, ch. X).
    /// Adequate for the small means used here (below about 15); the search stops if the terms
    /// underflow.
    fn poisson(&mut self, mean: f64) -> i64 {
        assert!(
            (0.0..200.0).contains(&mean),
            "inversion by search is meant for small means"
        );
        let u = self.uniform();
        let mut count = 0;
        let mut term = (-mean).exp();
        let mut cumulative = term;
        while u > cumulative && term > 0.0 {
            count += 1;
            term *= mean / count as f64;
            cumulative += term;
        }
        count
    }

    /// An index drawn with the given probabilities (which sum to 1), by inversion.
    fn categorical(&mut self, probabilities: &[f64]) -> usize {
        let u = self.uniform();
        let mut cumulative = 0.0;
        for (index, probability) in probabilities.iter().enumerate() {
            cumulative += probability;
            if u < cumulative {
                return index;
            }
        }
        // Rounding can leave the running sum a hair below 1; the last category takes that gap.
        probabilities.len() - 1
    }

    /// Shuffles in place (Fisher–Yates, Durstenfeld's form).
    fn shuffle<T>(&mut self, items: &mut [T]) {
        for last in (1..items.len()).rev() {
            let chosen = self.below(last as u64 + 1) as usize;
            items.swap(last, chosen);
        }
    }

    /// `count` distinct items of `items`, returned in their original order (a partial
    /// Fisher–Yates shuffle of positions).
    fn choose_without_replacement(&mut self, items: &[usize], count: usize) -> Vec<usize> {
        let mut positions: Vec<usize> = (0..items.len()).collect();
        for first in 0..count {
            let chosen = first + self.below((positions.len() - first) as u64) as usize;
            positions.swap(first, chosen);
        }
        let mut selected: Vec<usize> = positions[..count].to_vec();
        selected.sort_unstable();
        selected
            .into_iter()
            .map(|position| items[position])
            .collect()
    }
}

fn logistic_cdf(x: f64) -> f64 {
    1.0 / (1.0 + (-x).exp())
}

/// A real value as whole tenths (the one rounding rule used for every written real value).
fn tenths(x: f64) -> i64 {
    (x * 10.0).round() as i64
}

/// Whole tenths written with one decimal, e.g. -35 → "-3.5"; exact, no floating point.
fn format_tenths(value: i64) -> String {
    let sign = if value < 0 { "-" } else { "" };
    format!("{sign}{}.{}", value.abs() / 10, value.abs() % 10)
}

// ---------------------------------------------------------------------------------------------
// The subjects.
// ---------------------------------------------------------------------------------------------

/// One subject, with every generated value. Real values are whole tenths.
struct Subject {
    usubjid: String,
    site_index: usize,
    arm: usize,
    age: i64,
    female: bool,
    dosed: bool,
    completed: bool,
    protocol_deviation: bool,
    /// True baseline EASI (always generated; drives the outcome even where not recorded).
    easi_bl: i64,
    easi_bl_recorded: bool,
    /// Week-16 values as they would have been observed; written only for completers.
    easi_w16: i64,
    pruritus_bl: i64,
    pruritus_w16: i64,
    iga_bl_severe: bool,
    iga_w16: usize,
    flares: i64,
    days_on_study: i64,
    rescue: usize,
}

/// Per-site random effects on the three outcomes modelled with a site term.
struct SiteEffects {
    easi_log_ratio: f64,
    pruritus_change: f64,
    iga_latent: f64,
}

fn subject_identifiers() -> Vec<(String, usize)> {
    let mut identifiers = Vec::new();
    for (site_index, (site, size)) in SITE_SIZES.iter().enumerate() {
        for number in 1..=*size {
            identifiers.push((format!("DERM301-{site}-{number:03}"), site_index));
        }
    }
    identifiers
}

/// Arms for the subjects of one site, in enrolment order: permuted blocks of 6, the last block
/// cut short when the site size is not a multiple of 6.
fn randomise_site(rng: &mut Rng, n_subjects: usize) -> Vec<usize> {
    let mut arms = Vec::with_capacity(n_subjects);
    while arms.len() < n_subjects {
        let mut block = BLOCK;
        rng.shuffle(&mut block);
        let take = (n_subjects - arms.len()).min(block.len());
        arms.extend_from_slice(&block[..take]);
    }
    arms
}

fn randomise() -> Vec<usize> {
    let mut rng = Rng::stream(SEED, STREAM_RANDOMISATION);
    SITE_SIZES
        .iter()
        .flat_map(|(_, size)| randomise_site(&mut rng, *size))
        .collect()
}

fn site_effects() -> Vec<SiteEffects> {
    let mut rng = Rng::stream(SEED, STREAM_SITE_EFFECTS);
    SITE_SIZES
        .iter()
        .map(|_| SiteEffects {
            easi_log_ratio: EASI_LOG_RATIO_SITE_SD * rng.normal(),
            pruritus_change: PRURITUS_SITE_SD * rng.normal(),
            iga_latent: IGA_SITE_SD * rng.normal(),
        })
        .collect()
}

fn draw_age(rng: &mut Rng) -> i64 {
    loop {
        let age = (AGE_MEAN + AGE_SD * rng.normal()).round() as i64;
        if (AGE_MIN..=AGE_MAX).contains(&age) {
            return age;
        }
    }
}

fn draw_easi_bl(rng: &mut Rng) -> i64 {
    loop {
        let easi = tenths(EASI_BL_LOG_MEDIAN * (EASI_BL_LOG_SD * rng.normal()).exp());
        if (EASI_MIN_TENTHS..=EASI_MAX_TENTHS).contains(&easi) {
            return easi;
        }
    }
}

fn draw_iga_bl_severe(rng: &mut Rng, easi_bl: i64) -> bool {
    let easi = easi_bl as f64 / 10.0;
    rng.bernoulli(logistic_cdf(
        (easi - IGA_BL_SEVERE_CENTRE) / IGA_BL_SEVERE_SCALE,
    ))
}

fn draw_pruritus_bl(rng: &mut Rng) -> i64 {
    loop {
        let itch = tenths(PRURITUS_BL_MEAN + PRURITUS_BL_SD * rng.normal());
        if (PRURITUS_BL_MIN_TENTHS..=PRURITUS_MAX_TENTHS).contains(&itch) {
            return itch;
        }
    }
}

fn draw_easi_w16(rng: &mut Rng, arm: usize, easi_bl: i64, site: &SiteEffects) -> i64 {
    let total_variance = EASI_LOG_RATIO_SITE_SD.powi(2) + EASI_LOG_RATIO_RESIDUAL_SD.powi(2);
    // exp of a normal with variance v has mean exp(μ + v/2); subtract v/2 to hit the target.
    let arm_mean = (1.0 - EASI_TARGET_IMPROVEMENT[arm]).ln() - total_variance / 2.0;
    let baseline = easi_bl as f64 / 10.0;
    let log_ratio = arm_mean
        + site.easi_log_ratio
        + EASI_LOG_RATIO_BASELINE_SLOPE_PER_10 * (baseline - EASI_BASELINE_CENTRE) / 10.0
        + EASI_LOG_RATIO_RESIDUAL_SD * rng.normal();
    tenths(baseline * log_ratio.exp()).min(EASI_MAX_TENTHS)
}

fn draw_pruritus_w16(rng: &mut Rng, arm: usize, pruritus_bl: i64, site: &SiteEffects) -> i64 {
    let baseline = pruritus_bl as f64 / 10.0;
    let change = PRURITUS_TARGET_CHANGE[arm]
        + site.pruritus_change
        + PRURITUS_BASELINE_SLOPE * (baseline - PRURITUS_BL_MEAN)
        + PRURITUS_RESIDUAL_SD * rng.normal();
    tenths(baseline + change).clamp(0, PRURITUS_MAX_TENTHS)
}

/// IGA at week 16 as a level index: the number of cut-points below the latent value, which
/// gives exactly P(Y ≤ j) = logistic(θⱼ − η).
fn draw_iga_w16(rng: &mut Rng, arm: usize, iga_bl_severe: bool, site: &SiteEffects) -> usize {
    let severe = if iga_bl_severe {
        IGA_SEVERE_BASELINE_EFFECT
    } else {
        0.0
    };
    let latent = IGA_ARM_EFFECT[arm] + severe + site.iga_latent + rng.logistic();
    IGA_CUT_POINTS.iter().filter(|cut| **cut < latent).count()
}

fn draw_flares(rng: &mut Rng, arm: usize, days_on_study: i64) -> i64 {
    let frailty = rng.gamma(FLARE_FRAILTY_SHAPE, 1.0 / FLARE_FRAILTY_SHAPE);
    let exposure = days_on_study as f64 / FLARE_EXPOSURE_UNIT_DAYS;
    rng.poisson(FLARE_RATE_PER_28_DAYS[arm] * exposure * frailty)
}

/// Probabilities of the four first-rescue categories for an arm, given baseline itch minus 7.
fn rescue_probabilities(arm: usize, itch: f64) -> [f64; 4] {
    let mut weights = [1.0; 4];
    for category in 0..3 {
        let slope = if category == 1 {
            RESCUE_ANTIHISTAMINE_ITCH_SLOPE * itch
        } else {
            0.0
        };
        weights[category + 1] =
            (RESCUE_INTERCEPT[category] + RESCUE_ARM_EFFECT[arm][category] + slope).exp();
    }
    let total: f64 = weights.iter().sum();
    weights.map(|weight| weight / total)
}

fn draw_rescue(rng: &mut Rng, arm: usize, pruritus_bl: i64) -> usize {
    let itch = pruritus_bl as f64 / 10.0 - PRURITUS_BL_MEAN;
    rng.categorical(&rescue_probabilities(arm, itch))
}

/// Generates every subject, sorted by USUBJID. Each quantity uses its own stream and visits the
/// subjects in the same order, drawing for every subject whether or not the value is written.
fn generate_subjects() -> Vec<Subject> {
    let identifiers = subject_identifiers();
    let arms = randomise();
    let sites = site_effects();
    let n_subjects = identifiers.len();

    let mut demography = Rng::stream(SEED, STREAM_DEMOGRAPHY);
    let mut baseline = Rng::stream(SEED, STREAM_BASELINE);
    let mut disposition = Rng::stream(SEED, STREAM_DISPOSITION);
    let mut easi = Rng::stream(SEED, STREAM_EASI);
    let mut pruritus = Rng::stream(SEED, STREAM_PRURITUS);
    let mut iga = Rng::stream(SEED, STREAM_IGA);
    let mut flares = Rng::stream(SEED, STREAM_FLARES);
    let mut rescue = Rng::stream(SEED, STREAM_RESCUE);
    let mut wrinkles = Rng::stream(SEED, STREAM_WRINKLES);

    let all_indices: Vec<usize> = (0..n_subjects).collect();
    let never_dosed = disposition.choose_without_replacement(&all_indices, N_NEVER_DOSED);

    let mut subjects: Vec<Subject> = Vec::with_capacity(n_subjects);
    for (index, (usubjid, site_index)) in identifiers.into_iter().enumerate() {
        let arm = arms[index];
        let site = &sites[site_index];
        let age = draw_age(&mut demography);
        let female = demography.bernoulli(PROBABILITY_FEMALE);
        let easi_bl = draw_easi_bl(&mut baseline);
        let iga_bl_severe = draw_iga_bl_severe(&mut baseline, easi_bl);
        let pruritus_bl = draw_pruritus_bl(&mut baseline);

        let dosed = !never_dosed.contains(&index);
        let drops_out = disposition.bernoulli(DROPOUT_PROBABILITY[arm]);
        let dropout_day = disposition.integer_between(DAYS_DROPOUT_MIN, DAYS_DROPOUT_MAX);
        let never_dosed_day = disposition.integer_between(DAYS_DROPOUT_MIN, DAYS_NEVER_DOSED_MAX);
        let deviates = disposition.bernoulli(PROTOCOL_DEVIATION_PROBABILITY);
        let completed = dosed && !drops_out;
        let days_on_study = match (dosed, completed) {
            (false, _) => never_dosed_day,
            (true, false) => dropout_day,
            (true, true) => DAYS_COMPLETER,
        };

        subjects.push(Subject {
            usubjid,
            site_index,
            arm,
            age,
            female,
            dosed,
            completed,
            protocol_deviation: completed && deviates,
            easi_bl,
            easi_bl_recorded: true,
            easi_w16: draw_easi_w16(&mut easi, arm, easi_bl, site),
            pruritus_bl,
            pruritus_w16: draw_pruritus_w16(&mut pruritus, arm, pruritus_bl, site),
            iga_bl_severe,
            iga_w16: draw_iga_w16(&mut iga, arm, iga_bl_severe, site),
            flares: draw_flares(&mut flares, arm, days_on_study),
            days_on_study,
            rescue: draw_rescue(&mut rescue, arm, pruritus_bl),
        });
    }

    // The wrinkle: baseline EASI lost for a few dosed completers (chosen at random).
    let completers: Vec<usize> = (0..n_subjects)
        .filter(|index| subjects[*index].completed)
        .collect();
    for index in wrinkles.choose_without_replacement(&completers, N_MISSING_EASI_BL) {
        subjects[index].easi_bl_recorded = false;
    }

    subjects.sort_by(|left, right| left.usubjid.cmp(&right.usubjid));
    subjects
}

// ---------------------------------------------------------------------------------------------
// Derived values, exactly as written (computed in integer tenths).
// ---------------------------------------------------------------------------------------------

impl Subject {
    fn recorded_easi_bl(&self) -> Option<i64> {
        self.easi_bl_recorded.then_some(self.easi_bl)
    }
    fn recorded_easi_w16(&self) -> Option<i64> {
        self.completed.then_some(self.easi_w16)
    }
    fn easi_change(&self) -> Option<i64> {
        Some(self.recorded_easi_w16()? - self.recorded_easi_bl()?)
    }
    /// EASI-75: an improvement of at least 75 %, i.e. (BL − W16)/BL ≥ 3/4 ⇔ BL ≥ 4·W16, exact in
    /// integer tenths.
    fn easi75(&self) -> Option<bool> {
        Some(self.recorded_easi_bl()? >= 4 * self.recorded_easi_w16()?)
    }
    fn recorded_pruritus_w16(&self) -> Option<i64> {
        self.completed.then_some(self.pruritus_w16)
    }
    fn pruritus_change(&self) -> Option<i64> {
        Some(self.recorded_pruritus_w16()? - self.pruritus_bl)
    }
    fn recorded_iga_w16(&self) -> Option<&'static str> {
        self.completed.then_some(IGA_LEVELS[self.iga_w16])
    }
    fn per_protocol(&self) -> bool {
        self.completed && !self.protocol_deviation
    }
}

fn yes_no(flag: bool) -> &'static str {
    if flag { "Y" } else { "N" }
}

fn optional_tenths(value: Option<i64>) -> String {
    value.map(format_tenths).unwrap_or_default()
}

// ---------------------------------------------------------------------------------------------
// The files.
// ---------------------------------------------------------------------------------------------

const SUBJECTS_HEADER: &str = "USUBJID,SITEID,AGE,SEX,FASFL,SAFFL,PPROTFL,EASI_BL,EASI_W16,EASI_CHG,\
PRURITUS_BL,PRURITUS_W16,PRURITUS_CHG,IGA_BL,IGA_W16,EASI75,FLARES,DAYS_ON_STUDY,RESCUE";

fn subjects_csv(subjects: &[Subject]) -> String {
    let mut csv = String::new();
    csv.push_str(SUBJECTS_HEADER);
    csv.push('\n');
    for subject in subjects {
        let fields = [
            subject.usubjid.clone(),
            SITE_SIZES[subject.site_index].0.to_string(),
            subject.age.to_string(),
            (if subject.female { "F" } else { "M" }).to_string(),
            yes_no(subject.dosed).to_string(),
            yes_no(subject.dosed).to_string(),
            yes_no(subject.per_protocol()).to_string(),
            optional_tenths(subject.recorded_easi_bl()),
            optional_tenths(subject.recorded_easi_w16()),
            optional_tenths(subject.easi_change()),
            format_tenths(subject.pruritus_bl),
            optional_tenths(subject.recorded_pruritus_w16()),
            optional_tenths(subject.pruritus_change()),
            (if subject.iga_bl_severe {
                "severe"
            } else {
                "moderate"
            })
            .to_string(),
            subject.recorded_iga_w16().unwrap_or_default().to_string(),
            subject.easi75().map(yes_no).unwrap_or_default().to_string(),
            subject.flares.to_string(),
            subject.days_on_study.to_string(),
            RESCUE_LEVELS[subject.rescue].to_string(),
        ];
        csv.push_str(&fields.join(","));
        csv.push('\n');
    }
    csv
}

fn allocation_csv(subjects: &[Subject]) -> String {
    let mut csv = String::from("USUBJID,ARM\n");
    for subject in subjects {
        let _ = writeln!(csv, "{},{}", subject.usubjid, ARMS[subject.arm]);
    }
    csv
}

/// Observed per-arm summaries, used in the README and printed by the test.
struct ArmSummary {
    n_randomised: usize,
    n_never_dosed: usize,
    n_dropouts: usize,
    n_not_per_protocol: usize,
    n_easi_change: usize,
    mean_easi_change: f64,
    mean_easi_improvement_percent: f64,
    n_easi75: usize,
    mean_pruritus_change: f64,
    n_iga_clear_or_almost: usize,
    mean_flares: f64,
    n_rescue_none: usize,
}

fn summarise(subjects: &[Subject], arm: usize) -> ArmSummary {
    let in_arm: Vec<&Subject> = subjects
        .iter()
        .filter(|subject| subject.arm == arm)
        .collect();
    let easi_changes: Vec<i64> = in_arm
        .iter()
        .filter_map(|subject| subject.easi_change())
        .collect();
    let improvements: Vec<f64> = in_arm
        .iter()
        .filter_map(|subject| {
            let baseline = subject.recorded_easi_bl()? as f64;
            Some((baseline - subject.recorded_easi_w16()? as f64) / baseline)
        })
        .collect();
    let pruritus_changes: Vec<i64> = in_arm
        .iter()
        .filter_map(|subject| subject.pruritus_change())
        .collect();
    let completers = in_arm.iter().filter(|subject| subject.completed);
    let mean_tenths =
        |values: &[i64]| values.iter().sum::<i64>() as f64 / values.len() as f64 / 10.0;
    ArmSummary {
        n_randomised: in_arm.len(),
        n_never_dosed: in_arm.iter().filter(|subject| !subject.dosed).count(),
        n_dropouts: in_arm.iter().filter(|subject| !subject.completed).count(),
        n_not_per_protocol: in_arm
            .iter()
            .filter(|subject| !subject.per_protocol())
            .count(),
        n_easi_change: easi_changes.len(),
        mean_easi_change: mean_tenths(&easi_changes),
        mean_easi_improvement_percent: 100.0 * improvements.iter().sum::<f64>()
            / improvements.len() as f64,
        n_easi75: in_arm
            .iter()
            .filter(|subject| subject.easi75() == Some(true))
            .count(),
        mean_pruritus_change: mean_tenths(&pruritus_changes),
        n_iga_clear_or_almost: completers
            .clone()
            .filter(|subject| subject.iga_w16 <= 1)
            .count(),
        mean_flares: in_arm.iter().map(|subject| subject.flares).sum::<i64>() as f64
            / in_arm.len() as f64,
        n_rescue_none: in_arm.iter().filter(|subject| subject.rescue == 0).count(),
    }
}

fn arm_table_row(
    label: &str,
    cell: impl Fn(&ArmSummary) -> String,
    summaries: &[ArmSummary],
) -> String {
    let cells: Vec<String> = summaries.iter().map(cell).collect();
    format!("| {label} | {} |\n", cells.join(" | "))
}

fn readme(subjects: &[Subject]) -> String {
    let summaries: Vec<ArmSummary> = (0..N_ARMS).map(|arm| summarise(subjects, arm)).collect();
    let per_arm = |values: &[f64], decimals: usize| -> String {
        values
            .iter()
            .map(|value| format!("{value:.decimals$}"))
            .collect::<Vec<_>>()
            .join(" / ")
    };
    let site_list: Vec<String> = SITE_SIZES
        .iter()
        .map(|(site, size)| format!("{site} {size}"))
        .collect();
    let n_subjects: usize = SITE_SIZES.iter().map(|(_, size)| size).sum();
    let improvement_percent: Vec<f64> = EASI_TARGET_IMPROVEMENT
        .iter()
        .map(|value| 100.0 * value)
        .collect();
    let dropout_percent: Vec<f64> = DROPOUT_PROBABILITY
        .iter()
        .map(|value| 100.0 * value)
        .collect();
    let rescue_placebo_percent: Vec<f64> = rescue_probabilities(0, 0.0)
        .iter()
        .map(|value| 100.0 * value)
        .collect();

    let mut text = String::new();
    let _ = write!(
        text,
        r#"# DERM-301 demo data (invented)

**Everything in this folder is invented for cairn's demo.** DERM-301 is not a real trial,
"lumetrine" is not a real drug, and no real site or person is described. The numbers were
drawn from a seeded generator with effects chosen to make a readable demo.

Do not edit these files by hand: they are written by the integration test
`tests/demo_data.rs`, which also checks on every `cargo test` that they are byte-identical
to what it generates. To regenerate them after changing the generator:

```
UPDATE_DEMO=1 cargo test --test demo_data
```

then review the diff. The seed is {SEED}.

## The scenario

A multi-centre, randomised, double-blind, three-arm trial in moderate-to-severe atopic
dermatitis: placebo, lumetrine low dose and lumetrine high dose, taken orally for 16 weeks
(112 days). {n_subjects} subjects were randomised at 12 sites of unequal size
({sites}); S11 and S12 have fewer than 10 subjects each, so a plan's rule for pooling small
sites has something to do. Randomisation was 1:1:1 in permuted blocks of 6 within site, so
the arms are balanced within each site up to the last, incomplete block.

## Files

All files are UTF-8 without byte-order mark, with LF line endings.

- `subjects.csv`: the blinded analysis data, one row per randomised subject, sorted by
  `USUBJID`. It has **no treatment column**. Comma-separated, one header row; a missing value
  is an empty cell.
- `allocation.csv`: the randomisation list, columns `USUBJID` and `ARM` (`placebo`, `low`,
  `high`), one row per subject of `subjects.csv`, in the same order.
- `README.md`: this file.

## Columns of subjects.csv

| column | meaning | unit / levels | missing |
|---|---|---|---|
| `USUBJID` | unique subject identifier, `DERM301-<site>-<number>` | text | never |
| `SITEID` | site | `S01` … `S12` | never |
| `AGE` | age at randomisation | whole years, 18–75 | never |
| `SEX` | sex | `F`, `M` | never |
| `FASFL` | full analysis set: randomised and took at least one dose | `Y`, `N` | never |
| `SAFFL` | safety set (here identical to `FASFL`) | `Y`, `N` | never |
| `PPROTFL` | per-protocol set: completed week 16 without a major protocol deviation | `Y`, `N` | never |
| `EASI_BL` | Eczema Area and Severity Index at baseline | points, 16.0–72.0, 1 decimal | {N_MISSING_EASI_BL} subjects (not recorded) |
| `EASI_W16` | EASI at week 16 | points, 0.0–72.0, 1 decimal | non-completers |
| `EASI_CHG` | `EASI_W16 − EASI_BL` | points, 1 decimal | when either is missing |
| `PRURITUS_BL` | peak itch at baseline | 0–10 scale, 4.0–10.0, 1 decimal | never |
| `PRURITUS_W16` | peak itch at week 16 | 0–10 scale, 1 decimal | non-completers |
| `PRURITUS_CHG` | `PRURITUS_W16 − PRURITUS_BL` | points, 1 decimal | non-completers |
| `IGA_BL` | investigator's global assessment at baseline | `moderate`, `severe` | never |
| `IGA_W16` | investigator's global assessment at week 16 (ordered, higher is worse) | `clear` < `almost-clear` < `mild` < `moderate` < `severe` | non-completers |
| `EASI75` | EASI improved by at least 75 % from baseline (`EASI_BL ≥ 4 × EASI_W16`) | `Y`, `N` | when `EASI_BL` or `EASI_W16` is missing |
| `FLARES` | number of flares while on study | count | never |
| `DAYS_ON_STUDY` | days from randomisation to completion or withdrawal (use as exposure for `FLARES`) | whole days, {DAYS_COMPLETER} for completers, {DAYS_DROPOUT_MIN}–{DAYS_DROPOUT_MAX} otherwise | never |
| `RESCUE` | first rescue therapy used (nominal) | `none`, `topical-steroid`, `antihistamine`, `phototherapy` | never |

## True effects used by the generator

Arms are given as placebo / low / high.

- **EASI at week 16**: `EASI_W16 = EASI_BL × exp(η)`, capped at 72, with a normal η whose mean
  is set so that the expected relative improvement is {improvement} %; η has a site random
  effect (SD {easi_site_sd}), a residual (SD {easi_residual_sd}) and a slope of
  {easi_slope} per 10 points of baseline EASI above {easi_centre}.
- **Peak itch change**: mean {pruritus} points, site random effect (SD {pruritus_site_sd}),
  residual SD {pruritus_residual_sd}, slope {pruritus_slope} per point of baseline itch above
  {pruritus_centre}; week 16 clamped to 0–10.
- **IGA at week 16**: cumulative logit, `P(IGA_W16 ≤ j) = logistic(θⱼ − η)` with cut-points
  θ = {cut_points:?}, η = arm effect {iga_arm} + {iga_severe:.1} if `IGA_BL` is severe + a site
  random effect (SD {iga_site_sd}). Negative arm effects mean better outcomes: the common odds
  ratio of a worse category, against placebo, is {iga_odds_ratio_low:.2} for low and
  {iga_odds_ratio_high:.2} for high.
- **Flares**: Poisson with mean rate × `DAYS_ON_STUDY`/28 × frailty, rate {flare_rate} per 28
  days, frailty Gamma with mean 1 and shape {flare_shape}: counts are negative binomial (NB2)
  with θ = {flare_shape}, so the rate ratios against placebo are {rate_ratio_low:.2} (low) and
  {rate_ratio_high:.2} (high).
- **First rescue therapy**: baseline-category logit against `none`; in placebo at baseline itch 7
  the probabilities are {rescue_placebo} % (`none` / `topical-steroid` / `antihistamine` /
  `phototherapy`), from intercepts {rescue_intercepts:?}; log odds ratios
  against placebo (topical-steroid, antihistamine, phototherapy) are {rescue_low:?} for low and
  {rescue_high:?} for high; antihistamine odds rise by {rescue_itch} per point of baseline itch
  above 7.
- **Disposition**: {N_NEVER_DOSED} randomised subjects never took a dose (`FASFL = SAFFL = N`;
  they withdrew within {DAYS_NEVER_DOSED_MAX} days). Dosed subjects dropped out before week 16 with probability
  {dropout} % and stayed {DAYS_DROPOUT_MIN}–{DAYS_DROPOUT_MAX} days. Dropouts were not made to depend on response (missing
  completely at random within arm). Completers had a major protocol deviation with
  probability {deviation} %. `PPROTFL = N` for every non-completer and every deviator.
- **Baseline**: age normal (mean {age_mean}, SD {age_sd}) truncated to 18–75; {female} %
  female; `EASI_BL` log-normal (median {easi_median}, log-SD {easi_log_sd}) truncated to
  16–72; `IGA_BL` severe with probability logistic((`EASI_BL` − {iga_centre})/{iga_scale});
  `PRURITUS_BL` normal (mean {pruritus_centre}, SD {pruritus_bl_sd}) truncated to 4–10.
  Age and sex do not affect any outcome.
- **Missing covariate**: `EASI_BL` is blank for {n_missing_bl} completers chosen at random (the
  value existed and drove their outcome, but was not recorded), so analyses adjusting for it
  exclude them.

## What the committed files contain

Observed in these files (not the truth above: sampling noise included). Dropouts count every
subject without week-16 data, never-dosed subjects included.

| | placebo | low | high |
|---|---|---|---|
"#,
        sites = site_list.join(", "),
        improvement = per_arm(&improvement_percent, 0),
        easi_site_sd = EASI_LOG_RATIO_SITE_SD,
        easi_residual_sd = EASI_LOG_RATIO_RESIDUAL_SD,
        easi_slope = EASI_LOG_RATIO_BASELINE_SLOPE_PER_10,
        easi_centre = EASI_BASELINE_CENTRE,
        pruritus = per_arm(&PRURITUS_TARGET_CHANGE, 1),
        pruritus_site_sd = PRURITUS_SITE_SD,
        pruritus_residual_sd = PRURITUS_RESIDUAL_SD,
        pruritus_slope = PRURITUS_BASELINE_SLOPE,
        pruritus_centre = PRURITUS_BL_MEAN,
        cut_points = IGA_CUT_POINTS,
        iga_arm = per_arm(&IGA_ARM_EFFECT, 1),
        iga_severe = IGA_SEVERE_BASELINE_EFFECT,
        iga_site_sd = IGA_SITE_SD,
        flare_rate = per_arm(&FLARE_RATE_PER_28_DAYS, 1),
        flare_shape = FLARE_FRAILTY_SHAPE,
        rescue_low = RESCUE_ARM_EFFECT[1],
        rescue_high = RESCUE_ARM_EFFECT[2],
        rescue_itch = RESCUE_ANTIHISTAMINE_ITCH_SLOPE,
        dropout = per_arm(&dropout_percent, 0),
        deviation = 100.0 * PROTOCOL_DEVIATION_PROBABILITY,
        age_mean = AGE_MEAN,
        age_sd = AGE_SD,
        female = 100.0 * PROBABILITY_FEMALE,
        easi_median = EASI_BL_LOG_MEDIAN,
        easi_log_sd = EASI_BL_LOG_SD,
        iga_centre = IGA_BL_SEVERE_CENTRE,
        iga_scale = IGA_BL_SEVERE_SCALE,
        pruritus_bl_sd = PRURITUS_BL_SD,
        n_missing_bl = N_MISSING_EASI_BL,
        iga_odds_ratio_low = IGA_ARM_EFFECT[1].exp(),
        iga_odds_ratio_high = IGA_ARM_EFFECT[2].exp(),
        rate_ratio_low = FLARE_RATE_PER_28_DAYS[1] / FLARE_RATE_PER_28_DAYS[0],
        rate_ratio_high = FLARE_RATE_PER_28_DAYS[2] / FLARE_RATE_PER_28_DAYS[0],
        rescue_placebo = per_arm(&rescue_placebo_percent, 0),
        rescue_intercepts = RESCUE_INTERCEPT,
    );
    let count = |value: usize| value.to_string();
    text.push_str(&arm_table_row(
        "randomised",
        |s| count(s.n_randomised),
        &summaries,
    ));
    text.push_str(&arm_table_row(
        "never dosed (FASFL = N)",
        |s| count(s.n_never_dosed),
        &summaries,
    ));
    text.push_str(&arm_table_row(
        "dropouts (no week-16 data)",
        |s| count(s.n_dropouts),
        &summaries,
    ));
    text.push_str(&arm_table_row(
        "PPROTFL = N",
        |s| count(s.n_not_per_protocol),
        &summaries,
    ));
    text.push_str(&arm_table_row(
        "subjects with EASI_CHG",
        |s| count(s.n_easi_change),
        &summaries,
    ));
    text.push_str(&arm_table_row(
        "mean EASI_CHG",
        |s| format!("{:.2}", s.mean_easi_change),
        &summaries,
    ));
    text.push_str(&arm_table_row(
        "mean EASI improvement (%)",
        |s| format!("{:.1}", s.mean_easi_improvement_percent),
        &summaries,
    ));
    text.push_str(&arm_table_row(
        "EASI75 = Y",
        |s| count(s.n_easi75),
        &summaries,
    ));
    text.push_str(&arm_table_row(
        "mean PRURITUS_CHG",
        |s| format!("{:.2}", s.mean_pruritus_change),
        &summaries,
    ));
    text.push_str(&arm_table_row(
        "IGA_W16 clear or almost-clear",
        |s| count(s.n_iga_clear_or_almost),
        &summaries,
    ));
    text.push_str(&arm_table_row(
        "mean FLARES",
        |s| format!("{:.2}", s.mean_flares),
        &summaries,
    ));
    text.push_str(&arm_table_row(
        "RESCUE = none",
        |s| count(s.n_rescue_none),
        &summaries,
    ));
    text
}

/// Every generated file, as (name inside plans/demo/data, contents), in a fixed order.
fn demo_files() -> Vec<(&'static str, String)> {
    let subjects = generate_subjects();
    vec![
        ("subjects.csv", subjects_csv(&subjects)),
        ("allocation.csv", allocation_csv(&subjects)),
        ("README.md", readme(&subjects)),
    ]
}

fn demo_data_folder() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("plans")
        .join("demo")
        .join("data")
}

// ---------------------------------------------------------------------------------------------
// Tests.
// ---------------------------------------------------------------------------------------------

/// The committed demo files are exactly what this generator makes; with UPDATE_DEMO=1 it
/// rewrites them instead. Prints the observed per-arm summary (see it with `--nocapture`).
#[test]
fn demo_data_matches_its_generator() {
    let files = demo_files();
    let folder = demo_data_folder();
    if std::env::var("UPDATE_DEMO").as_deref() == Ok("1") {
        std::fs::create_dir_all(&folder).expect("cannot create plans/demo/data");
        for (name, contents) in &files {
            std::fs::write(folder.join(name), contents)
                .unwrap_or_else(|error| panic!("cannot write {name}: {error}"));
        }
    } else {
        for (name, contents) in &files {
            let committed = std::fs::read(folder.join(name)).unwrap_or_else(|error| {
                panic!("cannot read plans/demo/data/{name} ({error}); regenerate with `UPDATE_DEMO=1 cargo test --test demo_data`")
            });
            assert!(
                committed == contents.as_bytes(),
                "plans/demo/data/{name} differs from what tests/demo_data.rs generates; if the generator \
                 change is intended, regenerate with `UPDATE_DEMO=1 cargo test --test demo_data` and review the diff"
            );
        }
    }
    let subjects = generate_subjects();
    for (arm, label) in ARMS.iter().enumerate() {
        let summary = summarise(&subjects, arm);
        println!(
            "{label:>7}: n = {}, never dosed = {}, dropouts = {} ({:.1} %), PPROTFL=N = {}, \
             mean EASI_CHG = {:.2} (n = {}), mean EASI improvement = {:.1} %, EASI75 = {}, \
             mean PRURITUS_CHG = {:.2}, IGA 0/1 = {}, mean FLARES = {:.2}, RESCUE none = {}",
            summary.n_randomised,
            summary.n_never_dosed,
            summary.n_dropouts,
            100.0 * summary.n_dropouts as f64 / summary.n_randomised as f64,
            summary.n_not_per_protocol,
            summary.mean_easi_change,
            summary.n_easi_change,
            summary.mean_easi_improvement_percent,
            summary.n_easi75,
            summary.mean_pruritus_change,
            summary.n_iga_clear_or_almost,
            summary.mean_flares,
            summary.n_rescue_none,
        );
    }
}

/// The generated data obey the scenario's written specification (the brief for the demo): these
/// checks guard against a generator change that breaks a stated property, which the byte
/// comparison alone would accept after a regeneration.
#[test]
fn demo_data_obeys_its_specification() {
    let subjects = generate_subjects();
    assert_eq!(subjects.len(), 300);
    assert!(
        subjects
            .windows(2)
            .all(|pair| pair[0].usubjid < pair[1].usubjid),
        "sorted by USUBJID"
    );

    for (site_index, (site, size)) in SITE_SIZES.iter().enumerate() {
        let arms: Vec<usize> = subjects
            .iter()
            .filter(|s| s.site_index == site_index)
            .map(|s| s.arm)
            .collect();
        assert_eq!(arms.len(), *size, "site {site} size");
        // Every complete block of 6, in enrolment order, holds exactly two subjects per arm.
        for block in arms.chunks_exact(BLOCK.len()) {
            for arm in 0..N_ARMS {
                assert_eq!(
                    block.iter().filter(|a| **a == arm).count(),
                    2,
                    "block balance at {site}"
                );
            }
        }
    }

    let mut n_missing_bl = 0;
    for subject in &subjects {
        let id = &subject.usubjid;
        assert!((AGE_MIN..=AGE_MAX).contains(&subject.age), "{id} age");
        assert!(
            (EASI_MIN_TENTHS..=EASI_MAX_TENTHS).contains(&subject.easi_bl),
            "{id} EASI_BL"
        );
        assert!(
            (0..=EASI_MAX_TENTHS).contains(&subject.easi_w16),
            "{id} EASI_W16"
        );
        assert!(
            (PRURITUS_BL_MIN_TENTHS..=PRURITUS_MAX_TENTHS).contains(&subject.pruritus_bl),
            "{id} itch BL"
        );
        assert!(
            (0..=PRURITUS_MAX_TENTHS).contains(&subject.pruritus_w16),
            "{id} itch W16"
        );
        assert!(subject.flares >= 0, "{id} flares");
        assert!(subject.days_on_study >= DAYS_DROPOUT_MIN, "{id} days");
        assert_eq!(
            subject.completed,
            subject.days_on_study == DAYS_COMPLETER,
            "{id} days vs completion"
        );
        assert!(
            subject.dosed || !subject.completed,
            "{id}: never dosed but completed"
        );
        assert!(
            subject.completed || !subject.per_protocol(),
            "{id}: dropout in the per-protocol set"
        );
        assert_eq!(
            subject.recorded_easi_w16().is_some(),
            subject.completed,
            "{id} W16 missingness"
        );
        if !subject.easi_bl_recorded {
            n_missing_bl += 1;
            assert!(
                subject.completed && subject.easi_change().is_none() && subject.easi75().is_none()
            );
        }
        // EASI75 agrees with the percentage definition, recomputed here in floating point.
        if let (Some(flag), Some(bl), Some(w16)) = (
            subject.easi75(),
            subject.recorded_easi_bl(),
            subject.recorded_easi_w16(),
        ) {
            let improvement = (bl - w16) as f64 / bl as f64;
            assert_eq!(flag, improvement >= 0.75 - 1e-12, "{id} EASI75");
        }
    }
    assert_eq!(n_missing_bl, N_MISSING_EASI_BL);
    assert_eq!(subjects.iter().filter(|s| !s.dosed).count(), N_NEVER_DOSED);

    // The demo should show a clear high-dose effect and a smaller low-dose effect, with more
    // dropouts on placebo; these hold for the committed seed (they are properties of this draw,
    // checked so that a retuned generator still tells the intended story).
    let summaries: Vec<ArmSummary> = (0..N_ARMS).map(|arm| summarise(&subjects, arm)).collect();
    assert!(summaries[0].mean_easi_change > summaries[1].mean_easi_change);
    assert!(summaries[1].mean_easi_change > summaries[2].mean_easi_change);
    assert!(summaries[0].mean_pruritus_change > summaries[2].mean_pruritus_change);
    assert!(summaries[0].n_dropouts > summaries[2].n_dropouts);
}

/// The random-number building blocks agree with published values or exact laws.
#[test]
fn random_number_generators_match_their_references() {
    // SplitMix64 seeded with 1234567: the five outputs published on Rosetta Code,
    // "Pseudo-random numbers/Splitmix64" (exact integers, compared exactly).
    let mut splitmix = SplitMix64 { state: 1234567 };
    let published_splitmix = [
        6457827717110365317u64,
        3203168211198807973,
        9817491932198370423,
        4593380528125082431,
        16408922859458223821,
    ];
    for value in published_splitmix {
        assert_eq!(splitmix.next_u64(), value);
    }
    // xoshiro256** from the state (1, 2, 3, 4): the ten outputs in the test of the Rust crate
    // rand_xoshiro, which says they were produced with the authors' reference C implementation.
    let mut xoshiro = Rng {
        state: [1, 2, 3, 4],
    };
    let published_xoshiro = [
        11520u64,
        0,
        1509978240,
        1215971899390074240,
        1216172134540287360,
        607988272756665600,
        16172922978634559625,
        8476171486693032832,
        10595114339597558777,
        2904607092377533576,
    ];
    for value in published_xoshiro {
        assert_eq!(xoshiro.next_u64(), value);
    }
    // Uniform integers below 6 land evenly: each bin expects 10 000 of 60 000 with SD ≈ 91;
    // allow 5 SD (common practice for a smoke check).
    let mut rng = Rng::stream(SEED, 999);
    let mut bins = [0usize; 6];
    for _ in 0..60_000 {
        bins[rng.below(6) as usize] += 1;
    }
    assert!(
        bins.iter().all(|count| (9_545..=10_455).contains(count)),
        "{bins:?}"
    );
    // Moments of the variate generators, against their laws (mean and variance), each within
    // about 5 standard errors for 200 000 draws (common practice for a smoke check).
    let n_draws = 200_000;
    let moments = |draws: Vec<f64>| {
        let mean = draws.iter().sum::<f64>() / draws.len() as f64;
        let variance =
            draws.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (draws.len() - 1) as f64;
        (mean, variance)
    };
    let (mean, variance) = moments((0..n_draws).map(|_| rng.normal()).collect());
    assert!(
        mean.abs() < 0.012 && (variance - 1.0).abs() < 0.016,
        "normal {mean} {variance}"
    );
    let (mean, variance) = moments((0..n_draws).map(|_| rng.gamma(2.0, 0.5)).collect());
    assert!(
        (mean - 1.0).abs() < 0.009 && (variance - 0.5).abs() < 0.0125,
        "gamma {mean} {variance}"
    );
    let (mean, variance) = moments((0..n_draws).map(|_| rng.poisson(2.4) as f64).collect());
    assert!(
        (mean - 2.4).abs() < 0.018 && (variance - 2.4).abs() < 0.042,
        "poisson {mean} {variance}"
    );
    let (mean, variance) = moments((0..n_draws).map(|_| rng.logistic()).collect());
    let logistic_variance = std::f64::consts::PI.powi(2) / 3.0;
    assert!(
        mean.abs() < 0.021 && (variance - logistic_variance).abs() < 0.066,
        "logistic {mean} {variance}"
    );
}
