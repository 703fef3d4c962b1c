//! JSON wire types between gateway and service. These are the unchecked forms:
//! the service converts them once into validated domain values.

use serde::{Deserialize, Serialize};

use crate::profile::DitherProfileSpec;

/// One quantized interval reading as uploaded. No raw value travels.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ReadingWire {
    pub meter_id: String,
    /// Interval start, UTC epoch seconds.
    pub interval_start: i64,
    pub level: u8,
    pub profile_version: u32,
}

/// A register advance: the exact energy (Wh) of the intervals a gateway forwarded
/// in one completed register period [period_start, read_at), UTC epoch seconds.
/// A gateway sends one only for a period it counted from its start.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RegisterWire {
    pub meter_id: String,
    pub period_start: i64,
    pub read_at: i64,
    pub wh: u64,
}

/// One upload from a gateway. `batch_id` is stable across retries of the same rows.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BatchWire {
    pub batch_id: String,
    pub gateway_id: String,
    pub feeder_id: String,
    #[serde(default)]
    pub readings: Vec<ReadingWire>,
    #[serde(default)]
    pub registers: Vec<RegisterWire>,
}

/// The service's acknowledgement. Re-sending an acknowledged batch returns the same one.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct AckWire {
    pub batch_id: String,
    /// Readings newly stored by this batch.
    pub stored_readings: u64,
    /// Readings already stored for the same (meter, interval start); not stored twice.
    pub duplicate_readings: u64,
    pub stored_registers: u64,
    pub duplicate_registers: u64,
}

/// A published profile version of a feeder, as the service serves it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ProfileRecordWire {
    pub feeder_id: String,
    pub version: u32,
    /// UTC epoch seconds at which the service published this version.
    pub created_at: i64,
    pub profile: DitherProfileSpec,
    /// The feeder's IANA time zone: weekly and monthly register periods follow its calendar.
    #[serde(default = "utc")]
    pub time_zone: String,
}

impl ProfileRecordWire {
    /// "v3: gaussian scale 0.30 kW, …", or why the stored profile is invalid.
    pub fn describe(&self) -> String {
        match crate::DitherProfile::try_from(self.profile.clone()) {
            Ok(d) => format!("v{}: {}", self.version, d.describe()),
            Err(e) => format!("v{}: invalid ({e})", self.version),
        }
    }
}

fn utc() -> String {
    "UTC".into()
}

/// Error body of every 4xx/5xx answer: the field (path into the request) and reason.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct ErrorWire {
    pub field: String,
    pub reason: String,
    /// `field: reason`, for people reading logs.
    pub message: String,
}

/// Operator request: register a feeder.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NewFeederWire {
    pub feeder_id: String,
    #[serde(default)]
    pub name: String,
    /// IANA time zone of the feeder's customers (e.g. "Europe/London"); default UTC.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub time_zone: Option<String>,
}

/// Operator request: register meters on a feeder.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NewMetersWire {
    pub meter_ids: Vec<String>,
}
