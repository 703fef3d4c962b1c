//! Job specifications: what each kind of background job is asked to do.
//!
//! A request (`…Request`, the JSON an operator sends) is checked once at the
//! edge into a specification (`…Spec`), one error per bad field; the spec is
//! stored as it is (its JSON in the job row's `params`) and the worker matches on
//! [`JobSpec`]. Each default lives here, beside its parameter. Checks that need
//! stored state (the feeder exists, the recovery job is done, the captured meters
//! are on its feeder) stay with the route that has the store.

use meterveil_shared::calibrate::Targets;
use meterveil_shared::recovery::{RankChoice, RecoveryParams, DEFAULT_ALPHA_KW};
use meterveil_shared::{FeederId, FieldError, MeterId, RegisterPeriod};
use serde::{Deserialize, Serialize};
use serde_json::Value;

/// Longest window one recovery may take: 93 days.
pub const MAX_WINDOW_S: i64 = 93 * 86_400;
/// Highest fixed rank a recovery may ask for.
pub const MAX_RANK: usize = 500;
/// Recovery jobs one clustering may combine.
pub const MAX_CLUSTERED_JOBS: usize = 100;
/// Cluster counts an operator may ask for.
pub const CLUSTER_COUNTS: std::ops::RangeInclusive<usize> = 2..=200;
/// Captured meters one audit may name.
pub const MAX_CAPTURED: usize = 1000;

/// How a recovery's rank is set: a fixed rank, or `"auto"` (chosen by held-out
/// likelihood over [`RecoveryParams`]'s default grid).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(untagged)]
pub enum RankSetting {
    Fixed(usize),
    Auto(AutoWord),
}

/// The word `"auto"`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum AutoWord {
    #[serde(rename = "auto")]
    Auto,
}

impl RankSetting {
    pub const AUTO: Self = RankSetting::Auto(AutoWord::Auto);

    pub fn choice(self) -> RankChoice {
        match self {
            RankSetting::Fixed(r) => RankChoice::Fixed(r),
            RankSetting::Auto(_) => RecoveryParams::default().rank,
        }
    }

    /// `"auto"` or absent, or a rank from 1 to [`MAX_RANK`].
    fn parse(v: Option<&Value>) -> Result<Self, FieldError> {
        match v {
            None => Ok(Self::AUTO),
            Some(Value::String(a)) if a == "auto" => Ok(Self::AUTO),
            Some(Value::Number(n)) if n.as_u64().is_some_and(|r| (1..=MAX_RANK as u64).contains(&r)) => {
                Ok(RankSetting::Fixed(n.as_u64().unwrap_or(1) as usize))
            }
            Some(other) => {
                Err(FieldError::new("rank", format!("{other} is neither \"auto\" nor a rank from 1 to {MAX_RANK}")))
            }
        }
    }
}

fn auto_rank() -> RankSetting {
    RankSetting::AUTO
}

fn default_alpha() -> f64 {
    DEFAULT_ALPHA_KW
}

fn audit_seed() -> u64 {
    meterveil_shared::audit::DEFAULT_SEED
}

fn calibration_seed() -> u64 {
    meterveil_shared::calibrate::DEFAULT_SEED
}

fn yes() -> bool {
    true
}

fn one() -> usize {
    1
}

// ---- recovery ----------------------------------------------------------------

/// `POST /v1/recoveries`.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RecoverRequest {
    pub feeder_id: String,
    pub from: i64,
    pub to: i64,
    /// `"auto"` (default) or a rank.
    #[serde(default)]
    pub rank: Option<Value>,
    /// Service limit, kW. Default [`DEFAULT_ALPHA_KW`].
    #[serde(default)]
    pub alpha_kw: Option<f64>,
    /// A finished recovery of the same feeder whose window overlaps this one:
    /// the fit starts from its estimates at its rank (a rolling run).
    #[serde(default)]
    pub warm_from: Option<String>,
    /// Refits of the bootstrap that gives the bands of group loads and
    /// energies the fit's own error (0 to 32; default 8, 0: none).
    #[serde(default)]
    pub band_draws: Option<u32>,
}

