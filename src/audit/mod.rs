//! The audit trail: content hashes of rows, files and split manifests
//! ([`hash`], sixteen short messages at a time by [`lanes`]), and the proof
//! that no row content sits in two splits ([`leak`]).
//!
//! Nothing here changes data; it only digests and checks.

pub mod hash;
pub mod lanes;
pub mod leak;
pub mod ledger;
pub mod provenance;
