//! Stratified Cochran–Mantel–Haenszel tests for a treatment (arms as rows) by ordinal
//! outcome (categories as columns) table, stratified by centre or another factor: the
//! general association statistic, the row-mean-scores statistic and the nonzero-correlation
//! statistic. This module owns the validation of the stratified counts and scores, the
//! per-stratum hypergeometric moments and the quadratic forms. It must not read files,
//! build tables from subject-level data, pick scores on the caller's behalf beyond the
//! documented defaults, or print anything; a statistic that cannot be computed comes back
//! as a [`CmhIssue`] value, never as NaN and never as a panic.
//!
//! # Method
//!
//! Within stratum h with n_h subjects, row (arm) totals r_i and column (category) totals c_j,
//! conditional independence of arm and outcome with all margins fixed makes the cell counts
//! product-hypergeometric, with
//!
//! * E(n_ij) = r_i c_j / n_h, and
//! * Cov(n_ij, n_kl) = r_i (δ_ik n_h − r_k) c_j (δ_jl n_h − c_l) / (n_h² (n_h − 1)),
//!
//! that is Cov(vec N) = (n_h diag(c) − c cᵀ) ⊗ (n_h diag(r) − r rᵀ) / (n_h² (n_h − 1)) for the
//! column-major vec. Each statistic takes a linear summary f_h = A vec(N_h − E N_h), sums the
//! summaries and their covariances A V_h Aᵀ over strata, and forms Q = fᵀ V⁻¹ f:
//!
//! * general association: the cells of the first I − 1 arms and J − 1 categories (the last
//!   arm and category are dropped, which removes the two linear constraints of the fixed
//!   margins), df = (I − 1)(J − 1);
//! * row mean scores: for each of the first I − 1 arms, the sum of the column scores of its
//!   subjects, df = I − 1;
//! * nonzero correlation: the sum over all subjects of row score times column score, df = 1.
//!
//! References: Landis, J. R., Heyman, E. R. and Koch, G. G. (1978), "Average partial
//! association in three-way contingency tables: a review and discussion of alternative
//! tests", International Statistical Review 46, 237–254; Agresti, A. (2013), Categorical
//! Data Analysis, 3rd ed., §8.4 (2nd ed. 2002, §7.5).
//!
//! # Requirements and conventions
//!
//! * Counts are non-negative whole numbers (an `f64` with no fractional part, at most 2⁵³).
//!   Non-integer counts are rejected: the hypergeometric null distribution that justifies the
//!   covariance is defined for counts of subjects, and a fractional count almost always means
//!   weights or rates were passed by mistake.
//! * A stratum with fewer than two subjects contributes nothing (its covariance has the factor
//!   1 / (n_h − 1)); [`CmhResult::strata_used`] says how many strata did contribute.
//!   A stratum with two or more subjects but a single arm or a single category observed is
//!   counted as used although its contribution is exactly zero.
//! * Default scores are 1, 2, …, J for the outcome categories and 1, 2, …, I for the arms.
//!   Caller-given scores must be finite and not all equal.
//! * When the summed covariance is singular the statistic is reported as a [`CmhIssue`]
//!   saying why (an arm or an outcome category with no subjects in any used stratum, scores
//!   that never vary within a stratum, or another rank deficiency such as arms that never
//!   share a stratum). No generalised inverse with reduced degrees of freedom is used,
//!   because a silently reduced df would change the planned test.
//! * p-values are the upper tail of the χ² distribution with the stated df, clamped to [0, 1].

use std::fmt;

use nalgebra::{Cholesky, DMatrix, DVector, SymmetricEigen};
use statrs::distribution::{ChiSquared, ContinuousCDF};

/// The largest count accepted: every whole number up to 2⁵³ is exact in an `f64`.
const LARGEST_COUNT: f64 = 9_007_199_254_740_992.0;

/// A summed covariance whose correlation-scaled form has an eigenvalue below this is treated
/// as singular. Scaling to unit diagonal first makes the threshold independent of the sample
/// size and of the units of the scores.
const SINGULARITY_TOLERANCE: f64 = 1e-10;

/// Counts of an arms × outcome-categories table in each stratum, validated.
///
/// Rows are treatment arms (at least two), columns are ordered outcome categories (at least
/// two), and every stratum has the same shape.
#[derive(Debug, Clone, PartialEq)]
pub struct StratifiedTable {
    strata: Vec<DMatrix<f64>>,
}

