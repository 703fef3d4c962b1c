//! Dither profiles: the per-feeder settings of the privacy mechanism.

use serde::{Deserialize, Serialize};

use crate::domain::IntervalLength;
use crate::error::FieldError;

/// Family of the zero-mean dither added before quantization.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum NoiseFamily {
    /// Normal with standard deviation `scale_kw`.
    Gaussian,
    /// Logistic with scale parameter `scale_kw` (standard deviation `scale_kw · π/√3`).
    Logistic,
}

impl NoiseFamily {
    pub fn as_str(self) -> &'static str {
        match self {
            NoiseFamily::Gaussian => "gaussian",
            NoiseFamily::Logistic => "logistic",
        }
    }

    pub fn parse(field: &str, raw: &str) -> Result<Self, FieldError> {
        match raw {
            "gaussian" => Ok(NoiseFamily::Gaussian),
            "logistic" => Ok(NoiseFamily::Logistic),
            other => Err(FieldError::new(
                field,
                format!("{other:?} is not a noise family; use \"gaussian\" or \"logistic\""),
            )),
        }
    }
}

/// How often gateways send each meter's register advance: the exact energy of
/// the intervals forwarded over one completed period.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum RegisterPeriod {
    /// No register reads: the utility works from the levels alone.
    None,
    /// UTC days (the service's settlement days).
    Daily,
    /// Weeks from Monday 00:00 in the feeder's time zone.
    Weekly,
    /// Calendar months in the feeder's time zone, the usual billing period.
    Monthly,
}

impl RegisterPeriod {
    pub const ALL: [RegisterPeriod; 4] =
        [RegisterPeriod::None, RegisterPeriod::Daily, RegisterPeriod::Weekly, RegisterPeriod::Monthly];

    pub fn as_str(self) -> &'static str {
        match self {
            RegisterPeriod::None => "none",
            RegisterPeriod::Daily => "daily",
            RegisterPeriod::Weekly => "weekly",
            RegisterPeriod::Monthly => "monthly",
        }
    }

    pub fn parse(field: &str, raw: &str) -> Result<Self, FieldError> {
        Self::ALL.into_iter().find(|p| p.as_str() == raw).ok_or_else(|| {
            FieldError::new(field, format!("{raw:?} is not a register period; use none, daily, weekly or monthly"))
        })
    }

    /// The period holding instant `t` (UTC epoch seconds) as [start, end), in the
    /// time zone `tz` for weeks and months. `None` when no reads are sent.
    pub fn bounds(self, tz: chrono_tz::Tz, t: i64) -> Option<(i64, i64)> {
        use chrono::{Datelike, Duration, NaiveDate, TimeZone};
        let local_midnight = |d: NaiveDate| -> Option<i64> {
            // The first instant of the local date (a gap at midnight moves it later).
            let naive = d.and_hms_opt(0, 0, 0)?;
            (0..4).find_map(|h| tz.from_local_datetime(&(naive + Duration::hours(h))).earliest()).map(|x| x.timestamp())
        };
        let date = || tz.timestamp_opt(t, 0).single().map(|x| x.date_naive());
        match self {
            RegisterPeriod::None => None,
            RegisterPeriod::Daily => {
                let s = t - t.rem_euclid(86_400);
                Some((s, s + 86_400))
            }
            RegisterPeriod::Weekly => {
                let d = date()?;
                let monday = d - Duration::days(i64::from(d.weekday().num_days_from_monday()));
                Some((local_midnight(monday)?, local_midnight(monday + Duration::days(7))?))
            }
            RegisterPeriod::Monthly => {
                let d = date()?;
                let first = d.with_day(1)?;
                let next = if first.month() == 12 {
                    NaiveDate::from_ymd_opt(first.year() + 1, 1, 1)?
                } else {
                    NaiveDate::from_ymd_opt(first.year(), first.month() + 1, 1)?
                };
                Some((local_midnight(first)?, local_midnight(next)?))
            }
        }
    }
}

/// Smallest and largest dither scale we accept, in kW. Below 1 W of dither the
/// mechanism is plain quantization; above 100 kW no household reading survives.
pub const MIN_SCALE_KW: f64 = 0.001;
pub const MAX_SCALE_KW: f64 = 100.0;
/// Boundaries closer than this (kW) make two levels indistinguishable in practice.
pub const MIN_BOUNDARY_GAP_KW: f64 = 0.001;
/// At most 256 levels fit a `u8` level; we allow up to 64 (63 boundaries).
pub const MAX_LEVELS: usize = 64;

/// The settings a profile is created from, as they arrive on the wire or in a file
/// (`{"noise":"gaussian","scale_kw":0.3,"boundaries_kw":[1,2],"interval_s":900}`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DitherProfileSpec {
    pub noise: String,
    pub scale_kw: f64,
    pub boundaries_kw: Vec<f64>,
    #[serde(default = "default_interval_s")]
    pub interval_s: u32,
    /// Whether gateways send register reads (daily, unless `register_period` says otherwise).
    #[serde(default)]
    pub send_registers: bool,
    /// `none`, `daily`, `weekly` or `monthly`; given, it decides.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub register_period: Option<String>,
}

