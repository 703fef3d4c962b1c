//! Ingest validation: turns an unchecked batch into one that can be stored whole.
//! Pure functions over a snapshot of the feeder's state, so every rule is unit-testable.

use std::collections::{HashMap, HashSet};

use meterveil_shared::wire::BatchWire;
use meterveil_shared::{BatchId, FeederId, FieldError, GatewayId, IntervalStart, MeterId};

use crate::records::{GroupState, ProfileRecord, StoredBatch};

/// Why the rules refuse an upload. Each kind gets its HTTP status in `error.rs`.
#[derive(Debug, thiserror::Error)]
pub enum Refusal {
    /// Well-formed but wrong (a bad row, an unknown meter, ...).
    #[error("{0}")]
    Invalid(FieldError),
    /// Conflicts with what is stored (a sequence number reused or not rising).
    #[error("{0}")]
    Conflict(FieldError),
    /// A gateway writing for a meter or feeder it does not serve.
    #[error("{0}")]
    Forbidden(FieldError),
    /// The signature no longer matches the gateway's key.
    #[error("{0}")]
    Unauthorized(FieldError),
}

impl Refusal {
    pub fn invalid(field: impl Into<String>, reason: impl Into<String>) -> Self {
        Refusal::Invalid(FieldError::new(field, reason))
    }
}

/// A signed upload whose signature checked out and whose body parsed.
#[derive(Debug)]
pub struct Upload {
    /// The gateway that signed it, and the key generation the signature matched.
    pub gateway_id: String,
    pub key_generation: i64,
    pub sequence: i64,
    pub body_sha256: String,
    pub header: BatchHeader,
    pub batch: BatchWire,
}

#[derive(Debug, Clone)]
pub struct ValidReading {
    pub meter_id: MeterId,
    pub interval_start: i64,
    pub level: u8,
    pub profile_version: u32,
}

#[derive(Debug, Clone)]
pub struct ValidRegister {
    pub meter_id: MeterId,
    pub period_start: i64,
    pub read_at: i64,
    pub wh: u64,
}

/// The longest register period an advance may span: a calendar month plus a
/// daylight-saving hour, rounded up to 32 days.
pub const MAX_REGISTER_SPAN_S: i64 = 32 * 86_400;

#[derive(Debug, Clone)]
pub struct ValidatedBatch {
    pub batch_id: String,
    pub gateway_id: GatewayId,
    pub feeder_id: FeederId,
    pub body_sha256: String,
    pub readings: Vec<ValidReading>,
    pub registers: Vec<ValidRegister>,
    /// Profile versions the readings were made with that were not yet marked in
    /// use when the batch was validated (the commit marks them).
    pub versions_used: Vec<u32>,
}

/// The identifying header of a batch, checked before anything is looked up.
#[derive(Debug, Clone)]
pub struct BatchHeader {
    pub batch_id: BatchId,
    pub gateway_id: GatewayId,
    pub feeder_id: FeederId,
}

pub fn check_header(b: &BatchWire) -> Result<BatchHeader, Refusal> {
    Ok(BatchHeader {
        batch_id: BatchId::parse(&b.batch_id).map_err(Refusal::Invalid)?,
        gateway_id: GatewayId::parse(&b.gateway_id).map_err(Refusal::Invalid)?,
        feeder_id: FeederId::parse(&b.feeder_id).map_err(Refusal::Invalid)?,
    })
}

/// What validation needs to know about stored state and the clock.
pub struct IngestContext<'a> {
    /// The feeder's profile versions, oldest first.
    pub profiles: &'a [ProfileRecord],
    /// Which of the batch's meter ids are registered on the feeder.
    pub known_meters: &'a HashSet<String>,
    /// Server time, UTC epoch seconds.
    pub now: i64,
    pub clock_tolerance_s: i64,
    pub stale_grace_s: i64,
}

