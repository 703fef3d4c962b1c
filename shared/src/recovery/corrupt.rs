//! Readings the fit leaves out, and which of them are corrupt: the flags
//! `corrected` and `atypical`.

use nalgebra::DMatrix;

use super::solver::{Ctx, Flag, Mask};

impl Ctx<'_> {
    /// The observed entries the fit leaves out: those least probable under `x`
    /// (below the probability threshold), at most `max_corrupt_fraction` of
    /// them. Corrupt readings are among them, and so are genuine loads the
    /// low-rank shape does not hold; [`Ctx::judge_corrupt`] tells them apart.
    pub(super) fn implausible_entries(&self, x: &DMatrix<f64>, base: &Mask) -> Vec<bool> {
        let lv = self.levels.as_slice();
        let thresh = self.corrupt_log_threshold();
        let mut cand: Vec<(f64, usize)> = Vec::new();
        let mut n = 0usize;
        for (idx, &xv) in x.as_slice().iter().enumerate() {
            if base.active[idx] {
                n += 1;
                let l = self.table.eval(lv[idx], xv).0;
                if l < thresh {
                    cand.push((l, idx));
                }
            }
        }
        let cap = (self.p.max_corrupt_fraction * n as f64).floor() as usize;
        if cand.len() > cap {
            cand.select_nth_unstable_by(cap, |a, b| a.0.total_cmp(&b.0));
            cand.truncate(cap);
        }
        let mut out = vec![false; lv.len()];
        for (_, idx) in cand {
            out[idx] = true;
        }
        out
    }

    /// Which of the left-out entries `excluded` are corrupt, judged on the
    /// final `x`. A reading is judged corrupt only where corruption at the prior rate is
    /// the likelier explanation of its meter's implausible readings. Corruption
    /// at rate ε makes about ε × (the meter's exposure: per reading, the share
    /// of other levels that would be implausible there) of them. A meter with
    /// more than twice that many is a meter whose genuine load (appliance
    /// events, absences) the population's low-rank shape does not hold: its
    /// implausible readings are kept as loads, not "corrected".
    pub(super) fn judge_corrupt(&self, x: &DMatrix<f64>, base: &Mask, excluded: &[bool]) -> Vec<bool> {
        let lv = self.levels.as_slice();
        let m = x.nrows();
        let thresh = self.corrupt_log_threshold();
        let k = self.table.profile().levels();
        let share = 1.0 / (k - 1).max(1) as f64;
        let mut exposure = vec![0.0f64; m];
        let mut implausible = vec![0usize; m];
        for (idx, &xv) in x.as_slice().iter().enumerate() {
            if !base.active[idx] {
                continue;
            }
            let own = lv[idx];
            exposure[idx % m] +=
                share * (0..k as u8).filter(|w| *w != own && self.table.eval(*w, xv).0 < thresh).count() as f64;
            if self.table.eval(own, xv).0 < thresh {
                implausible[idx % m] += 1;
            }
        }
        let eps = self.p.corrupt_prior;
        excluded
            .iter()
            .enumerate()
            .map(|(idx, &e)| e && implausible[idx % m] as f64 <= 2.0 * eps * exposure[idx % m])
            .collect()
    }

    /// ln of the probability below which corruption is the likelier explanation.
    pub(super) fn corrupt_log_threshold(&self) -> f64 {
        let e = self.p.corrupt_prior;
        let k = self.table.profile().levels() as f64;
        (e / (k * (1.0 - e))).ln()
    }
}

/// Each entry's flag: `corrected` where judged corrupt, `atypical` where left
/// out but not corrupt, else `derived` (a reading) or `estimated` (none).
pub(super) fn flags(observed: &[bool], excluded: &[bool], corrupt: &[bool]) -> Vec<Flag> {
    observed
        .iter()
        .zip(excluded)
        .zip(corrupt)
        .map(|((&o, &e), &c)| match (o, e, c) {
            (_, _, true) => Flag::Corrected,
            (_, true, false) => Flag::Atypical,
            (true, false, false) => Flag::Derived,
            (false, false, false) => Flag::Estimated,
        })
        .collect()
}