fn default_interval_s() -> u32 {
    900
}

/// A validated dither profile. Fields are private so an invalid profile cannot exist.
#[derive(Debug, Clone, PartialEq)]
pub struct DitherProfile {
    noise: NoiseFamily,
    scale_kw: f64,
    boundaries_kw: Vec<f64>,
    interval: IntervalLength,
    register_period: RegisterPeriod,
}

impl TryFrom<DitherProfileSpec> for DitherProfile {
    type Error = FieldError;

    fn try_from(spec: DitherProfileSpec) -> Result<Self, FieldError> {
        let noise = NoiseFamily::parse("noise", &spec.noise)?;
        if !spec.scale_kw.is_finite() || !(MIN_SCALE_KW..=MAX_SCALE_KW).contains(&spec.scale_kw) {
            return Err(FieldError::new(
                "scale_kw",
                format!("is {}; it must be a number of kW between {MIN_SCALE_KW} and {MAX_SCALE_KW}", spec.scale_kw),
            ));
        }
        let b = &spec.boundaries_kw;
        if b.is_empty() {
            return Err(FieldError::new("boundaries_kw", "is empty; at least one boundary (two levels) is needed"));
        }
        if b.len() >= MAX_LEVELS {
            return Err(FieldError::new(
                "boundaries_kw",
                format!("has {} boundaries; at most {} are allowed", b.len(), MAX_LEVELS - 1),
            ));
        }
        for (i, v) in b.iter().enumerate() {
            if !v.is_finite() {
                return Err(FieldError::new(format!("boundaries_kw[{i}]"), "is not a finite number"));
            }
            if i > 0 && *v - b[i - 1] < MIN_BOUNDARY_GAP_KW * (1.0 - 1e-9) {
                return Err(FieldError::new(
                    format!("boundaries_kw[{i}]"),
                    format!("is {v} after {}; boundaries must increase by at least {MIN_BOUNDARY_GAP_KW} kW", b[i - 1]),
                ));
            }
        }
        let interval = IntervalLength::new(spec.interval_s)?;
        let register_period = match spec.register_period.as_deref() {
            Some(raw) => {
                let p = RegisterPeriod::parse("register_period", raw)?;
                if p == RegisterPeriod::None && spec.send_registers {
                    return Err(FieldError::new("register_period", "is none while send_registers is true"));
                }
                p
            }
            None if spec.send_registers => RegisterPeriod::Daily,
            None => RegisterPeriod::None,
        };
        Ok(Self { noise, scale_kw: spec.scale_kw, boundaries_kw: spec.boundaries_kw, interval, register_period })
    }
}

impl DitherProfile {
    pub fn noise(&self) -> NoiseFamily {
        self.noise
    }
    /// Dither scale in kW (standard deviation for gaussian, scale parameter for logistic).
    pub fn scale_kw(&self) -> f64 {
        self.scale_kw
    }
    /// Quantizer boundaries in kW, strictly increasing.
    pub fn boundaries_kw(&self) -> &[f64] {
        &self.boundaries_kw
    }
    /// Number of levels K = boundaries + 1; levels are `0..K`.
    pub fn levels(&self) -> usize {
        self.boundaries_kw.len() + 1
    }
    pub fn interval(&self) -> IntervalLength {
        self.interval
    }
    pub fn send_registers(&self) -> bool {
        self.register_period != RegisterPeriod::None
    }
    pub fn register_period(&self) -> RegisterPeriod {
        self.register_period
    }
    /// The same profile with another register period.
    pub fn with_register_period(&self, register_period: RegisterPeriod) -> Self {
        Self { register_period, ..self.clone() }
    }

    /// The wire/file form of this profile.
    pub fn to_spec(&self) -> DitherProfileSpec {
        DitherProfileSpec {
            noise: self.noise.as_str().to_owned(),
            scale_kw: self.scale_kw,
            boundaries_kw: self.boundaries_kw.clone(),
            interval_s: self.interval.seconds(),
            send_registers: self.send_registers(),
            register_period: Some(self.register_period.as_str().to_owned()),
        }
    }

    /// Parses and validates a profile from JSON text, naming the bad field on error.
    pub fn from_json(text: &str) -> Result<Self, FieldError> {
        // serde_json's messages already name a missing or unknown key.
        let spec: DitherProfileSpec =
            serde_json::from_str(text).map_err(|e| FieldError::new("profile", e.to_string()))?;
        Self::try_from(spec)
    }