/// Checks every row; the first problem rejects the whole batch (nothing is stored).
pub fn validate(
    header: BatchHeader,
    batch: &BatchWire,
    body_sha256: String,
    ctx: &IngestContext<'_>,
) -> Result<ValidatedBatch, Refusal> {
    if batch.readings.is_empty() && batch.registers.is_empty() {
        return Err(Refusal::invalid("readings", "batch is empty: it has no readings and no register reads"));
    }
    let feeder = &header.feeder_id;
    let (readings, versions_used) = validate_readings(feeder, &batch.readings, ctx)?;
    let registers = validate_registers(feeder, &batch.registers, ctx)?;
    Ok(ValidatedBatch {
        batch_id: header.batch_id.to_string(),
        gateway_id: header.gateway_id,
        feeder_id: header.feeder_id,
        body_sha256,
        readings,
        registers,
        versions_used,
    })
}

/// A meter id that parses and is registered on the feeder.
fn known_meter(field: &str, raw: &str, feeder: &FeederId, ctx: &IngestContext<'_>) -> Result<MeterId, Refusal> {
    let meter_id = MeterId::parse_field(field, raw).map_err(Refusal::Invalid)?;
    if !ctx.known_meters.contains(raw) {
        return Err(Refusal::invalid(field, format!("meter {meter_id} is not registered on feeder {feeder}")));
    }
    Ok(meter_id)
}

/// The interval readings, and the profile versions they use that were not yet
/// marked in use.
fn validate_readings(
    feeder: &FeederId,
    rows: &[meterveil_shared::wire::ReadingWire],
    ctx: &IngestContext<'_>,
) -> Result<(Vec<ValidReading>, Vec<u32>), Refusal> {
    let by_version: HashMap<u32, (usize, &ProfileRecord)> =
        ctx.profiles.iter().enumerate().map(|(i, p)| (p.version.0, (i, p))).collect();
    let mut seen: HashMap<(&str, i64), usize> = HashMap::with_capacity(rows.len());
    let mut versions_used: Vec<u32> = Vec::new();
    let mut readings = Vec::with_capacity(rows.len());
    for (i, r) in rows.iter().enumerate() {
        let at = |f: &str| format!("readings[{i}].{f}");
        let meter_id = known_meter(&at("meter_id"), &r.meter_id, feeder, ctx)?;
        let Some(&(idx, rec)) = by_version.get(&r.profile_version) else {
            return Err(Refusal::invalid(
                at("profile_version"),
                format!("feeder {feeder} has no profile version {}", r.profile_version),
            ));
        };
        check_reading_time(i, r.interval_start, r.profile_version, idx, rec, ctx)?;
        let k = rec.profile.levels();
        if usize::from(r.level) >= k {
            return Err(Refusal::invalid(
                at("level"),
                format!(
                    "{} is out of range for profile version {} ({k} levels: 0 to {})",
                    r.level,
                    r.profile_version,
                    k - 1
                ),
            ));
        }
        if let Some(first) = seen.insert((r.meter_id.as_str(), r.interval_start), i) {
            return Err(Refusal::invalid(
                format!("readings[{i}]"),
                format!("repeats readings[{first}] (same meter_id and interval_start)"),
            ));
        }
        if !rec.in_use && !versions_used.contains(&r.profile_version) {
            versions_used.push(r.profile_version);
        }
        readings.push(ValidReading {
            meter_id,
            interval_start: r.interval_start,
            level: r.level,
            profile_version: r.profile_version,
        });
    }
    Ok((readings, versions_used))
}

