//! One pass over the rows that gathers every cross-product the criterion needs.
//!
//! The term with the most levels (normally the participant) is the *primary*
//! term: its block of `ZᵀZ` is block-diagonal with q₁×q₁ blocks, kept per level.
//! Every other term, the fixed design and the response form the *dense* part
//! `[Z₂ X y]ᵀ[Z₂ X y]`, of order m = Q₂ + p + 1. The coupling `Z₁ᵀ[Z₂ X y]` is
//! kept per primary level as a short list of blocks (a participant meets only a
//! few schools, periods or cohorts). After this pass one evaluation of the
//! criterion costs O(levels × q₁³ + m³), independent of the number of rows.

use super::MixedProblem;

/// A coupling block between one primary level and one level of a secondary
/// term, in 16 bytes (a participant meets few blocks, but a file of ten
/// million rows holds millions of them).
#[derive(Debug, Clone, Copy)]
pub struct Link {
    /// Index of the secondary term in [`CrossProducts::secondary`].
    secondary: u32,
    /// Offset of the block's first column in the dense part (below the
    /// dense limit).
    offset: u32,
    /// Start of the q₁×q_s values (row-major) in [`CrossProducts::link_values`].
    start: usize,
}

impl Link {
    /// Index of the secondary term in [`CrossProducts::secondary`].
    #[inline(always)]
    pub fn secondary(&self) -> usize {
        self.secondary as usize
    }
    /// Offset of the block's first column in the dense part.
    #[inline(always)]
    pub fn offset(&self) -> usize {
        self.offset as usize
    }
    /// Start of the q₁×q_s values (row-major) in [`CrossProducts::link_values`].
    #[inline(always)]
    pub fn start(&self) -> usize {
        self.start
    }
}

impl CrossProducts {
    /// Entry (r, c) of link `link`'s block times its term's factor,
    /// `(Z₁ᵢᵀZ_s,l T_s)[r, c]` (`ts` is T_s, row-major and lower triangular).
    #[inline(always)]
    pub fn link_entry(&self, link: &Link, ts: &[f64], r: usize, c: usize) -> f64 {
        let qs = self.term_q[self.secondary[link.secondary()]];
        let v = &self.link_values[link.start() + r * qs..link.start() + (r + 1) * qs];
        (c..qs).map(|s| v[s] * ts[s * qs + c]).sum()
    }
}

/// Cross-products of a [`MixedProblem`], independent of θ.
#[derive(Debug, Clone)]
pub struct CrossProducts {
    /// Number of rows.
    pub n: usize,
    /// Number of fixed-effect columns.
    pub p: usize,
    /// Index of the primary term in the problem's terms, if there are any.
    pub primary: Option<usize>,
    /// Coefficients per level of the primary term.
    pub q1: usize,
    /// Levels of the primary term.
    pub n1: usize,
    /// Per primary level, `Z₁ᵢᵀZ₁ᵢ` (q₁×q₁ row-major).
    pub g: Vec<f64>,
    /// Per primary level, `Z₁ᵢᵀ[X y]` (q₁×(p+1) row-major).
    pub zxy: Vec<f64>,
    /// Where each primary level's links start in [`Self::links`], and their
    /// end after the last level: a level's links are consecutive, from its
    /// start to the next level's ([`Self::link_range`]).
    pub link_start: Vec<usize>,
    /// All coupling blocks; within a level, in increasing dense offset.
    pub links: Vec<Link>,
    /// Values of the coupling blocks.
    pub link_values: Vec<f64>,
    /// Indices (into the problem's terms) of the secondary terms.
    pub secondary: Vec<usize>,
    /// Dense offset of each secondary term's first column.
    pub secondary_offset: Vec<usize>,
    /// Total columns of the secondary terms (Q₂).
    pub q2_total: usize,
    /// Order of the dense part, Q₂ + p + 1.
    pub m: usize,
    /// The dense part `[Z₂ X y]ᵀ[Z₂ X y]`, m×m row-major, full symmetric.
    pub dense: Vec<f64>,
    /// Offset of each term's θ in the full θ vector.
    pub theta_offset: Vec<usize>,
    /// q of each term (problem order).
    pub term_q: Vec<usize>,
    /// The fixed-effect column that is all ones, if any.
    pub intercept: Option<usize>,
    /// The constant subtracted from y before forming the cross-products (the
    /// mean of y when there is an intercept column, else 0). It only moves the
    /// intercept's estimate, by exactly this amount, and it keeps yᵀy small so
    /// that r² is computed without cancellation.
    pub y_shift: f64,
    /// With row groups ([`CrossProducts::with_row_groups`]), the dense part
    /// of each group's rows (each m×m, full symmetric; they sum to
    /// [`Self::dense`]); empty otherwise.
    pub dense_groups: Vec<Vec<f64>>,
    /// For a random intercept (or one coefficient) alone, the levels pooled
    /// by their `ZᵢᵀZᵢ` when that takes few values ([`Pools`]).
    pub pools: Option<Pools>,
    /// The secondary columns each primary level meets, when every level
    /// meets the same number (each participant in one school); `None`
    /// otherwise (crossed factors) or without secondary terms.
    pub link_width: Option<usize>,
}