/// Which side of the table a set of scores belongs to.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ScoreSide {
    /// Scores of the treatment arms (rows); used only by the correlation statistic.
    Arms,
    /// Scores of the outcome categories (columns).
    Categories,
}

/// What is wrong with one count.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum CountProblem {
    Negative,
    NonFinite,
    NonInteger,
    /// Above 2⁵³, where whole numbers are no longer exact in an `f64`.
    TooLarge,
}

/// Why a table or a set of scores was refused. Indices are 0-based.
#[derive(Debug, Clone, PartialEq)]
pub enum CmhError {
    /// At least one stratum is needed.
    NoStrata,
    /// At least two treatment arms (rows) are needed.
    TooFewArms { found: usize },
    /// At least two outcome categories (columns) are needed.
    TooFewCategories { found: usize },
    /// A stratum's table does not have the shape of the first stratum.
    StratumShapeMismatch {
        stratum: usize,
        expected_arms: usize,
        expected_categories: usize,
        found_arms: usize,
        found_categories: usize,
    },
    /// A flat slice of counts does not hold strata × arms × categories values.
    FlatLengthMismatch { expected: usize, found: usize },
    /// A count is negative, non-finite, fractional or too large.
    InvalidCount {
        stratum: usize,
        arm: usize,
        category: usize,
        value: f64,
        problem: CountProblem,
    },
    /// A score vector's length differs from the number of arms or categories.
    ScoreCountMismatch {
        side: ScoreSide,
        expected: usize,
        found: usize,
    },
    /// A score is NaN or infinite.
    NonFiniteScore {
        side: ScoreSide,
        index: usize,
        value: f64,
    },
    /// All scores on one side are equal, so no score statistic can be formed.
    ConstantScores { side: ScoreSide },
}

impl fmt::Display for ScoreSide {
    fn fmt(&self, formatter: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            ScoreSide::Arms => write!(formatter, "arm"),
            ScoreSide::Categories => write!(formatter, "outcome category"),
        }
    }
}

impl fmt::Display for CmhError {
    fn fmt(&self, formatter: &mut fmt::Formatter<'_>) -> fmt::Result {
        use CmhError::*;
        match self {
            NoStrata => write!(
                formatter,
                "the stratified table has no strata; expected at least one"
            ),
            TooFewArms { found } => {
                write!(
                    formatter,
                    "the table has {found} treatment arm(s); expected at least 2"
                )
            }
            TooFewCategories { found } => {
                write!(
                    formatter,
                    "the table has {found} outcome categor(y/ies); expected at least 2"
                )
            }
            StratumShapeMismatch {
                stratum,
                expected_arms,
                expected_categories,
                found_arms,
                found_categories,
            } => write!(
                formatter,
                "stratum {stratum} is a {found_arms} × {found_categories} table; expected \
                 {expected_arms} × {expected_categories} like the first stratum"
            ),
            FlatLengthMismatch { expected, found } => {
                write!(
                    formatter,
                    "{found} counts were given; expected strata × arms × categories = {expected}"
                )
            }
            InvalidCount {
                stratum,
                arm,
                category,
                value,
                problem,
            } => {
                let expectation = match problem {
                    CountProblem::Negative => "a count cannot be negative",
                    CountProblem::NonFinite => "a count must be finite",
                    CountProblem::NonInteger => "a count must be a whole number of subjects",
                    CountProblem::TooLarge => "a count must be at most 2^53",
                };
                write!(
                    formatter,
                    "count {value} in stratum {stratum}, arm {arm}, category {category} is invalid: {expectation}"
                )
            }
            ScoreCountMismatch {
                side,
                expected,
                found,
            } => {
                write!(
                    formatter,
                    "{found} {side} scores were given; expected {expected}"
                )
            }
            NonFiniteScore { side, index, value } => {
                write!(
                    formatter,
                    "{side} score {index} is {value}; expected a finite number"
                )
            }
            ConstantScores { side } => {
                write!(
                    formatter,
                    "all {side} scores are equal; expected at least two different scores"
                )
            }
        }
    }
}

impl std::error::Error for CmhError {}

