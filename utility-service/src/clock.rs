//! The service's clock: UTC epoch seconds.

/// Server time as UTC epoch seconds.
pub fn now_s() -> i64 {
    std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map(|d| d.as_secs() as i64).unwrap_or(0)
}