/// Levels of a one-coefficient primary term pooled by `γ = ZᵢᵀZᵢ` (a random
/// intercept: the level's number of rows). A level's share of the criterion
/// depends on θ only through γ (notes/criterion.md, "Pooled levels"), so
/// `Σᵢ cᵢcᵢᵀ` per pool, with `cᵢ = Zᵢᵀ[X y]`, serves every evaluation.
#[derive(Debug, Clone)]
pub struct Pools {
    /// The distinct values of γ.
    pub gamma: Vec<f64>,
    /// Levels per pool.
    pub count: Vec<f64>,
    /// Per pool, `Σ cᵢcᵢᵀ` over its levels, (p+1)×(p+1) row-major, lower
    /// triangle.
    pub outer: Vec<f64>,
}

/// Pools are kept when γ takes at most this many values.
pub const POOL_MAX: usize = 64;

impl Pools {
    /// The pools of `cp`'s primary levels when it has one coefficient, no
    /// other random term and no row groups; `None` otherwise or when γ takes
    /// more than [`POOL_MAX`] values.
    fn of(cp: &CrossProducts) -> Option<Pools> {
        if cp.primary.is_none() || cp.q1 != 1 || !cp.secondary.is_empty() || !cp.dense_groups.is_empty() {
            return None;
        }
        let (g, zxy, c1) = (&cp.g, &cp.zxy, cp.p + 1);
        let mut gamma: Vec<f64> = Vec::new();
        let mut pool_of = Vec::with_capacity(g.len());
        for &v in g {
            let k = match gamma.iter().position(|&x| x == v) {
                Some(k) => k,
                None if gamma.len() < POOL_MAX => {
                    gamma.push(v);
                    gamma.len() - 1
                }
                None => return None,
            };
            pool_of.push(k);
        }
        let mut count = vec![0.0; gamma.len()];
        let mut outer = vec![0.0; gamma.len() * c1 * c1];
        for (i, &k) in pool_of.iter().enumerate() {
            count[k] += 1.0;
            let c = &zxy[i * c1..(i + 1) * c1];
            let o = &mut outer[k * c1 * c1..(k + 1) * c1 * c1];
            for a in 0..c1 {
                if c[a] == 0.0 {
                    continue;
                }
                let row = &mut o[a * c1..a * c1 + a + 1];
                for (b, v) in row.iter_mut().enumerate() {
                    *v += c[a] * c[b];
                }
            }
        }
        Some(Pools { gamma, count, outer })
    }
}

/// The order of the dense part (secondary columns, fixed effects and y)
/// that [`CrossProducts::new`] would build for `problem`, and the
/// secondary terms' names with their columns.
pub fn dense_order(problem: &super::MixedProblem) -> (usize, Vec<(String, usize)>) {
    let layout = Layout::of(&problem.terms);
    let terms = layout
        .secondary
        .iter()
        .map(|&k| {
            (
                problem.terms[k].factor.clone(),
                problem.terms[k].n_levels() * problem.terms[k].q(),
            )
        })
        .collect();
    (layout.q2_total + problem.p() + 1, terms)
}

impl CrossProducts {
    /// The range of primary level `i`'s links in [`Self::links`].
    #[inline(always)]
    pub fn link_range(&self, i: usize) -> (usize, usize) {
        (self.link_start[i], self.link_start[i + 1])
    }

    /// Gather the cross-products in one pass over the rows.
    pub fn new(problem: &MixedProblem) -> Self {
        Self::build(problem, None)
    }

    /// [`CrossProducts::new`], keeping the dense part of each row group
    /// apart as well (`group[r]` in `0..n_groups`), for models whose
    /// residual variance differs between groups.
    pub fn with_row_groups(problem: &MixedProblem, group: &[u32], n_groups: usize) -> Self {
        Self::build(problem, Some((group, n_groups)))
    }