impl StratifiedTable {
    /// Validates one arms × categories matrix per stratum.
    ///
    /// Requirements: at least one stratum; at least two arms and two categories; every
    /// stratum the shape of the first; every count a finite, non-negative whole number no
    /// larger than 2⁵³. The first problem found (strata in order, then cells column by
    /// column) is returned.
    pub fn new(strata: Vec<DMatrix<f64>>) -> Result<Self, CmhError> {
        let first = strata.first().ok_or(CmhError::NoStrata)?;
        let (n_arms, n_categories) = first.shape();
        if n_arms < 2 {
            return Err(CmhError::TooFewArms { found: n_arms });
        }
        if n_categories < 2 {
            return Err(CmhError::TooFewCategories {
                found: n_categories,
            });
        }
        for (stratum, counts) in strata.iter().enumerate() {
            if counts.shape() != (n_arms, n_categories) {
                return Err(CmhError::StratumShapeMismatch {
                    stratum,
                    expected_arms: n_arms,
                    expected_categories: n_categories,
                    found_arms: counts.nrows(),
                    found_categories: counts.ncols(),
                });
            }
            for category in 0..n_categories {
                for arm in 0..n_arms {
                    let value = counts[(arm, category)];
                    if let Some(problem) = count_problem(value) {
                        return Err(CmhError::InvalidCount {
                            stratum,
                            arm,
                            category,
                            value,
                            problem,
                        });
                    }
                }
            }
        }
        Ok(Self { strata })
    }

    /// Validates counts given as one flat slice, stratum by stratum, and within a stratum
    /// arm by arm (row-major): `counts[(stratum * n_arms + arm) * n_categories + category]`.
    pub fn from_flat(
        n_strata: usize,
        n_arms: usize,
        n_categories: usize,
        counts: &[f64],
    ) -> Result<Self, CmhError> {
        if n_strata == 0 {
            return Err(CmhError::NoStrata);
        }
        // A product that overflows cannot match any slice length; report it as usize::MAX.
        let expected = n_strata
            .checked_mul(n_arms)
            .and_then(|cells| cells.checked_mul(n_categories))
            .unwrap_or(usize::MAX);
        if n_arms < 2 {
            return Err(CmhError::TooFewArms { found: n_arms });
        }
        if n_categories < 2 {
            return Err(CmhError::TooFewCategories {
                found: n_categories,
            });
        }
        if counts.len() != expected {
            return Err(CmhError::FlatLengthMismatch {
                expected,
                found: counts.len(),
            });
        }
        let cells_per_stratum = n_arms * n_categories;
        let strata = counts
            .chunks(cells_per_stratum)
            .map(|stratum| DMatrix::from_row_slice(n_arms, n_categories, stratum))
            .collect();
        Self::new(strata)
    }

    /// Number of strata, including any that will be skipped for having fewer than two subjects.
    pub fn n_strata(&self) -> usize {
        self.strata.len()
    }

    /// Number of treatment arms (rows).
    pub fn n_arms(&self) -> usize {
        self.strata[0].nrows()
    }

    /// Number of outcome categories (columns).
    pub fn n_categories(&self) -> usize {
        self.strata[0].ncols()
    }

    /// The counts of one stratum, arms × categories.
    pub fn stratum(&self, index: usize) -> Option<&DMatrix<f64>> {
        self.strata.get(index)
    }
}

fn count_problem(value: f64) -> Option<CountProblem> {
    if !value.is_finite() {
        Some(CountProblem::NonFinite)
    } else if value < 0.0 {
        Some(CountProblem::Negative)
    } else if value.fract() != 0.0 {
        Some(CountProblem::NonInteger)
    } else if value > LARGEST_COUNT {
        Some(CountProblem::TooLarge)
    } else {
        None
    }
}

/// One test: the χ² statistic, its degrees of freedom and its upper-tail p-value.
#[derive(Debug, Clone, PartialEq)]
pub struct CmhStatistic {
    pub statistic: f64,
    pub df: usize,
    pub p_value: f64,
}

