//! The pooling integration suite: one binary, a module per topic. Site releases are built with
//! `sluice-aggregate` tables, controlled with `sluice-disclose`, written and approved with
//! `sluice-release` in temporary folders.

mod bcg;
mod common;
mod counts;
mod refusals;