    fn build(problem: &MixedProblem, groups: Option<(&[u32], usize)>) -> Self {
        let n = problem.n();
        let p = problem.p();
        let terms = &problem.terms;
        let Layout {
            primary,
            theta_offset,
            secondary,
            secondary_offset,
            q2_total,
        } = Layout::of(terms);
        let m = q2_total + p + 1;
        let mut dense = vec![0.0; m * m];
        let mut dense_groups: Vec<Vec<f64>> = match groups {
            Some((_, k)) => vec![vec![0.0; m * m]; k],
            None => Vec::new(),
        };
        let (intercept, y_shift) = centring(problem);

        // Rows grouped by primary level (counting sort), so each level's
        // links are gathered in one place.
        let (q1, n1) = match primary {
            Some(k) => (terms[k].q(), terms[k].n_levels()),
            None => (0, 0),
        };
        // The rows level by level: in file order when the file already
        // lists each level's rows together in level order (the usual
        // layout: one participant after another), else through a counting
        // sort (one index per row).
        let order: Option<Vec<usize>> = match primary {
            Some(k) if !terms[k].level.is_sorted() => Some(rows_by_level(&terms[k].level, n1)),
            _ => None,
        };

        let mut g = vec![0.0; n1 * q1 * q1];
        let mut zxy = vec![0.0; n1 * q1 * (p + 1)];
        let mut level_links = Vec::with_capacity(n1 + 1);
        // Room for one link per level and secondary term (participants
        // nested in schools need no more), so the lists are not copied as
        // they grow.
        let nested_links = if primary.is_some() { n1 * secondary.len() } else { 0 };
        let mut links: Vec<Link> = Vec::with_capacity(nested_links);
        let nested_values: usize = secondary.iter().map(|&kt| q1 * terms[kt].q()).sum::<usize>() * n1;
        let mut link_values: Vec<f64> = Vec::with_capacity(if primary.is_some() { nested_values } else { 0 });

        gather(
            problem,
            (primary, &secondary, &secondary_offset, q2_total),
            order.as_deref(),
            y_shift,
            groups.map(|(g, _)| g),
            (&mut dense, &mut dense_groups),
            (&mut g, &mut zxy),
            (&mut level_links, &mut links, &mut link_values),
        );
        // The loop filled dense[a][b] for the w-order pairs; make it symmetric.
        for d in &mut dense_groups {
            symmetrise(d, m);
        }
        if dense_groups.is_empty() {
            symmetrise(&mut dense, m);
        } else {
            for d in &dense_groups {
                dense.iter_mut().zip(d).for_each(|(a, b)| *a += b);
            }
        }
        let mut cp = CrossProducts {
            pools: None,
            link_width: None,
            n,
            p,
            primary,
            q1,
            n1,
            g,
            zxy,
            link_start: level_links,
            links,
            link_values,
            secondary,
            secondary_offset,
            q2_total,
            m,
            dense,
            theta_offset,
            term_q: terms.iter().map(|t| t.q()).collect(),
            intercept,
            y_shift,
            dense_groups,
        };
        cp.pools = Pools::of(&cp);
        cp.link_width = cp.uniform_link_width();
        cp
    }

    /// See [`Self::link_width`].
    fn uniform_link_width(&self) -> Option<usize> {
        let width = |i: usize| -> usize {
            let (lo, hi) = self.link_range(i);
            self.links[lo..hi]
                .iter()
                .map(|link| self.term_q[self.secondary[link.secondary()]])
                .sum()
        };
        if self.n1 == 0 || self.link_start.len() != self.n1 + 1 {
            return None;
        }
        let s = width(0);
        (s > 0 && (1..self.n1).all(|i| width(i) == s)).then_some(s)
    }
}

/// Where each term's parameters and dense columns go: the primary term
/// (the one with most levels) is factored level by level, the others
/// (secondary) join the dense block.
struct Layout {
    primary: Option<usize>,
    theta_offset: Vec<usize>,
    secondary: Vec<usize>,
    secondary_offset: Vec<usize>,
    q2_total: usize,
}

impl Layout {
    fn of(terms: &[super::RandomTermData]) -> Layout {
        let primary = (0..terms.len()).max_by_key(|&k| (terms[k].n_levels(), usize::MAX - k));
        let mut theta_offset = Vec::with_capacity(terms.len());
        let mut acc = 0;
        for t in terms {
            theta_offset.push(acc);
            acc += t.n_theta();
        }
        let secondary: Vec<usize> = (0..terms.len()).filter(|&k| Some(k) != primary).collect();
        let mut secondary_offset = Vec::with_capacity(secondary.len());
        let mut q2_total = 0;
        for &k in &secondary {
            secondary_offset.push(q2_total);
            q2_total += terms[k].n_levels() * terms[k].q();
        }
        Layout {
            primary,
            theta_offset,
            secondary,
            secondary_offset,
            q2_total,
        }
    }
}

