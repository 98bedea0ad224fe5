//! The one error type of the multiplicity engine. It owns the wording of every
//! validation failure and carries the offending indices and values, so the plan
//! validator can point at the hypothesis concerned. It must not know about plan files,
//! YAML paths or exit codes; callers add the location.

use std::fmt;

use super::Procedure;

/// Why a strategy or a call to the engine was refused.
///
/// Hypothesis indices are 0-based positions in the family, as everywhere in this
/// module. Validation stops at the first problem, checked in a fixed order (count,
/// weights, transitions when the strategy is built; then α and p-values when it is applied),
/// so the same bad input always gives the same error.
#[derive(Debug, Clone, PartialEq)]
pub enum MultiplicityError {
    /// A family must hold at least one hypothesis.
    NoHypotheses,
    /// The weight vector's length differs from the hypothesis count.
    WeightCountMismatch { expected: usize, found: usize },
    /// A weight is non-finite or outside [0, 1].
    WeightOutOfRange { hypothesis: usize, value: f64 },
    /// The weights add up to more than 1 (beyond the stated tolerance).
    WeightSumAboveOne { sum: f64 },
    /// The procedure takes no weights (Hochberg, Hommel and fixed sequence are unweighted here).
    WeightsNotSupported { procedure: Procedure },
    /// Only the graphical procedure takes a transition matrix.
    TransitionsNotSupported { procedure: Procedure },
    /// The transition matrix has the wrong number of rows.
    TransitionRowCountMismatch { expected: usize, found: usize },
    /// A row of the transition matrix has the wrong length.
    TransitionRowLengthMismatch {
        from: usize,
        expected: usize,
        found: usize,
    },
    /// A transition weight is non-finite or outside [0, 1].
    TransitionOutOfRange { from: usize, to: usize, value: f64 },
    /// A hypothesis passes its level back to itself (`G[i][i]` must be 0).
    SelfLoop { hypothesis: usize, value: f64 },
    /// A row of the transition matrix adds up to more than 1 (beyond the stated tolerance).
    TransitionRowSumAboveOne { from: usize, sum: f64 },
    /// The number of p-values differs from the hypothesis count of the strategy.
    PValueCountMismatch { expected: usize, found: usize },
    /// A p-value is non-finite or outside [0, 1].
    PValueOutOfRange { hypothesis: usize, value: f64 },
    /// The family-wise level must lie strictly between 0 and 1.
    AlphaOutOfRange { value: f64 },
    /// Intersection weights were asked of a strategy that is not graphical.
    NotGraphical { procedure: Procedure },
    /// The membership vector of an intersection has the wrong length.
    MembershipCountMismatch { expected: usize, found: usize },
}

impl fmt::Display for MultiplicityError {
    fn fmt(&self, formatter: &mut fmt::Formatter<'_>) -> fmt::Result {
        use MultiplicityError::*;
        match self {
            NoHypotheses => write!(
                formatter,
                "a multiplicity family needs at least one hypothesis"
            ),
            WeightCountMismatch { expected, found } => write!(
                formatter,
                "expected {expected} weights (one per hypothesis), found {found}"
            ),
            WeightOutOfRange { hypothesis, value } => write!(
                formatter,
                "weight of hypothesis {hypothesis} is {value}; expected a number from 0 to 1"
            ),
            WeightSumAboveOne { sum } => {
                write!(
                    formatter,
                    "weights add up to {sum}; expected a total of at most 1"
                )
            }
            WeightsNotSupported { procedure } => write!(
                formatter,
                "procedure {} takes no weights; remove them (it splits α equally or, for fixed \
                 sequence, spends all of α on the first hypothesis)",
                procedure.name()
            ),
            TransitionsNotSupported { procedure } => write!(
                formatter,
                "procedure {} takes no transition matrix; only graphical does",
                procedure.name()
            ),
            TransitionRowCountMismatch { expected, found } => write!(
                formatter,
                "transition matrix has {found} rows; expected {expected} (one per hypothesis)"
            ),
            TransitionRowLengthMismatch {
                from,
                expected,
                found,
            } => write!(
                formatter,
                "transition row of hypothesis {from} has {found} entries; expected {expected}"
            ),
            TransitionOutOfRange { from, to, value } => write!(
                formatter,
                "transition from hypothesis {from} to hypothesis {to} is {value}; expected a number \
                 from 0 to 1"
            ),
            SelfLoop { hypothesis, value } => write!(
                formatter,
                "hypothesis {hypothesis} passes {value} of its level to itself; the diagonal of the \
                 transition matrix must be 0"
            ),
            TransitionRowSumAboveOne { from, sum } => write!(
                formatter,
                "transitions out of hypothesis {from} add up to {sum}; expected a total of at most 1"
            ),
            PValueCountMismatch { expected, found } => write!(
                formatter,
                "expected {expected} p-values (one per hypothesis), found {found}"
            ),
            PValueOutOfRange { hypothesis, value } => write!(
                formatter,
                "p-value of hypothesis {hypothesis} is {value}; expected a finite number from 0 to 1"
            ),
            AlphaOutOfRange { value } => write!(
                formatter,
                "family-wise level alpha is {value}; expected a number strictly between 0 and 1"
            ),
            NotGraphical { procedure } => write!(
                formatter,
                "intersection weights need a graphical strategy; this one is {}",
                procedure.name()
            ),
            MembershipCountMismatch { expected, found } => write!(
                formatter,
                "expected {expected} membership flags (one per hypothesis), found {found}"
            ),
        }
    }
}

impl std::error::Error for MultiplicityError {}
