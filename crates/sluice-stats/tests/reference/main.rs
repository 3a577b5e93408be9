//! Reference tests for sluice-stats: every expected value is read from a committed vectors file
//! under the workspace's `tests/vectors/`, whose header names where its values come from
//! (published examples, or scipy/statsmodels through `tests/reference.py`).

mod bootstrap;
mod properties;
mod published;
mod scipy;
mod vectors;