/// Add one row's primary cross-products: Z₁ᵢᵀZ₁ᵢ into `gi` and Z₁ᵢᵀ[X y]
/// into `zi` (q1 = `z1.len()` rows of p + 1 = `xr.len() + 1`).
#[inline(always)]
fn add_primary_row(gi: &mut [f64], zi: &mut [f64], z1: &[f64], xr: &[f64], y: f64) {
    let (q1, p) = (z1.len(), xr.len());
    let (gi, zi) = (&mut gi[..q1 * q1], &mut zi[..q1 * (p + 1)]);
    for a in 0..q1 {
        for b in 0..q1 {
            gi[a * q1 + b] += z1[a] * z1[b];
        }
    }
    for a in 0..q1 {
        let row = &mut zi[a * (p + 1)..(a + 1) * (p + 1)];
        for (j, xv) in xr.iter().enumerate() {
            row[j] += z1[a] * xv;
        }
        row[p] += z1[a] * y;
    }
}

/// The cross-products in two passes side by side, each over the rows in
/// the order `order` (else file order) that one pass would take, so the
/// sums are the same to the bit: the dense part (`dense`, or per row group
/// `dense_groups` when `groups` gives each row's group) with the secondary
/// terms (`secondary` with their dense offsets, Q₂), and the level blocks
/// of the `primary` term with their links.
#[allow(clippy::too_many_arguments, clippy::type_complexity)]
fn gather(
    problem: &MixedProblem,
    (primary, secondary, secondary_offset, q2_total): (Option<usize>, &[usize], &[usize], usize),
    order: Option<&[usize]>,
    y_shift: f64,
    groups: Option<&[u32]>,
    (dense, dense_groups): (&mut [f64], &mut [Vec<f64>]),
    (g, zxy): (&mut [f64], &mut [f64]),
    (level_links, links, link_values): (&mut Vec<usize>, &mut Vec<Link>, &mut Vec<f64>),
) {
    rayon::join(
        || {
            let secondary = (secondary, secondary_offset, q2_total);
            dense_pass(problem, secondary, order, y_shift, groups, (dense, dense_groups));
        },
        || {
            if let Some(k) = primary {
                let lists = (level_links, links, link_values);
                level_pass(
                    problem,
                    k,
                    (secondary, secondary_offset),
                    order,
                    y_shift,
                    (g, zxy),
                    lists,
                );
            }
        },
    );
}

/// The level blocks of the primary term `k` (`Gᵢ = ZᵢᵀZᵢ` into `g`,
/// `Zᵢᵀ[X y]` into `zxy`) and their links to the `secondary` terms, over
/// the rows in the order `order` (else file order), in which each level's
/// rows are consecutive. With the term's width and the p + 1 columns of
/// [X y] small, they are compile-time sizes ([`level_rows`]).
#[allow(clippy::type_complexity)]
fn level_pass(
    problem: &MixedProblem,
    k: usize,
    secondary: (&[usize], &[usize]),
    order: Option<&[usize]>,
    y_shift: f64,
    blocks: (&mut [f64], &mut [f64]),
    lists: (&mut Vec<usize>, &mut Vec<Link>, &mut Vec<f64>),
) {
    macro_rules! columns {
        ($q:literal) => {
            columns!($q; 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12)
        };
        ($q:literal; $($c:literal),*) => {
            match problem.p() + 1 {
                $($c => level_rows::<$q, $c>(problem, k, secondary, order, y_shift, blocks, lists),)*
                _ => level_rows::<$q, 0>(problem, k, secondary, order, y_shift, blocks, lists),
            }
        };
    }
    match problem.terms[k].q() {
        1 => columns!(1),
        2 => columns!(2),
        3 => columns!(3),
        4 => columns!(4),
        _ => level_rows::<0, 0>(problem, k, secondary, order, y_shift, blocks, lists),
    }
}