/// Why one statistic could not be computed. Indices are 0-based.
#[derive(Debug, Clone, PartialEq)]
pub enum CmhIssue {
    /// No stratum has two or more subjects.
    NoUsableStrata,
    /// This arm has no subjects in any used stratum (general association, row mean scores).
    EmptyArm { arm: usize },
    /// This outcome category has no subjects in any used stratum (general association only;
    /// the score statistics need only two differently scored categories).
    EmptyCategory { category: usize },
    /// In every used stratum the observed arms all carry the same score (correlation only).
    NoArmScoreVariation,
    /// In every used stratum the observed outcome categories all carry the same score.
    NoCategoryScoreVariation,
    /// The summed covariance is singular for another reason, for example arms that never
    /// appear together in a stratum. Carries the smallest eigenvalue of the covariance after
    /// scaling it to unit diagonal (0 when a diagonal element is zero).
    SingularCovariance { smallest_scaled_eigenvalue: f64 },
    /// The statistic or its p-value came out non-finite; said in words.
    NumericalFailure { detail: String },
}

impl fmt::Display for CmhIssue {
    fn fmt(&self, formatter: &mut fmt::Formatter<'_>) -> fmt::Result {
        use CmhIssue::*;
        match self {
            NoUsableStrata => write!(formatter, "no stratum has two or more subjects"),
            EmptyArm { arm } => write!(formatter, "arm {arm} has no subjects in any stratum used"),
            EmptyCategory { category } => {
                write!(
                    formatter,
                    "outcome category {category} has no subjects in any stratum used"
                )
            }
            NoArmScoreVariation => {
                write!(
                    formatter,
                    "within every stratum used, the arms observed all have the same score"
                )
            }
            NoCategoryScoreVariation => write!(
                formatter,
                "within every stratum used, the outcome categories observed all have the same score"
            ),
            SingularCovariance {
                smallest_scaled_eigenvalue,
            } => write!(
                formatter,
                "the summed covariance is singular (smallest eigenvalue after scaling to unit \
                 diagonal: {smallest_scaled_eigenvalue:e})"
            ),
            NumericalFailure { detail } => write!(formatter, "numerical failure: {detail}"),
        }
    }
}

/// The three stratified tests, each a value or the reason it could not be computed.
#[derive(Debug, Clone, PartialEq)]
pub struct CmhResult {
    /// df = (arms − 1)(categories − 1); uses no scores.
    pub general_association: Result<CmhStatistic, CmhIssue>,
    /// df = arms − 1; uses the category scores.
    pub row_mean_scores: Result<CmhStatistic, CmhIssue>,
    /// df = 1; uses the arm scores and the category scores.
    pub correlation: Result<CmhStatistic, CmhIssue>,
    /// The category scores used (the defaults 1..J when none were given).
    pub category_scores: Vec<f64>,
    /// The arm scores used (the defaults 1..I when none were given).
    pub arm_scores: Vec<f64>,
    /// Strata with at least two subjects, which are the ones that contribute.
    pub strata_used: usize,
    /// All strata in the table.
    pub strata_total: usize,
}

/// Runs the general association, row-mean-scores and correlation tests on a stratified table.
///
/// `column_scores` score the outcome categories (default 1, 2, …, J); `row_scores` score the
/// arms and matter only to the correlation statistic (default 1, 2, …, I). Both are
/// checked: the right length, finite, and not all equal. Method, requirements and references
/// are in the module documentation. Errors are only for invalid scores; a statistic that
/// cannot be formed from these counts is a [`CmhIssue`] inside the result.
pub fn cmh_tests(
    table: &StratifiedTable,
    column_scores: Option<&[f64]>,
    row_scores: Option<&[f64]>,
) -> Result<CmhResult, CmhError> {
    let category_scores =
        checked_scores(column_scores, table.n_categories(), ScoreSide::Categories)?;
    let arm_scores = checked_scores(row_scores, table.n_arms(), ScoreSide::Arms)?;

    let used: Vec<&DMatrix<f64>> = table
        .strata
        .iter()
        .filter(|counts| counts.sum() >= 2.0)
        .collect();
    let summaries: Vec<StratumSummary> = used
        .iter()
        .map(|counts| StratumSummary::new(counts))
        .collect();

    let (general_association, row_mean_scores, correlation) = if summaries.is_empty() {
        (
            Err(CmhIssue::NoUsableStrata),
            Err(CmhIssue::NoUsableStrata),
            Err(CmhIssue::NoUsableStrata),
        )
    } else {
        (
            general_association(&summaries),
            row_mean_scores(&summaries, &category_scores),
            correlation(&summaries, &arm_scores, &category_scores),
        )
    };

    Ok(CmhResult {
        general_association,
        row_mean_scores,
        correlation,
        category_scores,
        arm_scores,
        strata_used: summaries.len(),
        strata_total: table.n_strata(),
    })
}

