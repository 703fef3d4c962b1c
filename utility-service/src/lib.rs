//! Meterveil utility service: ingests quantized readings from gateways, validates
//! and stores them, and runs the operator commands.
//!
//! `routes/` is the HTTP surface, `store/` the database, `ingest` the validation
//! rules, `demo` the one-command demonstration.

pub mod app;
pub mod cli;
pub mod clock;
pub mod committer;
pub mod config;
#[cfg(feature = "demo")]
pub mod demo;
pub mod error;
pub mod ingest;
pub mod jobs;
pub mod jobspec;
pub mod metrics;
pub mod offline;
pub mod reconcile;
pub mod records;
pub mod report;
pub mod routes;
pub mod schedule;
pub mod settlement;
pub mod store;
