//! The release integration suite: one binary, a module per topic. Tables are built with
//! `sluice-aggregate`, controlled with `sluice-disclose` and written to temporary folders.

mod approval;
mod check;
mod common;
mod forged;
mod leaks;
mod write;
