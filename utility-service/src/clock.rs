//! The service's clock: UTC epoch seconds.

use std::sync::atomic::{AtomicI64, Ordering};
use std::sync::Arc;

/// Server time as UTC epoch seconds.
pub fn now_s() -> i64 {
    std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map(|d| d.as_secs() as i64).unwrap_or(0)
}

/// The time that job leases and the settlement schedule go by: the system
/// clock, or one that only moves when told (a test driving simulated days).
#[derive(Debug, Clone, Default)]
pub enum Clock {
    #[default]
    System,
    Driven(Arc<AtomicI64>),
}

impl Clock {
    /// A clock standing at `t` until [`Clock::set`] moves it.
    pub fn driven(t: i64) -> Self {
        Clock::Driven(Arc::new(AtomicI64::new(t)))
    }

    pub fn now(&self) -> i64 {
        match self {
            Clock::System => now_s(),
            Clock::Driven(t) => t.load(Ordering::SeqCst),
        }
    }

    /// Moves a driven clock to `t` (the system clock is not moved).
    pub fn set(&self, t: i64) {
        if let Clock::Driven(c) = self {
            c.store(t, Ordering::SeqCst);
        }
    }
}
