//! Seeded synthetic trials for the fit benchmark (`tests/bench/fits.rs`): three arms, a number
//! of sites, a baseline covariate and one endpoint per model family, written as CSV for the
//! statsmodels side and as a complete study folder (subjects, allocation, six-analysis plan)
//! for the end-to-end run. It owns the data only; it times nothing and uses no part of the cairn
//! library, so a change in cairn cannot change the benchmark's inputs.
//!
//! The trial is INVENTED: the effects below were chosen only so that every model has non-trivial
//! treatment effects to estimate. Random numbers come from xoshiro256** (Blackman and Vigna,
//! ACM TOMS 47(4), 2021) seeded by SplitMix64 (Steele, Lea and Flood, OOPSLA 2014); normals by
//! Marsaglia's polar method (Marsaglia and Bray, SIAM Review 6(3), 1964); gamma variates by
//! Marsaglia and Tsang (ACM TOMS 26(3), 2000); Poisson counts by sequential search of the CDF and
//! logistic and categorical draws by inversion (Devroye, *Non-Uniform Random Variate
//! Generation*, 1986, ch. II and X). A gamma-frailty Poisson count is NB2 with θ equal to the
//! gamma shape (Lawless 1987). The same algorithms as the demo generator (tests/demo_data.rs),
//! copied here so the two can evolve apart.

use std::fmt::Write as _;

