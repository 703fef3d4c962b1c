//! Who a gateway is: its id, its feeder and the key that signs its uploads.
//! A leaf module: the client, the uploader and the gateway all use it, and it
//! uses none of them.

use meterveil_shared::{FeederId, GatewayId};

#[derive(Debug, Clone)]
pub struct GatewayIdentity {
    pub gateway_id: GatewayId,
    pub feeder_id: FeederId,
    /// The key the service provisioned for this gateway (signs every upload).
    pub key: GatewayKey,
}

/// A gateway's signing key; never printed.
#[derive(Clone, PartialEq, Eq)]
pub struct GatewayKey(Vec<u8>);

impl GatewayKey {
    /// From the hex secret the service showed when provisioning the gateway.
    pub fn from_hex(s: &str) -> anyhow::Result<Self> {
        let b = hex::decode(s.trim()).map_err(|_| anyhow::anyhow!("secret: is not hex"))?;
        if b.len() < 16 {
            anyhow::bail!("secret: is {} bytes; a provisioned secret has 32", b.len());
        }
        Ok(Self(b))
    }
    pub fn bytes(&self) -> &[u8] {
        &self.0
    }
}

impl std::fmt::Debug for GatewayKey {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("GatewayKey(***)")
    }
}
