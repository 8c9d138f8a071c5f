//! Errors of the model crate, written for the analyst who must act on them.

use thiserror::Error;

/// Everything that can stop a fit. Messages name the offending factor, covariate or row.
#[derive(Debug, Error, Clone, PartialEq)]
pub enum ModelError {
    #[error("no observations: the series has no usable rows")]
    Empty,
    #[error("row {row}: {what} is not a finite number ({value})")]
    NonFinite {
        row: usize,
        what: String,
        value: f64,
    },
    #[error(
        "row {row}: {what} is {value:e}, out of the range the model computes with \
         (magnitudes up to 1e100 on the model scale); check the value and its unit"
    )]
    OutOfRange {
        row: usize,
        what: String,
        value: f64,
    },
    #[error("row {row}: expected {expected} {what}, found {found}")]
    RowShape {
        row: usize,
        what: &'static str,
        expected: usize,
        found: usize,
    },
    #[error("the response is constant ({value}): there is no variability to partition")]
    ConstantResponse { value: f64 },
    #[error("covariate `{name}` is constant ({value}): it cannot be told apart from the intercept; drop it")]
    ConstantCovariate { name: String, value: f64 },
    #[error("covariates {names:?} are collinear (smallest eigenvalue of their correlation matrix {min_eigen:.2e}); drop one of them")]
    Collinear { names: Vec<String>, min_eigen: f64 },
    #[error("grouping factor `{factor}` has {levels} level(s); REML needs at least 2 to estimate its variance")]
    TooFewLevels { factor: String, levels: usize },
    #[error(
        "grouping factor `{factor}` is not replicated: only {replicated} of its {levels} levels have more than one observation, \
         so its variance cannot be told apart from residual noise; drop the factor or collect repeated observations"
    )]
    NotReplicated {
        factor: String,
        levels: usize,
        replicated: usize,
    },
    #[error("a grouping factor or covariate is named twice: `{0}`")]
    DuplicateName(String),
    #[error("invalid prior for {target}: {reason}")]
    InvalidPrior { target: String, reason: String },
    #[error("invalid sampler settings: {0}")]
    InvalidSettings(String),
    #[error("numerical failure: {0}")]
    Numerical(String),
    #[error(
        "{censored} of the {observations} values are censored (known only to lie below or \
         above a limit); REML needs complete values and Tidemark never substitutes a limit \
         for a value: the posterior (`tidemark refit`) treats them exactly"
    )]
    Censored {
        censored: usize,
        observations: usize,
    },
    #[error(
        "a trend needs data from at least two years; leave `trend` off until a second year arrives"
    )]
    TrendNeedsYears,
    #[error("the fit was cancelled")]
    Cancelled,
    /// The previous version's posterior conflicts with the new data
    /// ([`crate::check_warm_start`]); nothing was sampled, and a cold start is the way on.
    #[error("warm start refused: {reason}")]
    WarmStartRefused { reason: String, distance: f64 },
}