/// Reading `i`'s interval: aligned to its profile's interval length, not in
/// the future, and not made with a version superseded before it began.
fn check_reading_time(
    i: usize,
    interval_start: i64,
    version: u32,
    idx: usize,
    rec: &ProfileRecord,
    ctx: &IngestContext<'_>,
) -> Result<(), Refusal> {
    let at = |f: &str| format!("readings[{i}].{f}");
    let len = rec.profile.interval();
    IntervalStart::new_field(&at("interval_start"), interval_start, len).map_err(Refusal::Invalid)?;
    let interval_end = interval_start + i64::from(len.seconds());
    if interval_end > ctx.now + ctx.clock_tolerance_s {
        return Err(Refusal::invalid(
            at("interval_start"),
            format!(
                "interval {} ends {} s in the future (server time {}); check the meter clock",
                interval_start,
                interval_end - ctx.now,
                ctx.now
            ),
        ));
    }
    if let Some(next) = ctx.profiles.get(idx + 1) {
        let cutoff = next.created_at + ctx.stale_grace_s;
        if interval_start >= cutoff {
            return Err(Refusal::invalid(
                at("profile_version"),
                format!(
                    "version {} is stale: it was superseded by version {} at {}, and readings from {} on must use the newer version",
                    version, next.version.0, next.created_at, cutoff
                ),
            ));
        }
    }
    Ok(())
}

/// The register advances.
fn validate_registers(
    feeder: &FeederId,
    rows: &[meterveil_shared::wire::RegisterWire],
    ctx: &IngestContext<'_>,
) -> Result<Vec<ValidRegister>, Refusal> {
    let registers_allowed = ctx.profiles.iter().any(|p| p.profile.send_registers());
    let step = ctx.profiles.iter().map(|p| i64::from(p.profile.interval().seconds())).max().unwrap_or(900);
    let mut registers = Vec::with_capacity(rows.len());
    let mut seen: HashSet<(&str, i64)> = HashSet::new();
    for (i, g) in rows.iter().enumerate() {
        if !registers_allowed {
            return Err(Refusal::invalid(
                format!("registers[{i}]"),
                format!("no profile of feeder {feeder} allows register reads"),
            ));
        }
        let meter_id = known_meter(&format!("registers[{i}].meter_id"), &g.meter_id, feeder, ctx)?;
        check_register_span(i, g.period_start, g.read_at, step, ctx)?;
        if g.wh > i64::MAX as u64 {
            return Err(Refusal::invalid(format!("registers[{i}].wh"), "is larger than any register can hold"));
        }
        if !seen.insert((g.meter_id.as_str(), g.read_at)) {
            return Err(Refusal::invalid(
                format!("registers[{i}]"),
                "repeats an earlier register read (same meter_id and read_at)",
            ));
        }
        registers.push(ValidRegister { meter_id, period_start: g.period_start, read_at: g.read_at, wh: g.wh });
    }
    Ok(registers)
}

/// Register `i`'s period [period_start, read_at): after 2000, not in the future,
/// forwards, at most [`MAX_REGISTER_SPAN_S`] long and aligned to `step`.
fn check_register_span(
    i: usize,
    period_start: i64,
    read_at: i64,
    step: i64,
    ctx: &IngestContext<'_>,
) -> Result<(), Refusal> {
    let at = |f: &str| format!("registers[{i}].{f}");
    if read_at < meterveil_shared::domain::EARLIEST_EPOCH_S {
        return Err(Refusal::invalid(at("read_at"), format!("{read_at} is before 2000-01-01T00:00:00Z")));
    }
    if read_at > ctx.now + ctx.clock_tolerance_s {
        return Err(Refusal::invalid(at("read_at"), format!("{read_at} is in the future (server time {})", ctx.now)));
    }
    if read_at <= period_start {
        return Err(Refusal::invalid(
            at("read_at"),
            format!("{read_at} is not after period_start {period_start}: the advance runs backwards"),
        ));
    }
    // Saturating: period_start is unchecked input and may be any i64.
    let span = read_at.saturating_sub(period_start);
    if span > MAX_REGISTER_SPAN_S {
        return Err(Refusal::invalid(
            at("period_start"),
            format!("spans {span} s to read_at; a register period is at most {MAX_REGISTER_SPAN_S} s"),
        ));
    }
    if period_start.rem_euclid(step) != 0 || read_at.rem_euclid(step) != 0 {
        return Err(Refusal::invalid(
            at("period_start"),
            format!("the period [{period_start}, {read_at}) is not aligned to the feeder's {step} s intervals"),
        ));
    }
    Ok(())
}

