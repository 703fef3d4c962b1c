//! Retry delays: exponential with a cap. Pure, so tests need no clock.

use std::time::Duration;

#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Deserialize)]
#[serde(default)]
pub struct BackoffPolicy {
    /// Delay after the first failure, milliseconds.
    pub initial_ms: u64,
    /// Upper bound on any delay, milliseconds.
    pub max_ms: u64,
}

impl Default for BackoffPolicy {
    fn default() -> Self {
        Self { initial_ms: 500, max_ms: 60_000 }
    }
}

impl BackoffPolicy {
    /// Delay before retry number `failures` (1 = after the first failure):
    /// initial · 2^(failures-1), capped at max.
    pub fn delay(&self, failures: u32) -> Duration {
        let exp = failures.saturating_sub(1).min(32);
        let ms = self.initial_ms.saturating_mul(1u64 << exp).min(self.max_ms);
        Duration::from_millis(ms)
    }

    /// As [`Self::delay`] scaled by `jitter` in [0.5, 1], so many gateways that
    /// failed together do not retry together.
    pub fn jittered(&self, failures: u32, jitter: f64) -> Duration {
        self.delay(failures).mul_f64(jitter.clamp(0.5, 1.0))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn doubles_then_caps() {
        let p = BackoffPolicy { initial_ms: 100, max_ms: 1000 };
        let ms: Vec<u128> = (1..=6).map(|n| p.delay(n).as_millis()).collect();
        assert_eq!(ms, vec![100, 200, 400, 800, 1000, 1000]);
        assert_eq!(p.delay(u32::MAX).as_millis(), 1000);
        assert_eq!(p.jittered(3, 0.5).as_millis(), 200);
        assert_eq!(p.jittered(3, 7.0).as_millis(), 400);
    }
}