fn checked_scores(
    given: Option<&[f64]>,
    expected: usize,
    side: ScoreSide,
) -> Result<Vec<f64>, CmhError> {
    let Some(scores) = given else {
        return Ok((1..=expected).map(|score| score as f64).collect());
    };
    if scores.len() != expected {
        return Err(CmhError::ScoreCountMismatch {
            side,
            expected,
            found: scores.len(),
        });
    }
    if let Some((index, &value)) = scores
        .iter()
        .enumerate()
        .find(|(_, value)| !value.is_finite())
    {
        return Err(CmhError::NonFiniteScore { side, index, value });
    }
    if scores.iter().all(|&score| score == scores[0]) {
        return Err(CmhError::ConstantScores { side });
    }
    Ok(scores.to_vec())
}

/// What every statistic needs from one used stratum (n ≥ 2).
struct StratumSummary {
    n_subjects: f64,
    arm_totals: DVector<f64>,
    category_totals: DVector<f64>,
    /// Observed minus expected count in each cell under conditional independence.
    excess: DMatrix<f64>,
    /// 1 / (n² (n − 1)), the common factor of every covariance in this stratum.
    covariance_factor: f64,
}

impl StratumSummary {
    fn new(counts: &DMatrix<f64>) -> Self {
        let n_subjects = counts.sum();
        let arm_totals =
            DVector::from_iterator(counts.nrows(), counts.row_iter().map(|row| row.sum()));
        let category_totals = DVector::from_iterator(
            counts.ncols(),
            counts.column_iter().map(|column| column.sum()),
        );
        let expected = &arm_totals * category_totals.transpose() / n_subjects;
        Self {
            n_subjects,
            covariance_factor: 1.0 / (n_subjects * n_subjects * (n_subjects - 1.0)),
            excess: counts - expected,
            arm_totals,
            category_totals,
        }
    }

    /// n diag(t) − t tᵀ for the first `size` margins t (arms or categories); the
    /// hypergeometric covariance of the cells is a Kronecker product of two of these.
    fn margin_spread(totals: &DVector<f64>, n_subjects: f64, size: usize) -> DMatrix<f64> {
        DMatrix::from_fn(size, size, |a, b| {
            let diagonal = if a == b { n_subjects * totals[a] } else { 0.0 };
            diagonal - totals[a] * totals[b]
        })
    }

    /// sᵀ (n diag(t) − t tᵀ) s = n Σ t_j (s_j − s̄)², computed in centred form for accuracy.
    /// It is set to exactly zero when the observed margins all carry the same score, so that
    /// such a stratum contributes nothing instead of a rounding residue.
    fn scored_spread(totals: &DVector<f64>, scores: &[f64], n_subjects: f64) -> f64 {
        let mut observed = totals
            .iter()
            .zip(scores)
            .filter(|(total, _)| **total > 0.0)
            .map(|(_, score)| *score);
        let first = observed.next();
        if observed.all(|score| Some(score) == first) {
            return 0.0;
        }
        let mean = totals
            .iter()
            .zip(scores)
            .map(|(total, score)| total * score)
            .sum::<f64>()
            / n_subjects;
        n_subjects
            * totals
                .iter()
                .zip(scores)
                .map(|(total, score)| total * (score - mean) * (score - mean))
                .sum::<f64>()
    }
}

