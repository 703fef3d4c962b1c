//! Service counters, exposed at `/metrics` in the Prometheus text format.

use prometheus_client::encoding::{text::encode, EncodeLabelSet};
use prometheus_client::metrics::counter::Counter;
use prometheus_client::metrics::family::Family;
use prometheus_client::registry::Registry;

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
pub struct OutcomeLabel {
    pub outcome: String,
}

pub struct Metrics {
    registry: Registry,
    /// Batches by outcome: stored, replayed, rejected.
    pub batches: Family<OutcomeLabel, Counter>,
    pub readings_stored: Counter,
    pub readings_duplicate: Counter,
    /// Readings inside rejected batches (none of them stored).
    pub readings_rejected: Counter,
    pub registers_stored: Counter,
    /// Transactions of the ingest group commit, and those rolled back because
    /// another writer got in first (their uploads were then settled one by one).
    pub ingest_groups: Counter,
    pub ingest_group_retries: Counter,
}

impl Default for Metrics {
    fn default() -> Self {
        let mut registry = Registry::with_prefix("meterveil");
        let batches = Family::<OutcomeLabel, Counter>::default();
        let readings_stored = Counter::default();
        let readings_duplicate = Counter::default();
        let readings_rejected = Counter::default();
        let registers_stored = Counter::default();
        let ingest_groups = Counter::default();
        let ingest_group_retries = Counter::default();
        registry.register("ingest_batches", "Upload batches by outcome", batches.clone());
        registry.register("readings_stored", "Quantized readings newly stored", readings_stored.clone());
        registry.register(
            "readings_duplicate",
            "Readings received again for an already stored (meter, interval start)",
            readings_duplicate.clone(),
        );
        registry.register("readings_rejected", "Readings in rejected batches", readings_rejected.clone());
        registry.register("register_reads_stored", "Register reads newly stored", registers_stored.clone());
        registry.register("ingest_groups", "Group commits of checked upload batches", ingest_groups.clone());
        registry.register(
            "ingest_group_retries",
            "Group commits rolled back because another writer got in first; their uploads were settled one by one",
            ingest_group_retries.clone(),
        );
        Self {
            registry,
            batches,
            readings_stored,
            readings_duplicate,
            readings_rejected,
            registers_stored,
            ingest_groups,
            ingest_group_retries,
        }
    }
}

impl Metrics {
    pub fn batch(&self, outcome: &str) {
        self.batches.get_or_create(&OutcomeLabel { outcome: outcome.to_owned() }).inc();
    }

    pub fn render(&self) -> String {
        let mut out = String::new();
        // Writing into a String cannot fail.
        let _ = encode(&mut out, &self.registry);
        out
    }
}
