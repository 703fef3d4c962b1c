//! How the accelerated fit decides that it has stalled.

/// Consecutive momentum restarts without gain after which a fit is stalled.
pub const BARREN_RESTARTS: usize = 20;

/// Counts momentum restarts, and the run of restarts with no gain of the
/// objective (minimised) since the one before: accelerated methods restart
/// often while they progress, so only a barren run means a stall.
#[derive(Debug, Clone)]
pub struct RestartCounter {
    pub restarts: usize,
    barren: usize,
    at_last: f64,
    tolerance: f64,
}

impl RestartCounter {
    pub fn new(tolerance: f64) -> Self {
        Self { restarts: 0, barren: 0, at_last: f64::INFINITY, tolerance }
    }

    /// Records a restart at objective `obj`; true once the fit is stalled.
    pub fn restart(&mut self, obj: f64) -> bool {
        self.restarts += 1;
        let gained = self.at_last - obj > self.tolerance * obj.abs().max(1e-12);
        self.barren = if gained { 0 } else { self.barren + 1 };
        self.at_last = obj;
        self.barren >= BARREN_RESTARTS
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A fit that restarts often while it still improves is not stalled: the
    /// old rule (any 21 restarts over the whole fit) stopped such a fit early.
    #[test]
    fn restarts_while_improving_never_stall() {
        let mut c = RestartCounter::new(1e-5);
        let stalled = (0..500).any(|k| c.restart(1000.0 - k as f64));
        assert!(!stalled);
        assert_eq!(c.restarts, 500);
    }

    #[test]
    fn a_barren_run_of_restarts_stalls_and_progress_resets_it() {
        let mut c = RestartCounter::new(1e-5);
        assert!(!c.restart(100.0));
        for _ in 1..BARREN_RESTARTS {
            assert!(!c.restart(100.0));
        }
        // One gain starts the run again.
        assert!(!c.restart(90.0));
        let runs: Vec<bool> = (0..BARREN_RESTARTS).map(|_| c.restart(90.0)).collect();
        assert_eq!(runs.iter().filter(|s| **s).count(), 1);
        assert!(runs[BARREN_RESTARTS - 1]);
        // A gain below the tolerance is no gain.
        let mut d = RestartCounter::new(1e-3);
        let stalled = (0..=BARREN_RESTARTS).any(|k| d.restart(100.0 - 1e-4 * k as f64));
        assert!(stalled);
    }
}
