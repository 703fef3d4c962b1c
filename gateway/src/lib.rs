//! Meterveil gateway: reads interval readings at the edge, adds fresh dither from
//! the OS-seeded secure generator, quantizes to a level, and keeps only that level
//! in a durable outbox until the utility service acknowledges it.
//!
//! source → pipeline → outbox → uploader

pub mod backoff;
pub mod cli;
pub mod client;
pub mod config;
pub mod gateway;
pub mod identity;
pub mod outbox;
pub mod pipeline;
pub mod run;
pub mod simulate;
pub mod source;
pub mod uploader;