fn general_association(summaries: &[StratumSummary]) -> Result<CmhStatistic, CmhIssue> {
    let n_arms = summaries[0].arm_totals.len();
    let n_categories = summaries[0].category_totals.len();
    if let Some(arm) = first_empty(summaries, |summary| &summary.arm_totals) {
        return Err(CmhIssue::EmptyArm { arm });
    }
    if let Some(category) = first_empty(summaries, |summary| &summary.category_totals) {
        return Err(CmhIssue::EmptyCategory { category });
    }
    let kept_arms = n_arms - 1;
    let kept_categories = n_categories - 1;
    let dimension = kept_arms * kept_categories;
    let mut summed_excess = DVector::zeros(dimension);
    let mut summed_covariance = DMatrix::zeros(dimension, dimension);
    for summary in summaries {
        // The column-major vec of the kept block, matching Cov(vec N) = W_cat ⊗ W_arm.
        let block = summary
            .excess
            .view((0, 0), (kept_arms, kept_categories))
            .clone_owned();
        summed_excess += DVector::from_column_slice(block.as_slice());
        let arm_spread =
            StratumSummary::margin_spread(&summary.arm_totals, summary.n_subjects, kept_arms);
        let category_spread = StratumSummary::margin_spread(
            &summary.category_totals,
            summary.n_subjects,
            kept_categories,
        );
        summed_covariance += category_spread.kronecker(&arm_spread) * summary.covariance_factor;
    }
    chi_square_test(&summed_excess, &summed_covariance, dimension)
}

fn row_mean_scores(
    summaries: &[StratumSummary],
    category_scores: &[f64],
) -> Result<CmhStatistic, CmhIssue> {
    let n_arms = summaries[0].arm_totals.len();
    if let Some(arm) = first_empty(summaries, |summary| &summary.arm_totals) {
        return Err(CmhIssue::EmptyArm { arm });
    }
    let kept_arms = n_arms - 1;
    let scores = DVector::from_column_slice(category_scores);
    let mut summed_excess = DVector::zeros(kept_arms);
    let mut summed_covariance = DMatrix::zeros(kept_arms, kept_arms);
    let mut any_variation = false;
    for summary in summaries {
        let spread = StratumSummary::scored_spread(
            &summary.category_totals,
            category_scores,
            summary.n_subjects,
        );
        if spread == 0.0 {
            // Every subject of this stratum has the same outcome score, so the arms' score
            // sums are fixed by the margins: the stratum carries no information.
            continue;
        }
        any_variation = true;
        let score_sums = &summary.excess * &scores;
        summed_excess += score_sums.rows(0, kept_arms);
        let arm_spread =
            StratumSummary::margin_spread(&summary.arm_totals, summary.n_subjects, kept_arms);
        summed_covariance += arm_spread * (spread * summary.covariance_factor);
    }
    if !any_variation {
        return Err(CmhIssue::NoCategoryScoreVariation);
    }
    chi_square_test(&summed_excess, &summed_covariance, kept_arms)
}

fn correlation(
    summaries: &[StratumSummary],
    arm_scores: &[f64],
    category_scores: &[f64],
) -> Result<CmhStatistic, CmhIssue> {
    let arm_vector = DVector::from_column_slice(arm_scores);
    let category_vector = DVector::from_column_slice(category_scores);
    let mut summed_excess = 0.0;
    let mut summed_variance = 0.0;
    let mut any_arm_variation = false;
    let mut any_category_variation = false;
    for summary in summaries {
        let arm_spread =
            StratumSummary::scored_spread(&summary.arm_totals, arm_scores, summary.n_subjects);
        let category_spread = StratumSummary::scored_spread(
            &summary.category_totals,
            category_scores,
            summary.n_subjects,
        );
        any_arm_variation |= arm_spread != 0.0;
        any_category_variation |= category_spread != 0.0;
        if arm_spread == 0.0 || category_spread == 0.0 {
            continue;
        }
        summed_excess += arm_vector.dot(&(&summary.excess * &category_vector));
        summed_variance += arm_spread * category_spread * summary.covariance_factor;
    }
    if !any_arm_variation {
        return Err(CmhIssue::NoArmScoreVariation);
    }
    if !any_category_variation {
        return Err(CmhIssue::NoCategoryScoreVariation);
    }
    chi_square_test(
        &DVector::from_element(1, summed_excess),
        &DMatrix::from_element(1, 1, summed_variance),
        1,
    )
}

/// The first index whose margin is zero in every used stratum.
fn first_empty(
    summaries: &[StratumSummary],
    margin: impl Fn(&StratumSummary) -> &DVector<f64>,
) -> Option<usize> {
    let size = margin(&summaries[0]).len();
    (0..size).find(|&index| {
        summaries
            .iter()
            .all(|summary| margin(summary)[index] == 0.0)
    })
}