/// A recovery of one feeder's window [from, to).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RecoverSpec {
    pub feeder_id: FeederId,
    pub from: i64,
    pub to: i64,
    #[serde(default = "auto_rank")]
    pub rank: RankSetting,
    #[serde(default = "default_alpha")]
    pub alpha_kw: f64,
    /// The finished recovery the fit starts from, if any.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub warm_from: Option<String>,
    /// The settlement run this recovery computes: it starts from the newest
    /// finished recovery of the feeder that holds its window's start, and its
    /// day's figures are frozen into the run when it finishes.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub settles: Option<SettledDay>,
    /// Refits of the bands' bootstrap (`shared::bootstrap`).
    #[serde(default)]
    pub band_draws: u32,
}

/// The settlement run a recovery computes, and its day.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SettledDay {
    pub run_id: String,
    pub day_start: i64,
}

impl RecoverRequest {
    pub fn check(self) -> Result<RecoverSpec, FieldError> {
        let feeder_id = FeederId::parse(&self.feeder_id)?;
        if self.to <= self.from {
            return Err(FieldError::new("to", "must be after from"));
        }
        if self.to - self.from > MAX_WINDOW_S {
            return Err(FieldError::new("to", "the window may span at most 93 days"));
        }
        let rank = RankSetting::parse(self.rank.as_ref())?;
        let alpha_kw = self.alpha_kw.unwrap_or(DEFAULT_ALPHA_KW);
        if !(alpha_kw.is_finite() && alpha_kw > 0.0 && alpha_kw <= 10_000.0) {
            return Err(FieldError::new("alpha_kw", "must be a positive number of kW up to 10000"));
        }
        if self.warm_from.as_ref().is_some_and(|w| w.is_empty() || w.len() > 64) {
            return Err(FieldError::new("warm_from", "must name a recovery job"));
        }
        let band_draws = self.band_draws.unwrap_or(meterveil_shared::bootstrap::DEFAULT_DRAWS as u32);
        if band_draws as usize > meterveil_shared::bootstrap::MAX_DRAWS {
            return Err(FieldError::new("band_draws", format!("at most {}", meterveil_shared::bootstrap::MAX_DRAWS)));
        }
        Ok(RecoverSpec {
            feeder_id,
            from: self.from,
            to: self.to,
            rank,
            alpha_kw,
            warm_from: self.warm_from,
            settles: None,
            band_draws,
        })
    }
}

// ---- clustering --------------------------------------------------------------

/// `POST /v1/clusterings`.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ClusterRequest {
    pub recovery_jobs: Vec<String>,
    /// `"auto"` (default: the stability rule) or a count.
    #[serde(default)]
    pub clusters: Option<Value>,
}

/// A clustering of the meters of one or more finished recoveries of one window.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ClusterSpec {
    pub recovery_jobs: Vec<String>,
    /// `None`: counted by the stability rule.
    #[serde(default)]
    pub clusters: Option<usize>,
}

impl ClusterRequest {
    pub fn check(self) -> Result<ClusterSpec, FieldError> {
        if self.recovery_jobs.is_empty() || self.recovery_jobs.len() > MAX_CLUSTERED_JOBS {
            return Err(FieldError::new(
                "recovery_jobs",
                format!("give from 1 to {MAX_CLUSTERED_JOBS} finished recovery job ids"),
            ));
        }
        let clusters = match &self.clusters {
            None => None,
            Some(Value::String(a)) if a == "auto" => None,
            Some(Value::Number(n)) if n.as_u64().is_some_and(|k| CLUSTER_COUNTS.contains(&(k as usize))) => {
                n.as_u64().map(|k| k as usize)
            }
            Some(other) => {
                return Err(FieldError::new(
                    "clusters",
                    format!(
                        "{other} is neither \"auto\" nor a count from {} to {}",
                        CLUSTER_COUNTS.start(),
                        CLUSTER_COUNTS.end()
                    ),
                ))
            }
        };
        Ok(ClusterSpec { recovery_jobs: self.recovery_jobs, clusters })
    }
}

// ---- audit -------------------------------------------------------------------

/// `POST /v1/audits`.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct AuditRequest {
    pub recovery_job: String,
    pub captured: Vec<String>,
    #[serde(default)]
    pub seed: Option<u64>,
    /// Audit as if the feeder sent register reads of this period.
    #[serde(default)]
    pub register_period: Option<String>,
    #[serde(default = "yes")]
    pub curves: bool,
}

