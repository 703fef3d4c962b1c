//! Typed service configuration. Tests build it directly; the binary fills it from
//! flags and the environment.

use std::fmt;
use std::net::SocketAddr;

/// A secret that never prints.
#[derive(Clone, PartialEq, Eq)]
pub struct Secret(String);

impl Secret {
    pub fn new(s: impl Into<String>) -> Self {
        Self(s.into())
    }
    pub fn expose(&self) -> &str {
        &self.0
    }
}

impl fmt::Debug for Secret {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("Secret(***)")
    }
}

#[derive(Debug, Clone)]
pub struct ServiceConfig {
    /// Address to listen on; port 0 picks a free one.
    pub bind: SocketAddr,
    /// `sqlite:PATH` (created if missing) or a plain file path.
    pub database_url: String,
    /// Bearer token for operator endpoints.
    pub operator_token: Secret,
    /// Largest accepted request body, in bytes.
    pub body_limit_bytes: usize,
    /// How far in the future (seconds) a reading's interval end may lie, to allow
    /// for meter clock drift.
    pub clock_tolerance_s: i64,
    /// How long (seconds) after a profile version is superseded readings made
    /// with it are still accepted, so gateways have time to pull the new one.
    pub stale_grace_s: i64,
    /// Whether this process runs a job worker beside the HTTP service.
    pub run_worker: bool,
    /// A worker's lease on a job, seconds; renewed every third of it while the
    /// job runs, so a job whose worker died is taken over after at most this long.
    pub job_lease_s: i64,
    /// A job whose worker died this many times fails instead of running again.
    pub job_max_attempts: i64,
    /// A worker sharded by feeder claims only these feeders' jobs (None: all jobs,
    /// including town-wide analyses).
    pub job_feeders: Option<Vec<String>>,
    /// How often (seconds) a process with a worker looks for settlement runs
    /// that have fallen due.
    pub schedule_every_s: u64,
    /// Master key the gateways' keys are derived from (never stored in the database).
    pub gateway_master_key: Secret,
    /// How far (seconds) a signed upload's timestamp may be from the service's clock.
    pub signature_window_s: i64,
    /// Per-gateway upload rate: batches per second sustained, and the burst allowed.
    pub gateway_batches_per_s: f64,
    pub gateway_burst: f64,
    /// How long the ingest group commit waits for more uploads once a group's
    /// first has arrived. Zero (the default) commits at once: under load the
    /// uploads that arrive during one commit form the next group anyway.
    pub ingest_group_linger: std::time::Duration,
}

impl ServiceConfig {
    pub fn ingest_limits(&self) -> crate::ingest::IngestLimits {
        crate::ingest::IngestLimits { clock_tolerance_s: self.clock_tolerance_s, stale_grace_s: self.stale_grace_s }
    }

    /// Defaults for a local service on `database_url`.
    pub fn local(database_url: impl Into<String>, operator_token: Secret) -> Self {
        Self {
            bind: SocketAddr::from(([127, 0, 0, 1], 0)),
            database_url: database_url.into(),
            operator_token,
            body_limit_bytes: 4 * 1024 * 1024,
            clock_tolerance_s: 300,
            stale_grace_s: 86_400,
            run_worker: true,
            job_lease_s: 30,
            job_max_attempts: 3,
            job_feeders: None,
            schedule_every_s: 60,
            gateway_master_key: Secret::new(random_key()),
            signature_window_s: 300,
            gateway_batches_per_s: 20.0,
            gateway_burst: 40.0,
            ingest_group_linger: std::time::Duration::ZERO,
        }
    }
}

/// A random 256-bit key, hex: the master key of a service started without one
/// (demos and tests; its gateways must be provisioned again after a restart).
pub fn random_key() -> String {
    use rand::Rng;
    let mut r = rand::rng();
    (0..4).map(|_| format!("{:016x}", r.random::<u64>())).collect()
}