/// Q = fᵀ V⁻¹ f with its χ² p-value, or the reason V cannot be inverted.
fn chi_square_test(
    excess: &DVector<f64>,
    covariance: &DMatrix<f64>,
    df: usize,
) -> Result<CmhStatistic, CmhIssue> {
    let statistic = quadratic_form(excess, covariance)?;
    if !statistic.is_finite() {
        return Err(CmhIssue::NumericalFailure {
            detail: format!("the statistic is {statistic}"),
        });
    }
    // The quadratic form of a positive definite matrix is non-negative; a rounding residue
    // below zero (observed equal to expected) is reported as zero.
    let statistic = statistic.max(0.0);
    let distribution = ChiSquared::new(df as f64).map_err(|error| CmhIssue::NumericalFailure {
        detail: format!("chi-square with {df} df: {error}"),
    })?;
    let p_value = distribution.sf(statistic);
    if !p_value.is_finite() {
        return Err(CmhIssue::NumericalFailure {
            detail: format!("the p-value is {p_value}"),
        });
    }
    Ok(CmhStatistic {
        statistic,
        df,
        p_value: p_value.clamp(0.0, 1.0),
    })
}

/// fᵀ V⁻¹ f through the unit-diagonal scaling D^{-1/2} V D^{-1/2}, which makes the singularity
/// threshold scale-free and keeps the Cholesky factorisation well conditioned.
fn quadratic_form(excess: &DVector<f64>, covariance: &DMatrix<f64>) -> Result<f64, CmhIssue> {
    let dimension = excess.len();
    let diagonal = covariance.diagonal();
    if diagonal.iter().any(|&value| value.is_nan() || value <= 0.0) {
        return Err(CmhIssue::SingularCovariance {
            smallest_scaled_eigenvalue: 0.0,
        });
    }
    let root_diagonal = diagonal.map(f64::sqrt);
    let scaled = DMatrix::from_fn(dimension, dimension, |a, b| {
        covariance[(a, b)] / (root_diagonal[a] * root_diagonal[b])
    });
    let scaled_excess = excess.component_div(&root_diagonal);
    let eigenvalues = SymmetricEigen::new(scaled.clone()).eigenvalues;
    let smallest = eigenvalues.iter().copied().fold(f64::INFINITY, f64::min);
    if smallest.is_nan() || smallest <= SINGULARITY_TOLERANCE {
        return Err(CmhIssue::SingularCovariance {
            smallest_scaled_eigenvalue: smallest,
        });
    }
    let factor = Cholesky::new(scaled).ok_or(CmhIssue::SingularCovariance {
        smallest_scaled_eigenvalue: smallest,
    })?;
    let solved = factor.solve(&scaled_excess);
    Ok(scaled_excess.dot(&solved))
}

#[cfg(test)]
mod tests {
    use super::*;

    // Hand check, common practice: a single 2×2 stratum [[a, b], [c, d]] has
    // E(a) = r1 c1 / n and Var(a) = r1 r2 c1 c2 / (n² (n − 1)); for [[3, 1], [1, 3]]
    // that is E = 2, Var = 4·4·4·4 / (64 · 7) = 4/7, so Q = (3 − 2)² / (4/7) = 7/4.
    #[test]
    fn two_by_two_by_hand() {
        let table =
            StratifiedTable::new(vec![DMatrix::from_row_slice(2, 2, &[3.0, 1.0, 1.0, 3.0])])
                .unwrap();
        let result = cmh_tests(&table, None, None).unwrap();
        for statistic in [
            &result.general_association,
            &result.row_mean_scores,
            &result.correlation,
        ] {
            let statistic = statistic.as_ref().unwrap();
            // Relative tolerance 1e-14: a handful of floating-point operations on small integers.
            assert!(
                (statistic.statistic - 1.75).abs() <= 1e-14 * 1.75,
                "{statistic:?}"
            );
            assert_eq!(statistic.df, 1);
        }
    }

    #[test]
    fn scored_spread_is_exactly_zero_without_variation() {
        let totals = DVector::from_column_slice(&[0.0, 5.0, 0.0, 2.0]);
        assert_eq!(
            StratumSummary::scored_spread(&totals, &[1.0, 0.3, 7.0, 0.3], 7.0),
            0.0
        );
        assert!(StratumSummary::scored_spread(&totals, &[1.0, 0.3, 7.0, 0.4], 7.0) > 0.0);
    }
}