/// A privacy audit of a finished recovery, with these meters captured.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct AuditSpec {
    pub recovery_job: String,
    pub captured: Vec<MeterId>,
    /// Default [`meterveil_shared::audit::DEFAULT_SEED`].
    #[serde(default = "audit_seed")]
    pub seed: u64,
    #[serde(default)]
    pub register_period: Option<RegisterPeriod>,
    /// Whether to trace the curves against captured meters and days. Default yes.
    #[serde(default = "yes")]
    pub curves: bool,
}

impl AuditRequest {
    pub fn check(self) -> Result<AuditSpec, FieldError> {
        if self.captured.is_empty() || self.captured.len() > MAX_CAPTURED {
            return Err(FieldError::new("captured", format!("name from 1 to {MAX_CAPTURED} captured meters")));
        }
        let mut captured: Vec<MeterId> = Vec::with_capacity(self.captured.len());
        for m in &self.captured {
            let id = MeterId::parse_field("captured", m)?;
            if captured.contains(&id) {
                return Err(FieldError::new("captured", format!("meter {m} is named twice")));
            }
            captured.push(id);
        }
        let register_period =
            self.register_period.as_deref().map(|p| RegisterPeriod::parse("register_period", p)).transpose()?;
        Ok(AuditSpec {
            recovery_job: self.recovery_job,
            captured,
            seed: self.seed.unwrap_or_else(audit_seed),
            register_period,
            curves: self.curves,
        })
    }
}

// ---- calibration -------------------------------------------------------------

/// `POST /v1/calibrations`.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CalibrateRequest {
    pub recovery_job: String,
    pub event_f1_max: f64,
    #[serde(default = "one")]
    pub captured: usize,
    pub daily_energy_error_max: f64,
    /// Bound on the load nRMSE of groups of `group_size` meters.
    #[serde(default)]
    pub group_nrmse_max: Option<f64>,
    #[serde(default)]
    pub group_size: Option<usize>,
    /// Bound on the median band-energy error (the feeder's latest tariff calendar).
    #[serde(default)]
    pub band_energy_error_max: Option<f64>,
    #[serde(default)]
    pub profile_nrmse_max: Option<f64>,
    #[serde(default)]
    pub publish: bool,
    #[serde(default)]
    pub seed: Option<u64>,
    /// Register periods to search with the scale and level set (default: the current one).
    #[serde(default)]
    pub register_periods: Vec<String>,
}

/// A dither calibration against a finished recovery.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CalibrateSpec {
    pub recovery_job: String,
    pub targets: Targets,
    /// Publish the recommendation as the feeder's next profile when it meets the targets.
    #[serde(default)]
    pub publish: bool,
    /// Default [`meterveil_shared::calibrate::DEFAULT_SEED`].
    #[serde(default = "calibration_seed")]
    pub seed: u64,
    #[serde(default)]
    pub register_periods: Vec<RegisterPeriod>,
}

impl CalibrateRequest {
    /// Checks the fields; the targets against the recovery's population are
    /// checked by the route, which knows it.
    pub fn check(self) -> Result<CalibrateSpec, FieldError> {
        let targets = Targets {
            group_nrmse_max: self.group_nrmse_max,
            group_size: self.group_size.unwrap_or(meterveil_shared::calibrate::DEFAULT_GROUP_SIZE),
            band_energy_error_max: self.band_energy_error_max,
            profile_nrmse_max: self.profile_nrmse_max,
            ..Targets::new(self.event_f1_max, self.captured, self.daily_energy_error_max)
        };
        meterveil_shared::calibrate::CalibrationConfig::new(targets.clone()).check(usize::MAX)?;
        let register_periods = self
            .register_periods
            .iter()
            .enumerate()
            .map(|(i, p)| RegisterPeriod::parse(&format!("register_periods[{i}]"), p))
            .collect::<Result<Vec<_>, _>>()?;
        Ok(CalibrateSpec {
            recovery_job: self.recovery_job,
            targets,
            publish: self.publish,
            seed: self.seed.unwrap_or_else(calibration_seed),
            register_periods,
        })
    }
}

// ---- the job -----------------------------------------------------------------

