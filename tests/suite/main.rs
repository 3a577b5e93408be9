//! The integration suite: one binary, one module per topic. Check values come from outside the
//! project (published standards and worked examples, kept in `tests/vectors/` with their sources)
//! or from the planted ground truth of the synthetic generator.

mod cli;
mod common;
mod disclosure;
mod link;
mod nhs;
mod release;
mod study;
mod synth;
