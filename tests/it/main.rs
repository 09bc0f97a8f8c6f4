//! The one integration test binary: each module covers one feature through the
//! `anomark` binary, as a user would run it.

mod util;

mod browser;
mod card;
mod check;
mod cli;
mod conformal;
mod detectors;
mod determinism;
mod diff;
mod errors;
mod examples;
mod featuresets;
mod fuzz;
mod leakage;
mod ledger;
mod progress;
mod recompute;
mod reference;
mod schema;
mod score;
mod signing;
mod sources;
mod splits;
mod stream;
