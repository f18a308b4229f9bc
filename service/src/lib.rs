//! demefix service library: job documents, validation, provenance, computation and the
//! command line.
//!
//! Module map: [`problem`] (RFC 6901 pointers and the RFC 9457 problem document),
//! [`spec`] (the job document and its validation), [`provenance`] (hashes and versions that
//! let an auditor recompute a run), [`compute`] (runs a validated job with the science
//! crate), [`document`] (the result document and its field names), [`cli`] (the local
//! command line; `main.rs` only calls it), [`client`] (the client commands `submit`, `get`,
//! `report` against a running service).
//!
//! The HTTP service (`demefix serve`): [`config`] (the `DEMEFIX_*` variables), [`domain`]
//! (statuses, submissions, the run document), [`db`] (the SQLite job store; the only module
//! with SQL), [`worker`] (claims, leases, heartbeats, computation on the bounded pool),
//! [`notify`] (completion notifications to a job's `notify_url`),
//! [`http`] (routes and problem documents; the only module with actix), [`server`] (start-up
//! and the shutdown sequence), [`audit`] (the rules of the hash-chained audit log), [`prov`]
//! (the W3C PROV-JSON export of a run), [`verification`] (what a re-verification
//! compares), [`changes`] (the change report between two runs of a series), [`report`] (the
//! HTML report of a run, pure).
//! [`http_client`] is the minimal HTTP/1.1 client shared by the demo ([`demo`]), the client
//! commands ([`client`]) and the notifier ([`notify`]). Dependencies point one way:
//! `http -> domain -> {db, worker, compute} -> science`.
#![forbid(unsafe_code)]

pub mod audit;
pub mod changes;
pub mod cli;
pub mod client;
pub mod compute;
pub mod config;
pub mod db;
pub mod demo;
pub mod document;
pub mod domain;
pub mod http;
pub mod http_client;
pub mod notify;
pub mod problem;
pub mod prov;
pub mod provenance;
pub mod report;
pub mod server;
pub mod spec;
pub mod verification;
pub mod whatif;
pub mod worker;