    /// A short human description, e.g. `gaussian σ=0.30 kW, 3 levels at [1, 2] kW, 900 s`.
    pub fn describe(&self) -> String {
        let b: Vec<String> = self.boundaries_kw.iter().map(|v| format!("{v}")).collect();
        format!(
            "{} scale {:.2} kW, {} levels at [{}] kW, {} s intervals{}",
            self.noise.as_str(),
            self.scale_kw,
            self.levels(),
            b.join(", "),
            self.interval.seconds(),
            match self.register_period {
                RegisterPeriod::None => String::new(),
                p => format!(", {} register reads", p.as_str()),
            }
        )
    }
}

/// A valid profile on 15-minute intervals without register reads, for unit tests.
#[cfg(test)]
pub(crate) fn test_profile(noise: &str, scale_kw: f64, boundaries_kw: &[f64]) -> DitherProfile {
    DitherProfile::try_from(DitherProfileSpec {
        noise: noise.into(),
        scale_kw,
        boundaries_kw: boundaries_kw.to_vec(),
        interval_s: 900,
        send_registers: false,
        register_period: None,
    })
    .expect("valid test profile")
}

#[cfg(test)]
mod tests {
    use super::*;

    fn spec() -> DitherProfileSpec {
        DitherProfileSpec {
            noise: "gaussian".into(),
            scale_kw: 0.3,
            boundaries_kw: vec![1.0, 2.0],
            interval_s: 900,
            send_registers: true,
            register_period: None,
        }
    }

    #[test]
    fn valid_profile_round_trips() {
        let p = DitherProfile::try_from(spec()).unwrap();
        assert_eq!(p.levels(), 3);
        assert_eq!(DitherProfile::try_from(p.to_spec()).unwrap(), p);
        let j = r#"{"noise":"logistic","scale_kw":0.5,"boundaries_kw":[0.5],"interval_s":1800}"#;
        let p = DitherProfile::from_json(j).unwrap();
        assert_eq!(p.noise(), NoiseFamily::Logistic);
        assert!(!p.send_registers());
    }

    #[test]
    fn each_bad_field_is_named() {
        let cases: Vec<(DitherProfileSpec, &str)> = vec![
            (DitherProfileSpec { noise: "laplace".into(), ..spec() }, "noise"),
            (DitherProfileSpec { scale_kw: 0.0, ..spec() }, "scale_kw"),
            (DitherProfileSpec { scale_kw: f64::NAN, ..spec() }, "scale_kw"),
            (DitherProfileSpec { boundaries_kw: vec![], ..spec() }, "boundaries_kw"),
            (DitherProfileSpec { boundaries_kw: vec![2.0, 1.0], ..spec() }, "boundaries_kw[1]"),
            (DitherProfileSpec { boundaries_kw: vec![1.0, f64::INFINITY], ..spec() }, "boundaries_kw[1]"),
            (DitherProfileSpec { boundaries_kw: (0..64).map(f64::from).collect(), ..spec() }, "boundaries_kw"),
            (DitherProfileSpec { interval_s: 60, ..spec() }, "interval_s"),
            (DitherProfileSpec { register_period: Some("hourly".into()), ..spec() }, "register_period"),
            (DitherProfileSpec { register_period: Some("none".into()), ..spec() }, "register_period"),
        ];
        for (s, field) in cases {
            let e = DitherProfile::try_from(s).unwrap_err();
            assert_eq!(e.field, field, "{e}");
        }
        let e = DitherProfile::from_json(r#"{"noise":"gaussian","scale_kw":0.3}"#).unwrap_err();
        assert!(e.reason.contains("boundaries_kw"), "{e}");
    }

    #[test]
    fn register_periods_follow_the_calendar_of_the_time_zone() {
        let p = DitherProfile::from_json(
            r#"{"noise":"gaussian","scale_kw":0.3,"boundaries_kw":[1],"register_period":"monthly"}"#,
        )
        .unwrap();
        assert!(p.send_registers() && p.register_period() == RegisterPeriod::Monthly);
        assert_eq!(DitherProfile::try_from(p.to_spec()).unwrap(), p);
        let london: chrono_tz::Tz = "Europe/London".parse().unwrap();
        // 2026-03-15 12:00 UTC: March starts 2026-03-01 00:00 GMT; April starts 00:00 BST, 2026-03-31 23:00 UTC.
        let (s, e) = RegisterPeriod::Monthly.bounds(london, 1_773_576_000).unwrap();
        assert_eq!((s, e), (1_772_323_200, 1_774_998_000));
        // The week of Wednesday 2026-03-18 starts Monday 2026-03-16 00:00 GMT.
        let (s, e) = RegisterPeriod::Weekly.bounds(london, 1_773_835_200).unwrap();
        assert_eq!((s, e - s), (1_773_619_200, 7 * 86_400));
        assert_eq!(RegisterPeriod::Daily.bounds(london, 1_773_835_200), Some((1_773_792_000, 1_773_878_400)));
        assert_eq!(RegisterPeriod::None.bounds(london, 0), None);
    }
}
