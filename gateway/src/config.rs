//! Gateway configuration file (TOML).
//!
//! ```toml
//! gateway_id = "QM-GW-CHAPEL-01"
//! feeder_id = "QM-CHAPEL-ROW"
//! service_url = "http://127.0.0.1:8080"
//! outbox = "/var/lib/meterveil/outbox.sqlite"
//!
//! [source]
//! kind = "directory"          # "file", "directory" or "stdin"
//! path = "/var/spool/meter-exports"
//! format = "csv"              # optional; guessed from each file's extension
//! poll_s = 10                 # directory only
//!
//! [upload]
//! batch_max = 1000
//! initial_ms = 500
//! max_ms = 60000
//! ```

use std::path::{Path, PathBuf};

use anyhow::Context;
use meterveil_shared::{FeederId, GatewayId};
use serde::Deserialize;

use crate::identity::GatewayIdentity;
use crate::source::Format;
use crate::uploader::UploadConfig;

#[derive(Debug, Clone, Copy, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "lowercase")]
pub enum SourceKind {
    File,
    Directory,
    Stdin,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SourceConfig {
    pub kind: SourceKind,
    pub path: Option<PathBuf>,
    pub format: Option<Format>,
    #[serde(default = "default_poll_s")]
    pub poll_s: u64,
}

fn default_poll_s() -> u64 {
    10
}

fn default_refresh_s() -> u64 {
    3600
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawConfig {
    gateway_id: String,
    feeder_id: String,
    /// The hex secret shown when the gateway was provisioned; or set
    /// METERVEIL_GATEWAY_SECRET instead of writing it here.
    #[serde(default)]
    secret: Option<String>,
    service_url: String,
    outbox: PathBuf,
    source: SourceConfig,
    #[serde(default)]
    upload: UploadConfig,
    #[serde(default = "default_refresh_s")]
    profile_refresh_s: u64,
}

/// A checked gateway configuration.
#[derive(Debug, Clone)]
pub struct GatewayConfig {
    pub identity: GatewayIdentity,
    pub service_url: String,
    pub outbox: PathBuf,
    pub source: SourceConfig,
    pub upload: UploadConfig,
    /// How often the gateway re-pulls its feeder's profile, seconds.
    pub profile_refresh_s: u64,
}

impl GatewayConfig {
    pub fn load(path: &Path) -> anyhow::Result<Self> {
        let text = std::fs::read_to_string(path).with_context(|| format!("reading config {}", path.display()))?;
        Self::parse(&text).with_context(|| format!("config {}", path.display()))
    }

    pub fn parse(text: &str) -> anyhow::Result<Self> {
        let raw: RawConfig = toml::from_str(text)?;
        let secret = match raw.secret.clone().or_else(|| std::env::var("METERVEIL_GATEWAY_SECRET").ok()) {
            Some(s) => s,
            None => anyhow::bail!("secret: missing; give the provisioned secret here or in METERVEIL_GATEWAY_SECRET"),
        };
        let identity = GatewayIdentity {
            gateway_id: GatewayId::parse(&raw.gateway_id)?,
            feeder_id: FeederId::parse(&raw.feeder_id)?,
            key: crate::identity::GatewayKey::from_hex(&secret)?,
        };
        if !(raw.service_url.starts_with("http://") || raw.service_url.starts_with("https://")) {
            anyhow::bail!("service_url: {:?} must start with http:// or https://", raw.service_url);
        }
        if raw.source.kind != SourceKind::Stdin && raw.source.path.is_none() {
            anyhow::bail!("source.path: required for a {:?} source", raw.source.kind);
        }
        if raw.upload.batch_max == 0 || raw.upload.batch_max > 50_000 {
            anyhow::bail!("upload.batch_max: {} must be between 1 and 50000", raw.upload.batch_max);
        }
        if raw.source.poll_s == 0 {
            anyhow::bail!("source.poll_s: must be at least 1 second");
        }
        Ok(Self {
            identity,
            service_url: raw.service_url,
            outbox: raw.outbox,
            source: raw.source,
            upload: raw.upload,
            profile_refresh_s: raw.profile_refresh_s.max(1),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const OK: &str = r#"
gateway_id = "gw-1"
feeder_id = "F-1"
secret = "00112233445566778899aabbccddeeff00112233445566778899aabbccddeeff"
service_url = "http://127.0.0.1:9"
outbox = "/tmp/x.sqlite"
[source]
kind = "file"
path = "/tmp/in.csv"
[upload]
batch_max = 96
initial_ms = 10
max_ms = 100
"#;

    #[test]
    fn parses_and_checks() {
        let c = GatewayConfig::parse(OK).unwrap();
        assert_eq!(c.upload.batch_max, 96);
        assert_eq!(c.upload.backoff.max_ms, 100);
        let bad = OK.replace("kind = \"file\"\npath = \"/tmp/in.csv\"", "kind = \"file\"");
        assert!(GatewayConfig::parse(&bad).unwrap_err().to_string().contains("source.path"));
        let bad = OK.replace("gw-1", "gw 1");
        assert!(format!("{:#}", GatewayConfig::parse(&bad).unwrap_err()).contains("gateway_id"));
        let bad = OK.replace("secret = \"0011", "secret = \"zz11");
        assert!(GatewayConfig::parse(&bad).unwrap_err().to_string().contains("secret"));
        let bad = OK.replace("http://127", "ftp://127");
        assert!(GatewayConfig::parse(&bad).unwrap_err().to_string().contains("service_url"));
    }
}
