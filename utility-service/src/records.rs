//! Plain records that the store returns and the service rules read: the rules
//! layer owns their shape, so that the rules never import the store.

use std::collections::HashMap;

use meterveil_shared::wire::AckWire;
use meterveil_shared::{DitherProfile, FeederId, ProfileVersion};
use serde::Serialize;

#[derive(Debug, Clone)]
pub struct ProfileRecord {
    pub feeder_id: FeederId,
    pub version: ProfileVersion,
    /// UTC epoch seconds of publication.
    pub created_at: i64,
    pub profile: DitherProfile,
    pub in_use: bool,
    /// Who published it: the HTTP API, a dashboard operator by name, or a calibration.
    pub published_by: String,
    /// When an upload first used it (UTC epoch seconds), if one has.
    pub first_used_at: Option<i64>,
}

impl ProfileRecord {
    /// The wire form, with the feeder's time zone (`time_zone`, IANA name).
    pub fn to_wire(&self, time_zone: &str) -> meterveil_shared::wire::ProfileRecordWire {
        meterveil_shared::wire::ProfileRecordWire {
            feeder_id: self.feeder_id.to_string(),
            version: self.version.0,
            created_at: self.created_at,
            profile: self.profile.to_spec(),
            time_zone: time_zone.to_owned(),
        }
    }
}

#[derive(Debug, Clone, PartialEq, Eq)]
pub struct StoredBatch {
    pub body_sha256: String,
    pub ack: AckWire,
}

/// What is stored about the gateways, sequence numbers, batch ids, feeders and
/// meters a group of uploads names.
#[derive(Debug, Default)]
pub struct GroupState {
    /// gateway id → (feeder id, key generation, last accepted sequence).
    pub gateways: HashMap<String, (String, i64, i64)>,
    /// (gateway id, sequence) → (body sha256, batch id) of an accepted upload.
    pub sequences: HashMap<(String, i64), (String, String)>,
    /// Stored batches by batch id.
    pub batches: HashMap<String, StoredBatch>,
    /// Each named feeder's profile versions, oldest first.
    pub profiles: HashMap<String, Vec<ProfileRecord>>,
    /// meter id → feeder id, for the registered meters among those named.
    pub meter_feeders: HashMap<String, String>,
}

/// One recovered interval as stored and served.
#[derive(Debug, Clone, Serialize)]
pub struct RecoveredRow {
    pub meter_id: String,
    pub interval_start: i64,
    pub kw: f64,
    pub flag: &'static str,
    pub kw_low: f64,
    pub kw_high: f64,
}
