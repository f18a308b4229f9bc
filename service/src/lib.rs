//! demefix service library: job documents, validation, provenance, computation and the
//! command line.
//!
//! Module map: [`problem`] (RFC 6901 pointers and the RFC 9457 problem document),
//! [`spec`] (the job document and its validation), [`provenance`] (hashes and versions that
//! let an auditor recompute a run), [`compute`] (runs a validated job with the science
//! crate), [`document`] (the result document and its field names), [`cli`] (the local
//! command line; `main.rs` only calls it).
//!
//! The HTTP service (`demefix serve`): [`config`] (the `DEMEFIX_*` variables), [`domain`]
//! (statuses, submissions, the run document), [`db`] (the SQLite job store; the only module
//! with SQL), [`worker`] (claims, leases, heartbeats, computation on the bounded pool),
//! [`http`] (routes and problem documents; the only module with actix), [`report`] (the HTML
//! report of a run, pure), [`server`] (start-up and the shutdown sequence). Dependencies point one way:
//! `http -> domain -> {db, worker, compute} -> science`.
#![forbid(unsafe_code)]

pub mod cli;
pub mod compute;
pub mod config;
pub mod db;
pub mod demo;
pub mod document;
pub mod domain;
pub mod http;
pub mod problem;
pub mod provenance;
pub mod report;
pub mod server;
pub mod spec;
pub mod whatif;
pub mod worker;