/// The clock rules validation applies (from the service configuration).
#[derive(Debug, Clone, Copy)]
pub struct IngestLimits {
    pub clock_tolerance_s: i64,
    pub stale_grace_s: i64,
}

/// What to do with a signed upload, given the stored state.
#[derive(Debug)]
pub enum Decision {
    /// Valid and new: store it.
    Write(ValidatedBatch),
    /// Stored before (same batch id, or the same sequence number and body).
    Earlier(StoredBatch),
}

/// Decides one signed, parsed upload against a snapshot of stored state, in the
/// order a gateway's mistakes are reported: a rotated key (401), a sequence
/// number reused with another body (409), a replay (the earlier answer), a meter
/// of another feeder (403), the batch's own rows (422), then a sequence number
/// that is not above the gateway's last (409).
pub fn decide(u: &Upload, st: &GroupState, now: i64, limits: &IngestLimits) -> Result<Decision, Refusal> {
    let gw = u.gateway_id.as_str();
    let last_sequence = match st.gateways.get(gw) {
        Some((_, generation, last)) if *generation == u.key_generation => *last,
        // Re-provisioned (or removed) since the signature was checked.
        _ => {
            return Err(Refusal::Unauthorized(FieldError::new(meterveil_shared::auth::HEADER_SIGNATURE, KEY_MISMATCH)))
        }
    };
    if let Some((hash, batch_id)) = st.sequences.get(&(gw.to_owned(), u.sequence)) {
        if *hash != u.body_sha256 {
            return Err(sequence_reused(u.sequence, batch_id));
        }
        if let Some(prev) = st.batches.get(batch_id) {
            return Ok(Decision::Earlier(prev.clone()));
        }
    }
    if let Some(prev) = st.batches.get(u.header.batch_id.as_str()) {
        return Ok(Decision::Earlier(prev.clone()));
    }
    let feeder = u.header.feeder_id.as_str();
    let mut known = HashSet::new();
    let ids = u
        .batch
        .readings
        .iter()
        .map(|r| r.meter_id.as_str())
        .chain(u.batch.registers.iter().map(|g| g.meter_id.as_str()));
    for m in ids {
        match st.meter_feeders.get(m) {
            Some(f) if f != feeder => {
                return Err(Refusal::Forbidden(FieldError::new(
                    "meter_id",
                    format!("meter {m} is on feeder {f}, which gateway {gw} does not serve"),
                )))
            }
            Some(_) => {
                known.insert(m.to_owned());
            }
            None => {}
        }
    }
    let profiles = st.profiles.get(feeder).map_or(&[][..], Vec::as_slice);
    let ctx = IngestContext {
        profiles,
        known_meters: &known,
        now,
        clock_tolerance_s: limits.clock_tolerance_s,
        stale_grace_s: limits.stale_grace_s,
    };
    let valid = validate(u.header.clone(), &u.batch, u.body_sha256.clone(), &ctx)?;
    if u.sequence <= last_sequence {
        return Err(Refusal::Conflict(FieldError::new(
            meterveil_shared::auth::HEADER_SEQUENCE,
            format!("sequence {} is not above the last one this gateway had accepted", u.sequence),
        )));
    }
    Ok(Decision::Write(valid))
}

/// Why a signature fails to match.
pub const KEY_MISMATCH: &str = "does not match: the key is wrong (rotated?) or the request was altered";

/// The 409 for a sequence number already accepted with another body.
pub fn sequence_reused(sequence: i64, batch_id: &str) -> Refusal {
    Refusal::Conflict(FieldError::new(
        meterveil_shared::auth::HEADER_SEQUENCE,
        format!("sequence {sequence} was already used with another body (batch {batch_id})"),
    ))
}
