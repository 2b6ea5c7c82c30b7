//! Observed paths of a few participants, for drawing beside a curve.

use super::Panel;

/// One participant's observed (age, outcome) points, in age order.
pub type Path = Vec<(f64, f64)>;

impl Panel {
    /// Each participant's youngest age, by participant code.
    pub fn first_ages(&self) -> Vec<f64> {
        let mut first = vec![f64::INFINITY; self.id.n_levels()];
        for (&k, &a) in self.id.codes.iter().zip(self.age.iter()) {
            first[k as usize] = first[k as usize].min(a);
        }
        first
    }

    /// Each participant's row at their youngest age (the first row among
    /// equal ages), by participant code.
    pub fn first_rows(&self) -> Vec<usize> {
        let mut first = vec![usize::MAX; self.id.n_levels()];
        for (r, &k) in self.id.codes.iter().enumerate() {
            let f = &mut first[k as usize];
            if *f == usize::MAX || self.age[r] < self.age[*f] {
                *f = r;
            }
        }
        first
    }

    /// The observed paths of `k` participants spread evenly through the file.
    pub fn sample_paths(&self, k: usize) -> Vec<Path> {
        let n_id = self.id.n_levels();
        if k == 0 || n_id == 0 {
            return Vec::new();
        }
        let step = (n_id / k.min(n_id)).max(1);
        let mut wanted = vec![usize::MAX; n_id];
        let mut slot = 0;
        for i in (0..n_id).step_by(step).take(k) {
            wanted[i] = slot;
            slot += 1;
        }
        let mut paths: Vec<Path> = vec![Vec::new(); slot];
        for r in 0..self.n() {
            let s = wanted[self.id.codes[r] as usize];
            if s != usize::MAX {
                paths[s].push((self.age[r], self.outcome[r]));
            }
        }
        for p in &mut paths {
            p.sort_by(|a, b| a.0.total_cmp(&b.0));
        }
        paths
    }
}
