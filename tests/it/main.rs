//! The one integration test binary: each module covers one feature through the
//! `anomark` binary, as a user would run it.

mod util;

mod browser;
mod card;
mod check;
mod cli;
#[cfg(feature = "cluster")]
mod cluster;
#[cfg(feature = "cluster")]
mod cluster_kill;
mod command;
mod conformal;
mod detectors;
mod determinism;
mod diff;
mod errors;
mod examples;
mod featuresets;
mod fuzz;
mod help;
mod init;
mod leakage;
mod ledger;
mod progress;
mod recompute;
mod reference;
#[cfg(target_os = "linux")]
mod refusals;
mod runrecord;
mod schema;
mod score;
mod signing;
mod snapshots;
mod sources;
mod splits;
mod stream;