/// Every kind of background job.
#[derive(Debug, Clone, PartialEq)]
pub enum JobSpec {
    Recover(RecoverSpec),
    Cluster(ClusterSpec),
    Audit(AuditSpec),
    Calibrate(CalibrateSpec),
}

impl JobSpec {
    /// The kind stored in the job row.
    pub fn kind(&self) -> &'static str {
        match self {
            JobSpec::Recover(_) => "recover",
            JobSpec::Cluster(_) => "cluster",
            JobSpec::Audit(_) => "audit",
            JobSpec::Calibrate(_) => "calibrate",
        }
    }

    /// The spec's JSON, stored in the job row's `params`.
    pub fn params(&self) -> Value {
        let v = match self {
            JobSpec::Recover(s) => serde_json::to_value(s),
            JobSpec::Cluster(s) => serde_json::to_value(s),
            JobSpec::Audit(s) => serde_json::to_value(s),
            JobSpec::Calibrate(s) => serde_json::to_value(s),
        };
        v.unwrap_or(Value::Null)
    }

    /// The spec a job row holds. Recovery rows written before specs were stored
    /// whole keep their feeder and window in columns only; those are filled in.
    pub fn from_stored(
        kind: &str,
        params: &Value,
        feeder_id: Option<&str>,
        window: Option<(i64, i64)>,
    ) -> Result<Self, String> {
        let bad = |e: serde_json::Error| format!("the stored {kind} job does not parse: {e}");
        match kind {
            "recover" => {
                let mut p = params.clone();
                if let Some(o) = p.as_object_mut() {
                    if let Some(f) = feeder_id {
                        o.entry("feeder_id").or_insert_with(|| f.into());
                    }
                    if let Some((from, to)) = window {
                        o.entry("from").or_insert_with(|| from.into());
                        o.entry("to").or_insert_with(|| to.into());
                    }
                    if o.get("rank").is_some_and(Value::is_null) {
                        o.remove("rank");
                    }
                }
                serde_json::from_value(p).map(JobSpec::Recover).map_err(bad)
            }
            "cluster" => serde_json::from_value(params.clone()).map(JobSpec::Cluster).map_err(bad),
            "audit" => serde_json::from_value(params.clone()).map(JobSpec::Audit).map_err(bad),
            "calibrate" => serde_json::from_value(params.clone()).map(JobSpec::Calibrate).map_err(bad),
            other => Err(format!("unknown job kind {other}")),
        }
    }
}

#[cfg(test)]
mod tests {
    use serde_json::json;

    use super::*;

    fn field<T: std::fmt::Debug>(r: Result<T, FieldError>) -> String {
        r.expect_err("refused").field
    }

    fn recover(v: Value) -> Result<RecoverSpec, FieldError> {
        serde_json::from_value::<RecoverRequest>(v).expect("request").check()
    }

    #[test]
    fn a_recovery_request_gets_its_defaults() {
        let s = recover(json!({"feeder_id": "F1", "from": 0, "to": 86_400})).unwrap();
        assert_eq!((s.rank, s.alpha_kw), (RankSetting::AUTO, DEFAULT_ALPHA_KW));
        assert_eq!(s.rank.choice(), RecoveryParams::default().rank);
    }

    #[test]
    fn each_bad_recovery_field_is_named() {
        let base = || json!({"feeder_id": "F1", "from": 0, "to": 86_400});
        let with = |k: &str, v: Value| {
            let mut b = base();
            b[k] = v;
            b
        };
        assert_eq!(field(recover(with("feeder_id", json!("a b")))), "feeder_id");
        assert_eq!(field(recover(with("to", json!(0)))), "to");
        assert_eq!(field(recover(with("to", json!(94 * 86_400)))), "to");
        assert_eq!(field(recover(with("rank", json!(0)))), "rank");
        assert_eq!(field(recover(with("rank", json!("most")))), "rank");
        assert_eq!(field(recover(with("alpha_kw", json!(-1.0)))), "alpha_kw");
        assert_eq!(field(recover(with("alpha_kw", json!(20_000.0)))), "alpha_kw");
    }

