//! HTTP client for the utility service.

use std::time::Duration;

use meterveil_shared::wire::{AckWire, BatchWire, ErrorWire, ProfileRecordWire};

#[derive(Debug, thiserror::Error)]
pub enum UploadError {
    /// Worth retrying: connection failure, timeout, 5xx, 408, 429.
    #[error("transient: {0}")]
    Transient(String),
    /// The service refused the request for good (other 4xx), with its reason.
    #[error("refused with {status}: {reason}")]
    Refused { status: u16, reason: String },
}

#[derive(Clone)]
pub struct ServiceClient {
    http: reqwest::Client,
    base: String,
}

impl ServiceClient {
    pub fn new(base_url: &str, timeout: Duration) -> anyhow::Result<Self> {
        let http = reqwest::Client::builder().timeout(timeout).build()?;
        Ok(Self { http, base: base_url.trim_end_matches('/').to_owned() })
    }

    pub fn base_url(&self) -> &str {
        &self.base
    }

    async fn classify(resp: reqwest::Response) -> UploadError {
        let status = resp.status().as_u16();
        let text = resp.text().await.unwrap_or_default();
        let reason = serde_json::from_str::<ErrorWire>(&text).map(|e| e.message).unwrap_or(text);
        // 401 too: a clock off by minutes or a key being rotated is fixed by the
        // operator, and the rows must wait in the outbox meanwhile, not be refused.
        if status >= 500 || status == 408 || status == 429 || status == 401 {
            UploadError::Transient(format!("{status}: {reason}"))
        } else {
            UploadError::Refused { status, reason }
        }
    }

    /// The feeder's current dither profile.
    pub async fn current_profile(&self, feeder_id: &str) -> Result<ProfileRecordWire, UploadError> {
        let url = format!("{}/v1/feeders/{feeder_id}/profile", self.base);
        let resp = self.http.get(url).send().await.map_err(|e| UploadError::Transient(e.to_string()))?;
        if !resp.status().is_success() {
            return Err(Self::classify(resp).await);
        }
        resp.json().await.map_err(|e| UploadError::Transient(format!("profile body: {e}")))
    }

    /// Uploads a batch signed with the gateway's key under `sequence`.
    pub async fn post_batch(
        &self,
        batch: &BatchWire,
        sequence: i64,
        key: &crate::identity::GatewayKey,
    ) -> Result<AckWire, UploadError> {
        use meterveil_shared::auth::{
            body_sha256, sign, signing_text, HEADER_GATEWAY, HEADER_SEQUENCE, HEADER_SIGNATURE, HEADER_TIMESTAMP,
        };
        let path = "/v1/ingest/batches";
        let url = format!("{}{path}", self.base);
        let body = serde_json::to_vec(batch).map_err(|e| UploadError::Transient(format!("encoding: {e}")))?;
        let now = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map(|d| d.as_secs() as i64)
            .unwrap_or_default();
        let text = signing_text("POST", path, &batch.gateway_id, sequence as u64, now, &body_sha256(&body));
        let resp = self
            .http
            .post(url)
            .header(reqwest::header::CONTENT_TYPE, "application/json")
            .header(HEADER_GATEWAY, &batch.gateway_id)
            .header(HEADER_SEQUENCE, sequence.to_string())
            .header(HEADER_TIMESTAMP, now.to_string())
            .header(HEADER_SIGNATURE, sign(key.bytes(), &text))
            .body(body)
            .send()
            .await
            .map_err(|e| UploadError::Transient(e.to_string()))?;
        if !resp.status().is_success() {
            return Err(Self::classify(resp).await);
        }
        let ack: AckWire = resp.json().await.map_err(|e| UploadError::Transient(format!("ack body: {e}")))?;
        if ack.batch_id != batch.batch_id {
            return Err(UploadError::Transient(format!(
                "ack names batch {} instead of {}",
                ack.batch_id, batch.batch_id
            )));
        }
        Ok(ack)
    }
}