/// [`level_pass`] with the term's width `Q` and the columns `C` of [X y]
/// as compile-time sizes (0: known at run time only). A level's blocks
/// are taken once for its run of rows, and each row adds to them in the
/// same order as one row at a time would, so the sums are the same to the
/// bit.
#[allow(clippy::type_complexity)]
fn level_rows<const Q: usize, const C: usize>(
    problem: &MixedProblem,
    k: usize,
    (secondary, secondary_offset): (&[usize], &[usize]),
    order: Option<&[usize]>,
    y_shift: f64,
    (g, zxy): (&mut [f64], &mut [f64]),
    (level_links, links, link_values): (&mut Vec<usize>, &mut Vec<Link>, &mut Vec<f64>),
) {
    let (terms, term) = (&problem.terms, &problem.terms[k]);
    let q1 = if Q == 0 { term.q() } else { Q };
    let c1 = if C == 0 { problem.p() + 1 } else { C };
    let (n, n1, p) = (problem.n(), term.n_levels(), c1 - 1);
    let z = &term.z[..q1];
    let mut z1_store = vec![0.0; q1];
    let z1 = &mut z1_store[..q1];
    let mut x_store = vec![0.0; p];
    let mut at = 0;
    while at < n {
        let level = term.level[order.map_or(at, |o| o[at])] as usize;
        // Levels with no rows get an empty range.
        while level_links.len() < level {
            level_links.push(links.len());
        }
        let level_start_link = links.len();
        let gi = &mut g[level * q1 * q1..(level + 1) * q1 * q1];
        let zi = &mut zxy[level * q1 * c1..(level + 1) * q1 * c1];
        while at < n {
            let r = order.map_or(at, |o| o[at]);
            if term.level[r] as usize != level {
                break;
            }
            at += 1;
            for (zc, col) in z1.iter_mut().zip(z) {
                *zc = col.at(r);
            }
            add_primary_row(gi, zi, z1, problem.x_row(r, &mut x_store), problem.y[r] - y_shift);
            for (s, &kt) in secondary.iter().enumerate() {
                let t = &terms[kt];
                let qs = t.q();
                let offset = secondary_offset[s] + t.level[r] as usize * qs;
                // Coupling block Z₁ᵢᵀ Z_s,j for this row.
                let start = link_start(links, link_values, level_start_link, s, offset, q1 * qs);
                for (a, za) in z1.iter().enumerate() {
                    for c in 0..qs {
                        link_values[start + a * qs + c] += za * t.z[c].at(r);
                    }
                }
            }
        }
        links[level_start_link..].sort_by_key(|l| l.offset);
        level_links.push(level_start_link);
    }
    while level_links.len() < n1 {
        level_links.push(links.len());
    }
    level_links.push(links.len());
}

/// The dense part `[Z₂ X y]ᵀ[Z₂ X y]` (`dense`, or per row group
/// `dense_groups` when `groups` gives each row's group) over the rows in
/// the order `order` (else file order), with the p + 1 columns of [X y] as
/// a compile-time size when small ([`dense_rows`]).
#[allow(clippy::type_complexity)]
fn dense_pass(
    problem: &MixedProblem,
    secondary: (&[usize], &[usize], usize),
    order: Option<&[usize]>,
    y_shift: f64,
    groups: Option<&[u32]>,
    targets: (&mut [f64], &mut [Vec<f64>]),
) {
    macro_rules! columns {
        ($($c:literal),*) => {
            match problem.p() + 1 {
                $($c => dense_rows::<$c>(problem, secondary, order, y_shift, groups, targets),)*
                _ => dense_rows::<0>(problem, secondary, order, y_shift, groups, targets),
            }
        };
    }
    columns!(1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12)
}

/// [`dense_pass`] with the columns `C` of [X y] as a compile-time size (0:
/// known at run time only). Each row adds the products of its entries
/// `w = [z₂ entries, x, y]` on the pairs (a, b) with b at or before a in
/// `w`, into row a; the lower triangle is mirrored afterwards. Every sum
/// takes its terms in row order, so the result is the same to the bit
/// whether or not a zero entry's products (another cohort's column, say)
/// are added: they are exact zeros.
#[allow(clippy::type_complexity)]
fn dense_rows<const C: usize>(
    problem: &MixedProblem,
    (secondary, secondary_offset, q2_total): (&[usize], &[usize], usize),
    order: Option<&[usize]>,
    y_shift: f64,
    groups: Option<&[u32]>,
    (dense, dense_groups): (&mut [f64], &mut [Vec<f64>]),
) {
    let terms = &problem.terms;
    let c1 = if C == 0 { problem.p() + 1 } else { C };
    let (n, p, m) = (problem.n(), c1 - 1, q2_total + c1);
    // The row's secondary entries as (dense index, value), and [x, y].
    let mut w: Vec<(usize, f64)> = Vec::with_capacity(q2_total.min(64));
    let mut v_store = vec![0.0; c1];
    let v = &mut v_store[..c1];
    let mut x_store = vec![0.0; p];
    for at in 0..n {
        let r = order.map_or(at, |o| o[at]);
        w.clear();
        for (s, &kt) in secondary.iter().enumerate() {
            let t = &terms[kt];
            let qs = t.q();
            let offset = secondary_offset[s] + t.level[r] as usize * qs;
            for c in 0..qs {
                w.push((offset + c, t.z[c].at(r)));
            }
        }
        let xr = problem.x_row(r, &mut x_store);
        v[..p].copy_from_slice(xr);
        v[p] = problem.y[r] - y_shift;
        let target = match groups {
            Some(g) => &mut dense_groups[g[r] as usize][..],
            None => &mut *dense,
        };
        for (ia, &(a, va)) in w.iter().enumerate() {
            let row = &mut target[a * m..(a + 1) * m];
            for &(b, vb) in &w[..=ia] {
                row[b] += va * vb;
            }
        }
        let fixed = &mut target[q2_total * m..(q2_total + c1) * m];
        for (j, &vj) in v.iter().enumerate() {
            let row = &mut fixed[j * m..(j + 1) * m];
            for &(b, vb) in &w {
                row[b] += vj * vb;
            }
            for (f, &vi) in row[q2_total..q2_total + j + 1].iter_mut().zip(&v[..=j]) {
                *f += vj * vi;
            }
        }
    }
}

