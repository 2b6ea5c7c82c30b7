//! The rows of the fixed design X and the columns of each random term's Z,
//! stored or made on demand.
//!
//! A model frame of n rows and p columns stored row by row costs 8np bytes
//! on top of the data it was made from; on ten million rows that is most of
//! the memory of a fit. The engine reads X and Z only in passes over the
//! rows (the cross-products, the start values, the fitted values), so a
//! frame can instead hand it a [`RowMaker`] that writes each row of X from
//! the data's own columns, and Z columns that are the data's columns
//! themselves ([`ZColumn`]). Memory then grows with the data's columns and
//! the per-level sums, not with rows × model columns. A made row is computed
//! by the same arithmetic as a stored one, so the fit is the same to the
//! bit either way.

use std::borrow::Cow;
use std::fmt::Debug;
use std::sync::Arc;

/// Writes the rows of a fixed design on demand.
pub trait RowMaker: Send + Sync + Debug {
    /// Row `r`'s p entries into `out` (of length p).
    fn fill(&self, r: usize, out: &mut [f64]);
    /// The first column that is one on every row, when the maker knows it
    /// without a scan (an intercept it writes itself); `None` sends the
    /// caller to scan the rows.
    fn ones(&self) -> Option<usize>;
}

/// The fixed design X: n×p stored row-major, or made by a [`RowMaker`].
#[derive(Debug, Clone)]
pub enum Fixed {
    /// Stored row-major, n×p.
    Stored(Vec<f64>),
    /// Made row by row on demand.
    Made(Arc<dyn RowMaker>),
}

impl From<Vec<f64>> for Fixed {
    fn from(x: Vec<f64>) -> Self {
        Fixed::Stored(x)
    }
}

impl FromIterator<f64> for Fixed {
    /// Stored rows from their entries in row-major order.
    fn from_iter<I: IntoIterator<Item = f64>>(entries: I) -> Self {
        Fixed::Stored(entries.into_iter().collect())
    }
}

impl Fixed {
    /// Row `r` of p = `buf.len()` entries: a view of the stored row, or the
    /// made row written into `buf`.
    #[inline(always)]
    pub fn row<'a>(&'a self, r: usize, buf: &'a mut [f64]) -> &'a [f64] {
        match self {
            Fixed::Stored(x) => {
                let p = buf.len();
                &x[r * p..(r + 1) * p]
            }
            Fixed::Made(maker) => {
                maker.fill(r, buf);
                buf
            }
        }
    }

    /// All n rows of p entries, row-major: borrowed when stored, made in
    /// full otherwise (for the small problems that need X whole).
    pub fn rows(&self, n: usize, p: usize) -> Cow<'_, [f64]> {
        match self {
            Fixed::Stored(x) => Cow::Borrowed(x),
            Fixed::Made(maker) => {
                let mut x = vec![0.0; n * p];
                if p > 0 {
                    for (r, row) in x.chunks_exact_mut(p).enumerate() {
                        maker.fill(r, row);
                    }
                }
                Cow::Owned(x)
            }
        }
    }

    /// The stored rows, made and stored first when they were made on
    /// demand, for changing them in place.
    pub fn stored_mut(&mut self, n: usize, p: usize) -> &mut Vec<f64> {
        if let Fixed::Made(_) = self {
            *self = Fixed::Stored(self.rows(n, p).into_owned());
        }
        match self {
            Fixed::Stored(x) => x,
            Fixed::Made(_) => unreachable!("made rows were just stored"),
        }
    }

    /// The first column of the n×p design that is one on every row, if
    /// any: from the maker when it knows, else by a scan.
    pub fn ones_column(&self, n: usize, p: usize) -> Option<usize> {
        let scan = |x: &[f64]| (0..p).find(|&j| (0..n).all(|r| x[r * p + j] == 1.0));
        match self {
            Fixed::Stored(x) => scan(x),
            Fixed::Made(maker) => maker.ones().or_else(|| scan(&self.rows(n, p))),
        }
    }
}

