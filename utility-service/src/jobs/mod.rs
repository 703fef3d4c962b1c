//! Background jobs. CPU work runs on the blocking pool, never on the async runtime.

pub mod recover;
