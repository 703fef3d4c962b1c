//! Validated domain newtypes. Every value here has been checked once, at the edge,
//! so code that holds one never has to re-check it.

use serde::{Deserialize, Serialize};
use std::fmt;

use crate::error::FieldError;

/// Longest identifier we accept, in bytes. Long enough for any utility's asset
/// numbering scheme seen in practice, short enough to keep index keys small.
pub const MAX_ID_LEN: usize = 64;

fn check_id(field: &str, raw: &str) -> Result<(), FieldError> {
    if raw.is_empty() {
        return Err(FieldError::new(field, "must not be empty"));
    }
    if raw.len() > MAX_ID_LEN {
        return Err(FieldError::new(field, format!("is {} bytes long; at most {MAX_ID_LEN} are allowed", raw.len())));
    }
    if let Some(bad) = raw.chars().find(|c| !(c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.' | ':'))) {
        return Err(FieldError::new(
            field,
            format!("contains {bad:?}; only ASCII letters, digits and - _ . : are allowed"),
        ));
    }
    Ok(())
}

macro_rules! id_type {
    ($(#[$doc:meta])* $name:ident, $field:literal) => {
        $(#[$doc])*
        #[derive(Debug, Clone, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize)]
        #[serde(transparent)]
        pub struct $name(String);

        impl $name {
            /// Validates `raw` (1 to 64 bytes of ASCII letters, digits and `- _ . :`).
            pub fn parse(raw: &str) -> Result<Self, FieldError> {
                Self::parse_field($field, raw)
            }

            /// As [`Self::parse`], naming `field` in the error.
            pub fn parse_field(field: &str, raw: &str) -> Result<Self, FieldError> {
                check_id(field, raw)?;
                Ok(Self(raw.to_owned()))
            }

            pub fn as_str(&self) -> &str {
                &self.0
            }
        }

        impl fmt::Display for $name {
            fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str(&self.0)
            }
        }

        impl<'de> Deserialize<'de> for $name {
            fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
                let raw = String::deserialize(d)?;
                Self::parse(&raw).map_err(serde::de::Error::custom)
            }
        }
    };
}

id_type!(
    /// Opaque identifier of one household or business meter.
    MeterId,
    "meter_id"
);
id_type!(
    /// Opaque identifier of a distribution feeder (the unit a dither profile applies to).
    FeederId,
    "feeder_id"
);
id_type!(
    /// Identifier of one upload batch, chosen by the gateway and stable across retries.
    BatchId,
    "batch_id"
);
id_type!(
    /// Opaque identifier of one gateway (serves one or more meters on one feeder).
    GatewayId,
    "gateway_id"
);

/// Interval length in seconds. Only the lengths utilities use for settlement are allowed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(try_from = "u32", into = "u32")]
pub struct IntervalLength(u32);

impl IntervalLength {
    pub const ALLOWED_S: [u32; 3] = [900, 1800, 3600];
    pub const QUARTER_HOUR: IntervalLength = IntervalLength(900);

    pub fn new(seconds: u32) -> Result<Self, FieldError> {
        if Self::ALLOWED_S.contains(&seconds) {
            Ok(Self(seconds))
        } else {
            Err(FieldError::new(
                "interval_s",
                format!("is {seconds}; allowed interval lengths are 900, 1800 and 3600 seconds"),
            ))
        }
    }

    pub fn seconds(self) -> u32 {
        self.0
    }

    /// Hours per interval, the factor between average kW and Wh/1000.
    pub fn hours(self) -> f64 {
        f64::from(self.0) / 3600.0
    }

    /// Intervals in one UTC day (96 for quarter-hours).
    pub fn per_day(self) -> u32 {
        86_400 / self.0
    }
}

impl TryFrom<u32> for IntervalLength {
    type Error = FieldError;
    fn try_from(v: u32) -> Result<Self, FieldError> {
        Self::new(v)
    }
}

impl From<IntervalLength> for u32 {
    fn from(v: IntervalLength) -> u32 {
        v.0
    }
}

/// Day of the week of UTC epoch second `t`: 0 = Monday … 6 = Sunday
/// (1970-01-01 was a Thursday).
pub fn utc_weekday(t: i64) -> u32 {
    (t.div_euclid(86_400) + 3).rem_euclid(7) as u32
}

/// Earliest interval start we accept: 2000-01-01T00:00:00Z. Anything earlier is a
/// meter with an unset clock, not data.
pub const EARLIEST_EPOCH_S: i64 = 946_684_800;

/// Start of an interval, as UTC epoch seconds, aligned to its interval length.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize)]
#[serde(transparent)]
pub struct IntervalStart(i64);

impl IntervalStart {
    pub fn new(epoch_s: i64, len: IntervalLength) -> Result<Self, FieldError> {
        Self::new_field("interval_start", epoch_s, len)
    }

    pub fn new_field(field: &str, epoch_s: i64, len: IntervalLength) -> Result<Self, FieldError> {
        if epoch_s < EARLIEST_EPOCH_S {
            return Err(FieldError::new(
                field,
                format!("{epoch_s} is before 2000-01-01T00:00:00Z; is the meter clock set?"),
            ));
        }
        let step = i64::from(len.seconds());
        if epoch_s.rem_euclid(step) != 0 {
            return Err(FieldError::new(
                field,
                format!("{epoch_s} is not aligned to the {step}-second interval length"),
            ));
        }
        Ok(Self(epoch_s))
    }

    pub fn epoch_s(self) -> i64 {
        self.0
    }

    /// Start of the UTC day this interval lies in.
    pub fn day_start(self) -> i64 {
        self.0 - self.0.rem_euclid(86_400)
    }
}

/// Version number of a feeder's dither profile (1, 2, ...).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(transparent)]
pub struct ProfileVersion(pub u32);

impl fmt::Display for ProfileVersion {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "v{}", self.0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ids_accept_plain_and_reject_odd_input() {
        assert!(MeterId::parse("QF-N-0001").is_ok());
        assert!(MeterId::parse("a:b.c_d").is_ok());
        let e = MeterId::parse("").unwrap_err();
        assert_eq!(e.field, "meter_id");
        assert!(MeterId::parse("has space").unwrap_err().reason.contains("' '"));
        assert!(FeederId::parse(&"x".repeat(65)).unwrap_err().reason.contains("65 bytes"));
        assert!(GatewayId::parse("ü").is_err());
    }

    #[test]
    fn interval_start_alignment_and_floor() {
        let q = IntervalLength::QUARTER_HOUR;
        assert!(IntervalStart::new(1_700_000_050, q).is_err());
        assert!(IntervalStart::new(1_699_999_200, q).is_ok());
        assert!(IntervalStart::new(900, q).unwrap_err().reason.contains("2000"));
        let s = IntervalStart::new(1_699_999_200, q).unwrap();
        assert_eq!(s.day_start() % 86_400, 0);
        assert!(s.epoch_s() - s.day_start() < 86_400);
    }

    #[test]
    fn interval_lengths() {
        assert!(IntervalLength::new(600).is_err());
        assert_eq!(IntervalLength::new(1800).unwrap().per_day(), 48);
        assert_eq!(IntervalLength::QUARTER_HOUR.per_day(), 96);
    }
}
