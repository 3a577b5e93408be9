//! The one error type of the crate: every rejected input names the offending value.

/// Why a statistic could not be computed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum StatsError {
    #[error("need at least {need} observations, got {got}")]
    TooFew { need: usize, got: usize },
    #[error("observation {index} is not finite: {value}")]
    NonFinite { index: usize, value: f64 },
    #[error("probability must lie in [0, 1], got {0}")]
    Probability(f64),
    #[error("confidence level must lie strictly between 0 and 1, got {0}")]
    Level(f64),
    #[error("paired samples differ in length: {left} and {right}")]
    LengthMismatch { left: usize, right: usize },
    #[error("count {count} exceeds the number of trials {trials}")]
    CountExceedsTrials { count: u64, trials: u64 },
    #[error("number of trials must be positive, got {0}")]
    NoTrials(u64),
    #[error("person-time must be positive and finite, got {0}")]
    Exposure(f64),
    #[error("rate ratio needs at least one event, got {x1} and {x2}")]
    NoEvents { x1: u64, x2: u64 },
    /// Carries the estimate (or, for ranks, the common value) at which the spread vanished.
    #[error("data have no spread: standard error is zero at {0}")]
    ZeroVariance(f64),
    #[error("sampling variance {index} must be positive and finite, got {value}")]
    Variance { index: usize, value: f64 },
    #[error("exact distribution needs distinct values, found {0} tied or zero")]
    ExactTies(usize),
    #[error("exact distribution limited to size {max}, got {size}")]
    ExactTooLarge { size: usize, max: usize },
    #[error("{pairs} pairwise values exceed the limit of {max}")]
    TooManyPairs { pairs: usize, max: usize },
    #[error("mcnemar test needs a discordant pair, got b = {b} and c = {c}")]
    NoDiscordantPairs { b: u64, c: u64 },
    #[error("bootstrap needs at least one replicate, got {0}")]
    NoReplicates(usize),
    #[error("bootstrap replicate {rep} gave a non-finite statistic: {value}")]
    NonFiniteReplicate { rep: usize, value: f64 },
    #[error("statistic of the original data is not finite: {0}")]
    NonFiniteStatistic(f64),
    #[error("cluster {cluster} has no {group} observations")]
    EmptyGroup { cluster: usize, group: &'static str },
    #[error("distribution rejected its parameters: {0}")]
    Distribution(String),
}
