//! The one error type of the shared crate: which field was wrong, and why.

use serde::{Deserialize, Serialize};

/// A rejected input value. `field` is a path into the input (`readings[3].level`),
/// `reason` says what is wrong in words an operator can act on.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize, thiserror::Error)]
#[error("{field}: {reason}")]
pub struct FieldError {
    pub field: String,
    pub reason: String,
}

impl FieldError {
    pub fn new(field: impl Into<String>, reason: impl Into<String>) -> Self {
        Self { field: field.into(), reason: reason.into() }
    }

    /// Prefixes the field path, e.g. `level` inside `readings[3]` becomes `readings[3].level`.
    pub fn within(mut self, parent: &str) -> Self {
        self.field = if self.field.is_empty() { parent.to_owned() } else { format!("{parent}.{}", self.field) };
        self
    }
}
