//! One gateway: its identity, its outbox, its current dither profile and the
//! pipeline between them.

use std::collections::HashMap;
use std::path::Path;

use anyhow::Context;
use meterveil_shared::wire::ProfileRecordWire;
use meterveil_shared::{DitherProfile, MeterId};

use crate::client::{ServiceClient, UploadError};
pub use crate::identity::{GatewayIdentity, GatewayKey};
use crate::outbox::Outbox;
use crate::pipeline::{step, MeterState};
use crate::source::RawReading;
use crate::uploader::{UploadConfig, Uploader};

/// The profile version in force, validated.
#[derive(Debug, Clone)]
pub struct ActiveProfile {
    pub version: u32,
    pub profile: DitherProfile,
    /// The feeder's time zone (weekly and monthly register periods).
    pub tz: meterveil_shared::Tz,
}

impl TryFrom<&ProfileRecordWire> for ActiveProfile {
    type Error = anyhow::Error;
    fn try_from(rec: &ProfileRecordWire) -> anyhow::Result<Self> {
        let profile = DitherProfile::try_from(rec.profile.clone())
            .map_err(|e| anyhow::anyhow!("service sent an invalid profile: {e}"))?;
        let tz = rec.time_zone.parse().map_err(|_| {
            anyhow::anyhow!("service sent time_zone {:?}, which is not an IANA time zone", rec.time_zone)
        })?;
        Ok(Self { version: rec.version, profile, tz })
    }
}

#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct AcceptStats {
    pub levels: u64,
    pub registers: u64,
    /// Readings at or before a meter's latest accepted interval (not dithered again).
    pub skipped: u64,
}

pub struct Gateway {
    identity: GatewayIdentity,
    outbox: Outbox,
    client: ServiceClient,
    profile: Option<ActiveProfile>,
    rng: rand::rngs::StdRng,
    states: HashMap<MeterId, MeterState>,
}

impl Gateway {
    pub async fn open(identity: GatewayIdentity, outbox_path: &Path, client: ServiceClient) -> anyhow::Result<Self> {
        let outbox = Outbox::open(outbox_path).await?;
        Ok(Self {
            identity,
            outbox,
            client,
            profile: None,
            // Dither comes from the OS-seeded cryptographic generator only.
            rng: meterveil_shared::mechanism::secure_rng(),
            states: HashMap::new(),
        })
    }

    pub fn identity(&self) -> &GatewayIdentity {
        &self.identity
    }

    pub fn outbox(&self) -> &Outbox {
        &self.outbox
    }

    pub fn profile(&self) -> Option<&ActiveProfile> {
        self.profile.as_ref()
    }

    /// Pulls the feeder's current profile and caches it. When the service cannot
    /// be reached, falls back to the cached one; errors only when there is neither.
    pub async fn pull_profile(&mut self) -> anyhow::Result<&ActiveProfile> {
        let feeder = self.identity.feeder_id.as_str();
        let rec = match self.client.current_profile(feeder).await {
            Ok(rec) => {
                self.outbox.cache_profile(&rec).await?;
                rec
            }
            Err(e @ UploadError::Refused { .. }) => {
                return Err(anyhow::anyhow!("service refused the profile request for feeder {feeder}: {e}"))
            }
            Err(e) => {
                tracing::warn!(error = %e, "profile pull failed; using the cached profile");
                self.outbox.cached_profile(feeder).await?.with_context(|| {
                    format!("no cached profile for feeder {feeder} and the service is unreachable: {e}")
                })?
            }
        };
        let active = ActiveProfile::try_from(&rec)?;
        if self.profile.as_ref().map(|p| p.version) != Some(active.version) {
            tracing::info!(feeder, version = active.version, profile = %active.profile.describe(), "dither profile in force");
        }
        Ok(self.profile.insert(active))
    }

    /// Dithers and quantizes `readings` and queues the levels durably, together with
    /// the source position they bring the source to.
    pub async fn accept(
        &mut self,
        readings: &[RawReading],
        position: Option<(&str, i64)>,
    ) -> anyhow::Result<AcceptStats> {
        let active = self.profile.clone().context("no dither profile yet: pull one first")?;
        let missing: Vec<&MeterId> = {
            let mut m: Vec<&MeterId> =
                readings.iter().map(|r| &r.meter_id).filter(|id| !self.states.contains_key(*id)).collect();
            m.sort_unstable();
            m.dedup();
            m
        };
        if !missing.is_empty() {
            let loaded = self.outbox.meter_states(&missing).await?;
            for id in missing {
                self.states.insert(id.clone(), loaded.get(id).cloned().unwrap_or_default());
            }
        }
        let mut levels = Vec::with_capacity(readings.len());
        let mut registers = Vec::new();
        let mut touched: HashMap<MeterId, MeterState> = HashMap::new();
        let mut stats = AcceptStats::default();
        for r in readings {
            let state = self.states.entry(r.meter_id.clone()).or_default();
            let out = step(state, r, &active.profile, active.tz, active.version, &mut self.rng);
            match out.level {
                Some(l) => {
                    levels.push(l);
                    stats.levels += 1;
                }
                None => stats.skipped += 1,
            }
            stats.registers += out.registers.len() as u64;
            registers.extend(out.registers);
            touched.insert(r.meter_id.clone(), state.clone());
        }
        self.outbox.enqueue(&levels, &registers, &touched, position).await?;
        Ok(stats)
    }

    pub fn uploader(&self, config: UploadConfig) -> Uploader {
        Uploader::new(self.identity.clone(), self.outbox.clone(), self.client.clone(), config)
    }
}