/// SplitMix64's output function.
fn mix64(value: u64) -> u64 {
    let mut z = value;
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// xoshiro256** with the variate generators the trial needs.
pub struct Rng {
    state: [u64; 4],
}

impl Rng {
    pub fn new(seed: u64) -> Rng {
        let mut splitmix = seed;
        let mut next = || {
            splitmix = splitmix.wrapping_add(0x9E37_79B9_7F4A_7C15);
            mix64(splitmix)
        };
        Rng {
            state: [next(), next(), next(), next()],
        }
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

    /// Uniform strictly inside (0, 1).
    fn uniform(&mut self) -> f64 {
        ((self.next_u64() >> 11) as f64 + 0.5) * (1.0 / 9_007_199_254_740_992.0)
    }

    /// Uniform integer in 0..n; the modulo bias is below 2⁻⁵⁰ for the small n used here, which
    /// does not matter for benchmark data.
    fn below(&mut self, n: usize) -> usize {
        ((u128::from(self.next_u64()) * n as u128) >> 64) as usize
    }

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

    fn logistic(&mut self) -> f64 {
        let u = self.uniform();
        (u / (1.0 - u)).ln()
    }

    /// Gamma(shape, scale) for shape ≥ 1 (Marsaglia and Tsang 2000).
    fn gamma(&mut self, shape: f64, scale: f64) -> f64 {
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

    /// Poisson by sequential search; the means here stay far below the range where the terms
    /// underflow (the search also stops if they do).
    fn poisson(&mut self, mean: f64) -> u64 {
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

    fn categorical(&mut self, probabilities: &[f64]) -> usize {
        let u = self.uniform();
        let mut cumulative = 0.0;
        for (index, probability) in probabilities.iter().enumerate() {
            cumulative += probability;
            if u < cumulative {
                return index;
            }
        }
        probabilities.len() - 1
    }
}

/// Number of ordinal categories and of nominal categories.
pub const N_ORDINAL: usize = 5;
pub const N_NOMINAL: usize = 4;
/// The true NB2 shape.
pub const TRUE_THETA: f64 = 2.0;

/// One synthetic trial, one entry per subject in every vector.
pub struct Trial {
    pub n_sites: usize,
    /// 0..n_sites; site 0 is the reference in every design.
    pub site: Vec<usize>,
    /// 0 (control), 1, 2.
    pub arm: Vec<usize>,
    pub baseline: Vec<f64>,
    pub linear: Vec<f64>,
    /// 0 or 1.
    pub binary: Vec<f64>,
    /// Poisson count over `exposure`.
    pub count: Vec<f64>,
    /// Years of follow-up, in [0.5, 2).
    pub exposure: Vec<f64>,
    /// NB2 count over `exposure` with θ = `TRUE_THETA`.
    pub nb_count: Vec<f64>,
    /// 0..N_ORDINAL.
    pub ordinal: Vec<usize>,
    /// 0..N_NOMINAL; 0 is the reference category.
    pub nominal: Vec<usize>,
}

/// Draws a trial of `n_subjects` at `n_sites` sites from `seed`.
pub fn generate(n_subjects: usize, n_sites: usize, seed: u64) -> Trial {
    let mut rng = Rng::new(seed);
    let site_effect: Vec<f64> = (0..n_sites).map(|_| 0.3 * rng.normal()).collect();
    let mut trial = Trial {
        n_sites,
        site: Vec::with_capacity(n_subjects),
        arm: Vec::with_capacity(n_subjects),
        baseline: Vec::with_capacity(n_subjects),
        linear: Vec::with_capacity(n_subjects),
        binary: Vec::with_capacity(n_subjects),
        count: Vec::with_capacity(n_subjects),
        exposure: Vec::with_capacity(n_subjects),
        nb_count: Vec::with_capacity(n_subjects),
        ordinal: Vec::with_capacity(n_subjects),
        nominal: Vec::with_capacity(n_subjects),
    };
    let linear_effect = [0.0, -2.0, -4.0];
    let logit_effect = [0.0, 0.4, 0.8];
    let rate_effect = [0.0, -0.2, -0.4];
    let ordinal_effect = [0.0, 0.3, 0.6];
    let cut_points = [-1.0, 0.0, 1.0, 2.0];
    for _ in 0..n_subjects {
        // Every site appears with every arm at the sizes used (≥ 50 subjects a site).
        let site = rng.below(n_sites);
        let arm = rng.below(3);
        let s = site_effect[site];
        // Rounded to 0.1 like a recorded score; centred covariate used in the linear predictors.
        let baseline = (200.0 + 50.0 * rng.normal()).round() / 10.0;
        let centred = baseline - 20.0;
        let linear = 10.0 + linear_effect[arm] + 0.5 * baseline + 3.0 * s + 4.0 * rng.normal();
        let eta_binary = -0.5 + logit_effect[arm] + 0.05 * centred + s;
        let binary = if rng.uniform() < 1.0 / (1.0 + (-eta_binary).exp()) {
            1.0
        } else {
            0.0
        };
        let exposure = (5.0 + 15.0 * rng.uniform()).round() / 10.0;
        let rate = (0.5 + rate_effect[arm] + 0.03 * centred + s).exp();
        let count = rng.poisson(rate * exposure) as f64;
        let frailty = rng.gamma(TRUE_THETA, 1.0 / TRUE_THETA);
        let nb_count = rng.poisson(rate * exposure * frailty) as f64;
        let latent = ordinal_effect[arm] + 0.05 * centred + s + rng.logistic();
        let ordinal = cut_points.iter().filter(|&&c| latent > c).count();
        // Baseline-category logits against category 0.
        let mut weights = [1.0; N_NOMINAL];
        for (k, weight) in weights.iter_mut().enumerate().skip(1) {
            let k_f = k as f64;
            let eta = -0.5 + 0.2 * k_f - 0.25 * k_f * arm as f64
                + 0.02 * k_f * centred
                + if k == 1 { s } else { 0.0 };
            *weight = eta.exp();
        }
        let total: f64 = weights.iter().sum();
        let probabilities: Vec<f64> = weights.iter().map(|w| w / total).collect();
        let nominal = rng.categorical(&probabilities);
        trial.site.push(site);
        trial.arm.push(arm);
        trial.baseline.push(baseline);
        trial.linear.push(linear);
        trial.binary.push(binary);
        trial.count.push(count);
        trial.exposure.push(exposure);
        trial.nb_count.push(nb_count);
        trial.ordinal.push(ordinal);
        trial.nominal.push(nominal);
    }
    trial
}

impl Trial {
    pub fn len(&self) -> usize {
        self.site.len()
    }

    /// The bench's CSV (read by statsmodels_side.py). Reals use Rust's shortest round-trip
    /// text, so both sides fit exactly the same doubles.
    pub fn to_csv(&self) -> String {
        let mut text = String::with_capacity(self.len() * 80);
        text.push_str("site,arm,baseline,linear,binary,count,exposure,nb_count,ordinal,nominal\n");
        for i in 0..self.len() {
            let _ = writeln!(
                text,
                "{},{},{:?},{:?},{},{},{:?},{},{},{}",
                self.site[i],
                self.arm[i],
                self.baseline[i],
                self.linear[i],
                self.binary[i],
                self.count[i],
                self.exposure[i],
                self.nb_count[i],
                self.ordinal[i],
                self.nominal[i]
            );
        }
        text
    }

    /// Subjects file of the end-to-end study (no treatment column).
    pub fn subjects_csv(&self) -> String {
        let mut text = String::with_capacity(self.len() * 90);
        text.push_str("USUBJID,SITEID,FASFL,BASE,CHG,RESP,EVENTS,YEARS,EXACERB,GRADE,REASON\n");
        let grades = ["none", "mild", "moderate", "marked", "severe"];
        let reasons = ["completed", "adverse-event", "lack-of-efficacy", "withdrew"];
        for i in 0..self.len() {
            let _ = writeln!(
                text,
                "SUBJ{:07},S{:02},Y,{:?},{:?},{},{},{:?},{},{},{}",
                i + 1,
                self.site[i] + 1,
                self.baseline[i],
                self.linear[i],
                if self.binary[i] == 1.0 { "Y" } else { "N" },
                self.count[i],
                self.exposure[i],
                self.nb_count[i],
                grades[self.ordinal[i]],
                reasons[self.nominal[i]]
            );
        }
        text
    }

    /// Allocation file of the end-to-end study.
    pub fn allocation_csv(&self) -> String {
        let arms = ["control", "low", "high"];
        let mut text = String::with_capacity(self.len() * 20);
        text.push_str("USUBJID,ARM\n");
        for i in 0..self.len() {
            let _ = writeln!(text, "SUBJ{:07},{}", i + 1, arms[self.arm[i]]);
        }
        text
    }

    /// Numeric columns of the subjects file (BASE, CHG, EVENTS, YEARS, EXACERB), a narrower
    /// measure of the data, shown beside the target's.
    pub const N_NUMERIC_SUBJECT_COLUMNS: usize = 5;

    /// The plan's ten variables and the treatment arm: "the data held as f64", each value one
    /// double (a factor by its code), against which peak memory is reported.
    pub const N_PLAN_VARIABLES: usize = 11;
}

/// The six-analysis plan of the end-to-end study (schema: plans/README.md).
pub fn study_plan(n_subjects: usize, n_sites: usize) -> String {
    format!(
        "# Invented benchmark study: {n_subjects} subjects, {n_sites} sites, three arms; six analyses,\n\
         # one per model family that takes a site stratum and a baseline covariate.\n\
         cairn-plan: 1\n\
         study:\n  id: BENCH-{n_subjects}\n  title: Synthetic benchmark study (invented)\n  alpha: 0.05\n  sides: 2\n\
         data:\n  subjects: data/subjects.csv\n  key: USUBJID\n  treatment:\n    file: data/allocation.csv\n    column: ARM\n    levels: [control, low, high]\n    reference: control\n\
         variables:\n  SITEID: {{kind: factor}}\n  FASFL: {{kind: factor, levels: [\"Y\", \"N\"]}}\n  BASE: {{kind: numeric}}\n  CHG: {{kind: numeric}}\n  RESP: {{kind: factor, levels: [\"Y\", \"N\"]}}\n  EVENTS: {{kind: count}}\n  YEARS: {{kind: numeric}}\n  EXACERB: {{kind: count}}\n  GRADE: {{kind: ordinal, levels: [none, mild, moderate, marked, severe]}}\n  REASON: {{kind: factor, levels: [completed, adverse-event, lack-of-efficacy, withdrew]}}\n\
         populations:\n  full: {{flag: FASFL, equals: \"Y\"}}\n\
         analyses:\n\
         \x20 - id: change\n    endpoint: {{column: CHG, kind: continuous, higher-is: worse}}\n    population: full\n    model: {{family: linear}}\n    covariates: [BASE]\n    strata: [SITEID]\n    contrasts: each-vs-reference\n\
         \x20 - id: response\n    endpoint: {{column: RESP, kind: binary, event: \"Y\", higher-is: better}}\n    population: full\n    model: {{family: binomial}}\n    covariates: [BASE]\n    strata: [SITEID]\n    contrasts: each-vs-reference\n\
         \x20 - id: events\n    endpoint: {{column: EVENTS, kind: count, higher-is: worse}}\n    population: full\n    model: {{family: poisson, exposure: YEARS}}\n    covariates: [BASE]\n    strata: [SITEID]\n    contrasts: each-vs-reference\n\
         \x20 - id: exacerbations\n    endpoint: {{column: EXACERB, kind: count, higher-is: worse}}\n    population: full\n    model: {{family: negative-binomial, exposure: YEARS}}\n    covariates: [BASE]\n    strata: [SITEID]\n    contrasts: each-vs-reference\n\
         \x20 - id: grade\n    endpoint: {{column: GRADE, kind: ordinal, higher-is: worse}}\n    population: full\n    model: {{family: cumulative}}\n    covariates: [BASE]\n    strata: [SITEID]\n    contrasts: each-vs-reference\n\
         \x20 - id: reason\n    endpoint: {{column: REASON, kind: nominal}}\n    population: full\n    model: {{family: multinomial, reference-category: completed}}\n    covariates: [BASE]\n    strata: [SITEID]\n    contrasts: each-vs-reference\n"
    )
}
