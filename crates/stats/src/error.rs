//! The crate's error type: every way an estimator can refuse its input.
//!
//! Estimators never panic on user-reachable input; they return one of these variants,
//! whose messages are lowercase and name the offending argument.

use thiserror::Error;

/// Why an estimator refused its input or could not produce a result.
#[derive(Debug, Clone, PartialEq, Error)]
pub enum StatsError {
    /// An input slice that must hold at least one value was empty.
    #[error("{what} is empty")]
    Empty {
        /// The argument that was empty.
        what: &'static str,
    },
    /// Two slices that must be parallel (one entry per sample) have different lengths.
    #[error("length mismatch: {left} has {left_len} entries but {right} has {right_len}")]
    LengthMismatch {
        /// The first argument.
        left: &'static str,
        /// Its length.
        left_len: usize,
        /// The second argument.
        right: &'static str,
        /// Its length.
        right_len: usize,
    },
    /// A value that must be a number (finite, or -inf where zero weight is allowed) was not.
    #[error("{what} has an invalid value {value} at index {index}")]
    InvalidValue {
        /// The argument holding the value.
        what: &'static str,
        /// The position of the first bad value.
        index: usize,
        /// The bad value itself (NaN or an infinity).
        value: f64,
    },
    /// Every sample has zero weight, so no normalised estimate exists.
    #[error("all {n} samples have zero weight (every log weight is -inf)")]
    ZeroTotalWeight {
        /// The number of samples.
        n: usize,
    },
    /// A scalar parameter is outside its allowed range.
    #[error("invalid parameter {name}: {reason}")]
    InvalidParameter {
        /// The parameter's name.
        name: &'static str,
        /// What is wrong with it.
        reason: String,
    },
    /// An iterative solver stopped before meeting its tolerance.
    #[error("{solver} did not converge in {iterations} iterations (residual {residual:e})")]
    NotConverged {
        /// Which solver.
        solver: &'static str,
        /// Iterations spent.
        iterations: usize,
        /// The residual it reached.
        residual: f64,
    },
}

/// The result type of every fallible function in this crate.
pub type Result<T> = std::result::Result<T, StatsError>;

/// Checks that two per-sample slices have the same length.
pub(crate) fn check_same_len(
    left: &'static str,
    left_len: usize,
    right: &'static str,
    right_len: usize,
) -> Result<()> {
    if left_len == right_len {
        Ok(())
    } else {
        Err(StatsError::LengthMismatch {
            left,
            left_len,
            right,
            right_len,
        })
    }
}

/// Checks that every value is finite.
pub(crate) fn check_finite(what: &'static str, values: &[f64]) -> Result<()> {
    match values.iter().position(|v| !v.is_finite()) {
        None => Ok(()),
        Some(index) => Err(StatsError::InvalidValue {
            what,
            index,
            value: values[index],
        }),
    }
}

/// Checks that every value is a valid log weight: finite or -inf (a zero weight).
pub(crate) fn check_log_weights(what: &'static str, values: &[f64]) -> Result<()> {
    match values
        .iter()
        .position(|v| v.is_nan() || *v == f64::INFINITY)
    {
        None => Ok(()),
        Some(index) => Err(StatsError::InvalidValue {
            what,
            index,
            value: values[index],
        }),
    }
}

/// Checks that a slice is not empty.
pub(crate) fn check_non_empty<T>(what: &'static str, values: &[T]) -> Result<()> {
    if values.is_empty() {
        Err(StatsError::Empty { what })
    } else {
        Ok(())
    }
}