    #[test]
    fn each_bad_clustering_field_is_named() {
        let c = |v: Value| serde_json::from_value::<ClusterRequest>(v).expect("request").check();
        assert_eq!(field(c(json!({"recovery_jobs": []}))), "recovery_jobs");
        assert_eq!(field(c(json!({"recovery_jobs": vec!["r"; 101]}))), "recovery_jobs");
        assert_eq!(field(c(json!({"recovery_jobs": ["r"], "clusters": 1}))), "clusters");
        assert_eq!(field(c(json!({"recovery_jobs": ["r"], "clusters": "many"}))), "clusters");
        assert_eq!(c(json!({"recovery_jobs": ["r"], "clusters": "auto"})).unwrap().clusters, None);
        assert_eq!(c(json!({"recovery_jobs": ["r"], "clusters": 7})).unwrap().clusters, Some(7));
    }

    #[test]
    fn each_bad_audit_field_is_named() {
        let a = |v: Value| serde_json::from_value::<AuditRequest>(v).expect("request").check();
        assert_eq!(field(a(json!({"recovery_job": "r", "captured": []}))), "captured");
        assert_eq!(field(a(json!({"recovery_job": "r", "captured": ["m1", "m1"]}))), "captured");
        assert_eq!(field(a(json!({"recovery_job": "r", "captured": ["m 1"]}))), "captured");
        assert_eq!(
            field(a(json!({"recovery_job": "r", "captured": ["m1"], "register_period": "hourly"}))),
            "register_period"
        );
        let s = a(json!({"recovery_job": "r", "captured": ["m1"]})).unwrap();
        assert_eq!((s.seed, s.curves, s.register_period), (meterveil_shared::audit::DEFAULT_SEED, true, None));
    }

    #[test]
    fn each_bad_calibration_field_is_named() {
        let base = || json!({"recovery_job": "r", "event_f1_max": 0.6, "daily_energy_error_max": 0.1});
        let with = |k: &str, v: Value| {
            let mut b = base();
            b[k] = v;
            serde_json::from_value::<CalibrateRequest>(b).expect("request").check()
        };
        assert_eq!(field(with("event_f1_max", json!(1.5))), "event_f1_max");
        assert_eq!(field(with("daily_energy_error_max", json!(0.0))), "daily_energy_error_max");
        assert_eq!(field(with("profile_nrmse_max", json!(-1.0))), "profile_nrmse_max");
        assert_eq!(field(with("captured", json!(0))), "captured");
        assert_eq!(field(with("register_periods", json!(["daily", "yearly"]))), "register_periods[1]");
        let s = with("publish", json!(true)).unwrap();
        assert_eq!((s.seed, s.targets.captured), (meterveil_shared::calibrate::DEFAULT_SEED, 1));
    }

    /// The stored form round-trips, and rows stored before specs were stored
    /// whole (recovery params without feeder and window) still parse.
    #[test]
    fn specs_round_trip_through_their_stored_form() {
        let specs = [
            JobSpec::Recover(recover(json!({"feeder_id": "F1", "from": 0, "to": 86_400, "rank": 7})).unwrap()),
            JobSpec::Cluster(ClusterSpec { recovery_jobs: vec!["rec-1".into()], clusters: Some(4) }),
            JobSpec::Audit(
                serde_json::from_value::<AuditRequest>(json!({"recovery_job": "r", "captured": ["m1"],
                    "register_period": "weekly", "curves": false}))
                .unwrap()
                .check()
                .unwrap(),
            ),
        ];
        for s in specs {
            assert_eq!(JobSpec::from_stored(s.kind(), &s.params(), None, None).unwrap(), s);
        }
        let old = json!({"rank": "auto", "alpha_kw": 15.0});
        let JobSpec::Recover(r) = JobSpec::from_stored("recover", &old, Some("F2"), Some((900, 1800))).unwrap() else {
            panic!("not a recovery")
        };
        assert_eq!((r.feeder_id.as_str(), r.from, r.to, r.rank), ("F2", 900, 1800, RankSetting::AUTO));
        let old_audit =
            json!({"recovery_job": "r", "captured": ["m1"], "seed": 11, "register_period": null, "curves": true});
        assert!(JobSpec::from_stored("audit", &old_audit, Some("F2"), None).is_ok());
        assert!(JobSpec::from_stored("sweep", &json!({}), None, None).unwrap_err().contains("unknown job kind"));
    }
}