/// Where the coupling block of the current primary level and the secondary
/// column block at `offset` starts in `link_values`, made (zeroed, `size`
/// values) on first sight.
#[inline]
fn link_start(
    links: &mut Vec<Link>,
    link_values: &mut Vec<f64>,
    level_start: usize,
    secondary: usize,
    offset: usize,
    size: usize,
) -> usize {
    if let Some(pos) = links[level_start..].iter().position(|l| l.offset() == offset) {
        return links[level_start + pos].start;
    }
    let start = link_values.len();
    link_values.resize(start + size, 0.0);
    // The dense part is at most `DENSE_LIMIT` columns, far below u32::MAX.
    links.push(Link {
        secondary: secondary as u32,
        offset: offset as u32,
        start,
    });
    start
}

/// Row indices grouped by level (a counting sort), levels in order.
fn rows_by_level(level: &[u32], n_levels: usize) -> Vec<usize> {
    let mut count = vec![0usize; n_levels + 1];
    for &l in level {
        count[l as usize + 1] += 1;
    }
    for i in 0..n_levels {
        count[i + 1] += count[i];
    }
    let mut order = vec![0usize; level.len()];
    for (r, &l) in level.iter().enumerate() {
        order[count[l as usize]] = r;
        count[l as usize] += 1;
    }
    order
}

/// Add the transpose of the strict lower triangle to the upper one and back:
/// the pairs were accumulated in one order only.
fn symmetrise(d: &mut [f64], m: usize) {
    for a in 0..m {
        for b in 0..a {
            let s = d[a * m + b] + d[b * m + a];
            d[a * m + b] = s;
            d[b * m + a] = s;
        }
    }
}

