//! The one integration test binary: each module covers one feature through the
//! `anomark` binary, as a user would run it.

mod util;

mod cli;
mod determinism;
mod errors;
mod examples;
mod leakage;
mod signing;
mod splits;
