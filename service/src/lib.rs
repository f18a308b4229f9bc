//! demefix service library: job documents, validation, provenance, computation and the
//! command line.
//!
//! Module map: [`problem`] (RFC 6901 pointers and the RFC 9457 problem document),
//! [`spec`] (the job document and its validation), [`provenance`] (hashes and versions that
//! let an auditor recompute a run), [`compute`] (runs a validated job with the science
//! crate), [`document`] (the result document and its field names), [`cli`] (the local
//! command line; `main.rs` only calls it).
#![forbid(unsafe_code)]

pub mod cli;
pub mod compute;
pub mod document;
pub mod problem;
pub mod provenance;
pub mod spec;
