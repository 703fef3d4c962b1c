//! Meterveil's shared library: validated domain types, the JSON wire types, the
//! privacy mechanism (used identically by gateway and service) and the numerical
//! core. Pure computation: no async runtime, no database, no HTTP.

pub mod aggregate;
pub mod audit;
pub mod auth;
pub mod bootstrap;
pub mod calibrate;
pub mod cluster;
pub mod domain;
pub mod energies;
pub mod error;
pub mod mechanism;
pub mod profile;
pub mod recovery;
pub mod special;
pub mod tariff;
pub mod wire;

/// IANA time zones, for register periods that follow a feeder's calendar.
pub use chrono_tz::Tz;
pub use domain::{BatchId, FeederId, GatewayId, IntervalLength, IntervalStart, MeterId, ProfileVersion};
pub use error::FieldError;
pub use profile::{DitherProfile, DitherProfileSpec, NoiseFamily, RegisterPeriod};