/// The intercept column of X (all ones), if any, and the shift of the
/// response that centres it when there is one (zero otherwise): with an
/// intercept the shift changes β̂'s intercept only, and it keeps the
/// cross-products of the response small.
pub(crate) fn centring(problem: &MixedProblem) -> (Option<usize>, f64) {
    let (n, p) = (problem.n(), problem.p());
    let intercept = problem.x.ones_column(n, p);
    let y_shift = match intercept {
        Some(_) if n > 0 => problem.y.iter().sum::<f64>() / n as f64,
        _ => 0.0,
    };
    (intercept, y_shift)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::lmm::RandomTermData;
    use crate::simulate::Rng;

    /// `n_id` participants with 1 to 3 rows each, in a shuffled row order,
    /// some in two schools (crossed); `q1` coefficients per participant, p
    /// fixed columns (the second zero on every other row) and a school
    /// intercept and slope.
    fn problem(q1: usize, p: usize, seed: u64) -> MixedProblem {
        let mut rng = Rng::new(seed);
        let n_id = 40;
        let (mut x, mut z1, mut zs) = (Vec::new(), vec![Vec::new(); q1], vec![Vec::new(); 2]);
        let (mut id, mut school) = (Vec::new(), Vec::new());
        // Participant 7 has no rows: its level gets an empty range.
        for i in (0..n_id).filter(|&i| i != 7) {
            for w in 0..1 + i % 3 {
                let a = w as f64 + rng.uniform();
                x.push(1.0);
                for c in 1..p {
                    x.push(if c == 1 && w % 2 == 1 { 0.0 } else { rng.normal() });
                }
                for (c, col) in z1.iter_mut().enumerate() {
                    col.push(if c == 0 { 1.0 } else { a.powi(c as i32) });
                }
                zs[0].push(1.0);
                zs[1].push(a);
                id.push(i as u32);
                school.push(((i + usize::from(i % 5 == 0 && w == 1)) % 6) as u32);
            }
        }
        let n = id.len();
        let mut order: Vec<usize> = (0..n).collect();
        for r in (1..n).rev() {
            order.swap(r, (rng.uniform() * (r + 1) as f64) as usize % (r + 1));
        }
        let pick = |v: &[f64], width: usize| -> Vec<f64> {
            order
                .iter()
                .flat_map(|&r| v[r * width..(r + 1) * width].to_vec())
                .collect()
        };
        let column = |v: &[f64]| pick(v, 1);
        let levels = |v: &[u32]| -> Vec<u32> { order.iter().map(|&r| v[r]).collect() };
        MixedProblem {
            y: (0..n).map(|_| rng.normal()).collect(),
            x_names: (0..p).map(|c| c.to_string()).collect(),
            x: pick(&x, p).into(),
            terms: vec![
                RandomTermData::numbered(
                    "id",
                    n_id,
                    levels(&id),
                    &["intercept", "a", "b", "c", "d"][..q1],
                    z1.iter().map(|c| column(c)).collect(),
                ),
                RandomTermData::numbered(
                    "school",
                    6,
                    levels(&school),
                    &["intercept", "a"],
                    zs.iter().map(|c| column(c)).collect(),
                ),
            ],
        }
    }

    type Blocks = (Vec<f64>, Vec<f64>, Vec<usize>, Vec<(usize, usize, usize)>, Vec<f64>);

    /// The level pass through `pass`, on `problem`'s rows by level.
    fn blocks(problem: &MixedProblem, pass: impl FnOnce(&MixedProblem, &[usize], &mut Blocks)) -> Blocks {
        let (q1, n1, p) = (problem.terms[0].q(), problem.terms[0].n_levels(), problem.p());
        let order = rows_by_level(&problem.terms[0].level, n1);
        let mut out: Blocks = (
            vec![0.0; n1 * q1 * q1],
            vec![0.0; n1 * q1 * (p + 1)],
            Vec::new(),
            Vec::new(),
            Vec::new(),
        );
        pass(problem, &order, &mut out);
        out
    }

    fn run<const Q: usize, const C: usize>(problem: &MixedProblem, order: &[usize], out: &mut Blocks) {
        let (mut links, mut values) = (Vec::new(), Vec::new());
        level_rows::<Q, C>(
            problem,
            0,
            (&[1], &[0]),
            Some(order),
            0.25,
            (&mut out.0, &mut out.1),
            (&mut out.2, &mut links, &mut values),
        );
        out.3 = links
            .iter()
            .map(|l: &Link| (l.secondary(), l.offset(), l.start()))
            .collect();
        out.4 = values;
    }

    // The compile-time sizes give the same sums, to the bit, as the sizes
    // known at run time, at every width 1–5 of the term and 2–9 columns of
    // [X y] (beyond the sized ones at 5 and 9).
    #[test]
    fn sized_level_pass_matches_the_run_time_one() {
        for q1 in 1..=5 {
            for p in 1..=12 {
                let problem = problem(q1, p, (10 * q1 + p) as u64);
                let sized = blocks(&problem, |pr, o, out| {
                    let mut lists = (Vec::new(), Vec::new(), Vec::new());
                    level_pass(
                        pr,
                        0,
                        (&[1], &[0]),
                        Some(o),
                        0.25,
                        (&mut out.0, &mut out.1),
                        (&mut lists.0, &mut lists.1, &mut lists.2),
                    );
                    out.2 = lists.0;
                    out.3 = lists
                        .1
                        .iter()
                        .map(|l: &Link| (l.secondary(), l.offset(), l.start()))
                        .collect();
                    out.4 = lists.2;
                });
                let general = blocks(&problem, run::<0, 0>);
                assert_eq!(sized, general, "q1 {q1}, p {p}");
            }
        }
    }

    // Closed-form identity: each level's blocks are the sums over its rows,
    // Gᵢ = Σ zzᵀ, Zᵢᵀ[X y] = Σ z[x, y − shift] and the coupling with
    // school j = Σ z z_sᵀ over the rows in school j, summed here row by row
    // in file order; the levels' link ranges cover their schools in order.
    #[test]
    fn level_blocks_are_the_row_sums() {
        let problem = problem(2, 3, 5);
        let got = blocks(&problem, run::<2, 4>);
        let (n1, q1, c1) = (40, 2, 4);
        let t = &problem.terms;
        let mut g = vec![0.0; n1 * q1 * q1];
        let mut zxy = vec![0.0; n1 * q1 * c1];
        let mut coupling = std::collections::BTreeMap::<(usize, usize), [f64; 4]>::new();
        for r in 0..problem.n() {
            let i = t[0].level[r] as usize;
            let j = t[1].level[r] as usize;
            let z = [t[0].z[0].at(r), t[0].z[1].at(r)];
            let row: Vec<f64> = problem.x_rows()[r * 3..r * 3 + 3]
                .iter()
                .copied()
                .chain([problem.y[r] - 0.25])
                .collect();
            let block = coupling.entry((i, j)).or_default();
            for a in 0..2 {
                for b in 0..2 {
                    g[i * 4 + a * 2 + b] += z[a] * z[b];
                    block[a * 2 + b] += z[a] * t[1].z[b].at(r);
                }
                for c in 0..4 {
                    zxy[i * 8 + a * 4 + c] += z[a] * row[c];
                }
            }
        }
        let near = |a: &[f64], b: &[f64]| a.iter().zip(b).all(|(u, v)| (u - v).abs() <= 1e-12 * (1.0 + u.abs()));
        assert!(near(&got.0, &g) && near(&got.1, &zxy));
        assert_eq!(got.2.len(), n1 + 1);
        assert_eq!(got.2[7], got.2[8], "a level without rows has no links");
        for i in 0..n1 {
            let schools: Vec<usize> = coupling.keys().filter(|k| k.0 == i).map(|k| k.1).collect();
            let listed = &got.3[got.2[i]..got.2[i + 1]];
            assert_eq!(listed.iter().map(|l| l.1 / 2).collect::<Vec<_>>(), schools, "level {i}");
            for (l, j) in listed.iter().zip(&schools) {
                assert!(near(&got.4[l.2..l.2 + 4], &coupling[&(i, *j)]), "level {i}, school {j}");
            }
        }
        assert!(
            coupling.keys().filter(|k| k.0 == 5).count() == 2,
            "participant 5 is in two schools"
        );
    }

    fn dense_of<const C: usize>(problem: &MixedProblem, groups: Option<&[u32]>, n_groups: usize) -> Vec<Vec<f64>> {
        let m = 12 + problem.p() + 1;
        let mut dense = vec![0.0; m * m];
        let mut per_group = vec![vec![0.0; m * m]; n_groups];
        dense_rows::<C>(
            problem,
            (&[1], &[0], 12),
            None,
            0.25,
            groups,
            (&mut dense, &mut per_group),
        );
        per_group.push(dense);
        per_group
    }

    // The compile-time size gives the same sums, to the bit, as the size
    // known at run time, with and without row groups; and (closed-form
    // identity) the dense part is [Z₂ X y]ᵀ[Z₂ X y] summed row by row, with
    // the zero entries of X left in.
    #[test]
    fn dense_part_is_the_row_sum_at_every_size() {
        for p in 1..=12 {
            let problem = problem(2, p, 70 + p as u64);
            let groups: Vec<u32> = (0..problem.n() as u32).map(|r| r % 3).collect();
            for (grouping, k) in [(None, 0), (Some(&groups[..]), 3)] {
                let general = dense_of::<0>(&problem, grouping, k);
                let sized = match p + 1 {
                    2 => dense_of::<2>(&problem, grouping, k),
                    3 => dense_of::<3>(&problem, grouping, k),
                    4 => dense_of::<4>(&problem, grouping, k),
                    5 => dense_of::<5>(&problem, grouping, k),
                    6 => dense_of::<6>(&problem, grouping, k),
                    7 => dense_of::<7>(&problem, grouping, k),
                    8 => dense_of::<8>(&problem, grouping, k),
                    9 => dense_of::<9>(&problem, grouping, k),
                    10 => dense_of::<10>(&problem, grouping, k),
                    11 => dense_of::<11>(&problem, grouping, k),
                    12 => dense_of::<12>(&problem, grouping, k),
                    _ => dense_of::<0>(&problem, grouping, k),
                };
                assert_eq!(sized, general, "p {p}");
            }
            let m = 12 + p + 1;
            let got = &dense_of::<0>(&problem, None, 0)[0];
            let mut want = vec![0.0; m * m];
            let school = &problem.terms[1];
            for r in 0..problem.n() {
                let mut w = vec![0.0; m];
                let j = school.level[r] as usize;
                (w[2 * j], w[2 * j + 1]) = (school.z[0].at(r), school.z[1].at(r));
                w[12..12 + p].copy_from_slice(&problem.x_rows()[r * p..(r + 1) * p]);
                w[12 + p] = problem.y[r] - 0.25;
                for a in 0..m {
                    for b in 0..=a {
                        want[a * m + b] += w[a] * w[b];
                    }
                }
            }
            let near = |a: f64, b: f64| (a - b).abs() <= 1e-12 * (1.0 + a.abs());
            for a in 0..m {
                for b in 0..=a {
                    assert!(near(got[a * m + b], want[a * m + b]), "p {p}, ({a}, {b})");
                }
            }
        }
    }
}