/// One column of a random term's Z.
#[derive(Debug, Clone)]
pub enum ZColumn {
    /// One on every row (an intercept).
    Ones,
    /// Stored values, one per row (shared where columns repeat).
    Values(Arc<[f64]>),
    /// A shared column less a constant on every row (age less its centre).
    Less(Arc<[f64]>, f64),
}

impl From<Vec<f64>> for ZColumn {
    fn from(v: Vec<f64>) -> Self {
        ZColumn::Values(v.into())
    }
}

impl From<Arc<[f64]>> for ZColumn {
    fn from(v: Arc<[f64]>) -> Self {
        ZColumn::Values(v)
    }
}

impl ZColumn {
    /// The entry at row `r`.
    #[inline(always)]
    pub fn at(&self, r: usize) -> f64 {
        match self {
            ZColumn::Ones => 1.0,
            ZColumn::Values(v) => v[r],
            ZColumn::Less(v, c) => v[r] - c,
        }
    }

    /// The entries of the rows `rows`, in that order.
    pub fn pick(&self, rows: &[usize]) -> Vec<f64> {
        rows.iter().map(|&r| self.at(r)).collect()
    }

    /// The n entries as a vector.
    pub fn to_vec(&self, n: usize) -> Vec<f64> {
        (0..n).map(|r| self.at(r)).collect()
    }

    /// The root mean square of the n entries (0 when n = 0).
    pub fn rms(&self, n: usize) -> f64 {
        ((0..n).map(|r| self.at(r) * self.at(r)).sum::<f64>() / n.max(1) as f64).sqrt()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Rows `[1, a, a²]` of a few ages.
    #[derive(Debug)]
    struct Quadratic(Arc<[f64]>);

    impl RowMaker for Quadratic {
        fn fill(&self, r: usize, out: &mut [f64]) {
            let a = self.0[r];
            out.copy_from_slice(&[1.0, a, a * a]);
        }
        fn ones(&self) -> Option<usize> {
            None
        }
    }

    // Closed-form identity: made rows are the stored rows entry by entry,
    // and both ways of finding the column of ones agree.
    #[test]
    fn made_rows_are_the_stored_rows() {
        let ages: Arc<[f64]> = vec![0.5, -1.25, 2.0, 3.5].into();
        let made = Fixed::Made(Arc::new(Quadratic(Arc::clone(&ages))));
        let stored = Fixed::Stored(ages.iter().flat_map(|&a| [1.0, a, a * a]).collect());
        let (mut a, mut b) = ([0.0; 3], [0.0; 3]);
        for r in 0..ages.len() {
            assert_eq!(made.row(r, &mut a), stored.row(r, &mut b));
        }
        assert_eq!(made.rows(4, 3), stored.rows(4, 3));
        assert_eq!(made.ones_column(4, 3), Some(0));
        assert_eq!(stored.ones_column(4, 3), Some(0));
        let mut changed = made.clone();
        changed.stored_mut(4, 3)[1] = 7.0;
        assert!(matches!(changed, Fixed::Stored(ref x) if x[1] == 7.0 && x[4] == -1.25));
    }

    // Closed-form identity: a column less a constant, and ones.
    #[test]
    fn z_columns_read_as_stored() {
        let v: Arc<[f64]> = vec![1.5, 2.5, 4.0].into();
        let less = ZColumn::Less(Arc::clone(&v), 2.0);
        assert_eq!(less.to_vec(3), vec![-0.5, 0.5, 2.0]);
        assert_eq!(less.pick(&[2, 0]), vec![2.0, -0.5]);
        assert_eq!(ZColumn::Ones.to_vec(2), vec![1.0, 1.0]);
        assert_eq!(ZColumn::Ones.rms(5), 1.0);
        let stored = ZColumn::from(vec![3.0, 4.0]);
        assert_eq!(stored.rms(2), (12.5f64).sqrt());
    }
}
