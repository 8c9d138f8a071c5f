//! The reduced system `M` (see `marginal`) kept sparse, for grouping factors with many
//! levels (observers, instruments).
//!
//! Dense, `M` costs `q^2` per count class to store and `q^3 / 3` per factorisation, so a
//! factor with thousands of levels makes every evaluation cubic in them. But a level only
//! meets the levels it shares a site with: `M`'s pattern is the union, over sites, of the
//! cliques of the parameters each site's observations touch. This module fixes that
//! pattern and a fill-reducing order once per data set, keeps `W'W` and each count class's
//! `C_k` as values on it, and factorises with a supernodal sparse Cholesky (faer).
//!
//! Order: the levels of the grouping factors first, in approximate minimum degree order
//! (Amestoy, Davis & Duff 1996, SIAM J. Matrix Anal. Appl. 17(4)); then the years; then
//! the coefficients. Years and coefficients touch almost every site, so they are dense
//! rows; putting them last keeps them from filling the sparse block, and keeps the
//! coefficients' block trailing, which `log|X' V^-1 X|` (`Factorised`) reads off the
//! factor's last diagonal entries.

use crate::data::Data;
use crate::stats::Layout;
use faer::dyn_stack::{MemBuffer, MemStack, StackReq};
use faer::linalg::cholesky::llt::factor::LltRegularization;
use faer::sparse::linalg::amd;
use faer::sparse::linalg::cholesky::supernodal::{
    self, SupernodalLltRef, SymbolicSupernodalCholesky,
};
use faer::sparse::linalg::cholesky::{
    factorize_symbolic_cholesky, CholeskySymbolicParams, SymbolicCholesky, SymbolicCholeskyRaw,
    SymmetricOrdering,
};
use faer::sparse::linalg::SupernodalThreshold;
use faer::sparse::{SparseColMatRef, SymbolicSparseColMat};
use faer::{Conj, MatMut, Par, Side};
use std::sync::Arc;

/// The pattern, order and symbolic factorisation of `M`, fixed per data set.
#[derive(Debug)]
pub(crate) struct SparsePlan {
    /// Position in the factor of each index of `u`.
    pub pos: Vec<u32>,
    /// Lower triangle of `M` in factor positions (column `j` holds rows `i >= j`,
    /// sorted): the supernodal factorisation reads this triangle without a copy.
    pattern: SymbolicSparseColMat<u32>,
    /// Entry of each diagonal element, by position.
    pub diag: Vec<usize>,
    symbolic: SymbolicCholesky<u32>,
    numeric_scratch: StackReq,
    solve_scratch: StackReq,
}

/// `W'W` and every count class's `C_k` on the plan's pattern.
#[derive(Debug, Clone)]
pub(crate) struct SparseStats {
    pub plan: Arc<SparsePlan>,
    /// Values of `W'W`, aligned with the pattern's entries.
    pub wtw: Vec<f64>,
    /// Per count class, `C_k` on the pattern.
    pub classes: Vec<ClassValues>,
}

/// One class's `C_k`: on every entry when it touches many (a streamed, vectorised update
/// per evaluation), else on the entries it touches (a scatter).
#[derive(Debug, Clone)]
pub(crate) enum ClassValues {
    Every(Vec<f64>),
    Some { at: Vec<u32>, val: Vec<f64> },
}

impl ClassValues {
    /// `m -= w C_k`.
    pub fn subtract_from(&self, m: &mut [f64], w: f64) {
        match self {
            ClassValues::Every(c) => {
                for (mi, ci) in m.iter_mut().zip(c) {
                    *mi -= w * ci;
                }
            }
            ClassValues::Some { at, val } => {
                for (&e, &v) in at.iter().zip(val) {
                    m[e as usize] -= w * v;
                }
            }
        }
    }
}

/// Share of the pattern from which a class is kept on every entry: a scatter costs a few
/// times a streamed update per entry (on B4 at 3,000 observers, where classes cover
/// about half the pattern, this took a fit from 29.1 to 27.9 s).
const EVERY_FROM_SHARE: f64 = 0.2;

impl SparsePlan {
    /// The plan for `u` of length `q` (years, then group levels from `n_years`, then
    /// coefficients from `fixed_offset`), given each site's sparse `w_s`.
    pub fn new(
        q: usize,
        n_years: usize,
        fixed_offset: usize,
        site_w_ptr: &[usize],
        site_w_idx: &[u32],
    ) -> Option<Self> {
        let n_sites = site_w_ptr.len() - 1;
        let clique = |s: usize| &site_w_idx[site_w_ptr[s]..site_w_ptr[s + 1]];
        // Levels of the grouping factors: indices n_years..fixed_offset.
        let g = fixed_offset - n_years;
        let mut pos = vec![0u32; q];
        if g > 0 {
            // Their graph, both triangles, for the minimum degree order.
            let mut adj: Vec<Vec<u32>> = vec![Vec::new(); g];
            for s in 0..n_sites {
                let levels: Vec<u32> = clique(s)
                    .iter()
                    .filter(|&&i| (i as usize) >= n_years && (i as usize) < fixed_offset)
                    .map(|&i| i - n_years as u32)
                    .collect();
                for &a in &levels {
                    for &b in &levels {
                        adj[a as usize].push(b);
                    }
                }
            }
            let (col_ptr, row_idx) = compress(adj);
            let graph = SymbolicSparseColMat::new_checked(g, g, col_ptr, None, row_idx);
            let nnz = graph.compute_nnz();
            let mut perm = vec![0u32; g];
            let mut perm_inv = vec![0u32; g];
            let mut buf = MemBuffer::new(amd::order_scratch::<u32>(g, nnz));
            amd::order(
                &mut perm,
                &mut perm_inv,
                graph.as_ref(),
                amd::Control::default(),
                MemStack::new(&mut buf),
            )
            .ok()?;
            for (new, &old) in perm.iter().enumerate() {
                pos[n_years + old as usize] = new as u32;
            }
        }
        for (j, p) in pos.iter_mut().enumerate().take(n_years) {
            *p = (g + j) as u32;
        }
        for (j, p) in pos.iter_mut().enumerate().skip(fixed_offset) {
            *p = j as u32;
        }

        // Lower triangle of M in positions: the union of the site cliques and the
        // diagonal (W'W's pattern is inside it: an observation's row is inside its site's
        // clique). The upper triangle (its transpose) is only for the symbolic analysis.
        let mut lower: Vec<Vec<u32>> = (0..q as u32).map(|j| vec![j]).collect();
        let mut upper: Vec<Vec<u32>> = (0..q as u32).map(|j| vec![j]).collect();
        let mut mapped = Vec::new();
        for s in 0..n_sites {
            mapped.clear();
            mapped.extend(clique(s).iter().map(|&i| pos[i as usize]));
            for &a in &mapped {
                for &b in &mapped {
                    if a < b {
                        lower[a as usize].push(b);
                        upper[b as usize].push(a);
                    }
                }
            }
        }
        let (col_ptr, row_idx) = compress(upper);
        let upper = SymbolicSparseColMat::new_checked(q, q, col_ptr, None, row_idx);
        let symbolic = factorize_symbolic_cholesky(
            upper.as_ref(),
            Side::Upper,
            SymmetricOrdering::Identity,
            CholeskySymbolicParams {
                supernodal_flop_ratio_threshold: SupernodalThreshold::FORCE_SUPERNODAL,
                ..Default::default()
            },
        )
        .ok()?;
        drop(upper);
        let (col_ptr, row_idx) = compress(lower);
        let pattern = SymbolicSparseColMat::new_checked(q, q, col_ptr, None, row_idx);
        let diag = (0..q).map(|j| column(&pattern, j).0).collect();
        let numeric_scratch = supernodal::factorize_supernodal_numeric_llt_scratch::<u32, f64>(
            supernodes(&symbolic),
            Par::Seq,
            Default::default(),
        );
        let solve_scratch = supernodes(&symbolic).solve_in_place_scratch::<f64>(1, Par::Seq);
        Some(SparsePlan {
            pos,
            pattern,
            diag,
            symbolic,
            numeric_scratch,
            solve_scratch,
        })
    }

    pub fn nnz(&self) -> usize {
        self.pattern.compute_nnz()
    }

    fn factor_len(&self) -> usize {
        self.symbolic.len_val()
    }

    /// The entry of `M` at positions `(a, b)` (either order); it must be in the pattern.
    pub fn entry(&self, a: u32, b: u32) -> usize {
        let (j, i) = if a <= b { (a, b) } else { (b, a) };
        let (lo, rows) = column(&self.pattern, j as usize);
        lo + rows
            .binary_search(&i)
            .expect("every entry of M lies in the pattern of the site cliques")
    }

    /// Factorise `M` given its values on the pattern; `None` when it is not numerically
    /// positive definite.
    pub fn factorise(self: &Arc<Self>, values: &[f64]) -> Option<SparseFactor> {
        let mut l = vec![0.0; self.symbolic.len_val()];
        let mut buf = MemBuffer::new(self.numeric_scratch);
        supernodal::factorize_supernodal_numeric_llt(
            &mut l,
            SparseColMatRef::new(self.pattern.as_ref(), values),
            LltRegularization::default(),
            supernodes(&self.symbolic),
            Par::Seq,
            MemStack::new(&mut buf),
            Default::default(),
        )
        .ok()?;
        Some(SparseFactor {
            plan: Arc::clone(self),
            l,
        })
    }
}

/// A numeric factor `P M P' = L L'` on a plan.
#[derive(Debug, Clone)]
pub(crate) struct SparseFactor {
    plan: Arc<SparsePlan>,
    l: Vec<f64>,
}

impl SparseFactor {
    fn llt(&self) -> SupernodalLltRef<'_, u32, f64> {
        SupernodalLltRef::new(supernodes(&self.plan.symbolic), &self.l)
    }

    pub fn dim(&self) -> usize {
        self.plan.pos.len()
    }

    /// The diagonal of `L`, by position.
    pub fn diagonal(&self) -> Vec<f64> {
        let llt = self.llt();
        let mut out = vec![0.0; self.plan.pos.len()];
        for s in 0..llt.symbolic().n_supernodes() {
            let node = llt.supernode(s);
            let v = node.val();
            for k in 0..v.ncols() {
                out[node.start() + k] = v[(k, k)];
            }
        }
        out
    }

    /// `x` in `u`'s order to positions.
    fn to_positions(&self, x: &[f64]) -> Vec<f64> {
        let mut out = vec![0.0; x.len()];
        for (i, &v) in x.iter().enumerate() {
            out[self.plan.pos[i] as usize] = v;
        }
        out
    }

    fn in_u_order(&self, y: &[f64]) -> Vec<f64> {
        self.plan.pos.iter().map(|&p| y[p as usize]).collect()
    }

    /// `(|L^-1 P r|^2, M^-1 r)`.
    pub fn half_and_solve(&self, r: &[f64]) -> (f64, Vec<f64>) {
        let mut y = self.to_positions(r);
        let n = y.len();
        let mut buf = MemBuffer::new(self.plan.solve_scratch);
        let llt = self.llt();
        llt.l_solve_with_conj(
            Conj::No,
            MatMut::from_column_major_slice_mut(&mut y, n, 1),
            Par::Seq,
            MemStack::new(&mut buf),
        );
        let half = y.iter().map(|v| v * v).sum();
        llt.l_transpose_solve_with_conj(
            Conj::No,
            MatMut::from_column_major_slice_mut(&mut y, n, 1),
            Par::Seq,
            MemStack::new(&mut buf),
        );
        (half, self.in_u_order(&y))
    }

    /// `P' L'^-1 z`: for standard normal `z`, a draw of `N(0, M^-1)` in `u`'s order.
    pub fn noise(&self, z: &mut [f64]) -> Vec<f64> {
        let n = z.len();
        let mut buf = MemBuffer::new(self.plan.solve_scratch);
        self.llt().l_transpose_solve_with_conj(
            Conj::No,
            MatMut::from_column_major_slice_mut(z, n, 1),
            Par::Seq,
            MemStack::new(&mut buf),
        );
        self.in_u_order(z)
    }

    /// `M^-1 r`.
    pub fn solve(&self, r: &[f64]) -> Vec<f64> {
        self.half_and_solve(r).1
    }
}

fn supernodes(symbolic: &SymbolicCholesky<u32>) -> &SymbolicSupernodalCholesky<u32> {
    match symbolic.raw() {
        SymbolicCholeskyRaw::Supernodal(s) => s,
        SymbolicCholeskyRaw::Simplicial(_) => {
            unreachable!("the plan forces the supernodal factorisation")
        }
    }
}

/// Column `j` of a pattern: the index of its first entry and its rows.
fn column(pattern: &SymbolicSparseColMat<u32>, j: usize) -> (usize, &[u32]) {
    let (lo, hi) = (
        pattern.col_ptr()[j] as usize,
        pattern.col_ptr()[j + 1] as usize,
    );
    (lo, &pattern.row_idx()[lo..hi])
}

/// Per-column row lists (any order, repeats allowed) to sorted CSC arrays.
fn compress(mut cols: Vec<Vec<u32>>) -> (Vec<u32>, Vec<u32>) {
    let mut col_ptr = Vec::with_capacity(cols.len() + 1);
    let mut row_idx = Vec::new();
    col_ptr.push(0);
    for c in &mut cols {
        c.sort_unstable();
        c.dedup();
        row_idx.extend_from_slice(c);
        col_ptr.push(row_idx.len() as u32);
        *c = Vec::new();
    }
    (col_ptr, row_idx)
}

/// Fills its buffer with one observation's row of `W`: `(index of u, value)` pairs.
pub(crate) type RowFn<'a> = dyn Fn(usize, &mut Vec<(usize, f64)>) + 'a;

impl SparseStats {
    /// `W'W` from the `n` observations' rows (`row(i, out)` fills `out` with observation
    /// `i`'s `(index of u, value)` pairs) and each class's `C_k = sum w_s w_s'` from the
    /// sites' `w_s`.
    pub fn new(
        plan: SparsePlan,
        (n, row): (usize, &RowFn),
        site_w: (&[usize], &[u32], &[f64]),
        site_class: &[usize],
        n_classes: usize,
    ) -> Self {
        let nnz = plan.nnz();
        let mut wtw = vec![0.0; nnz];
        let mut mapped: Vec<(u32, f64)> = Vec::new();
        let mut entries = Vec::new();
        for i in 0..n {
            row(i, &mut entries);
            mapped.clear();
            mapped.extend(entries.iter().map(|&(i, v)| (plan.pos[i], v)));
            for &(a, va) in &mapped {
                for &(b, vb) in &mapped {
                    if a <= b {
                        wtw[plan.entry(a, b)] += va * vb;
                    }
                }
            }
        }
        let (ptr, idx, val) = site_w;
        let mut by_class: Vec<Vec<usize>> = vec![Vec::new(); n_classes];
        for (s, &k) in site_class.iter().enumerate() {
            by_class[k].push(s);
        }
        let mut scratch = vec![0.0; nnz];
        let mut touched = vec![false; nnz];
        let mut list: Vec<u32> = Vec::new();
        let mut classes = Vec::with_capacity(n_classes);
        for sites in &by_class {
            for &s in sites {
                mapped.clear();
                mapped.extend((ptr[s]..ptr[s + 1]).map(|x| (plan.pos[idx[x] as usize], val[x])));
                for &(a, va) in &mapped {
                    for &(b, vb) in &mapped {
                        if a <= b {
                            let e = plan.entry(a, b);
                            scratch[e] += va * vb;
                            if !touched[e] {
                                touched[e] = true;
                                list.push(e as u32);
                            }
                        }
                    }
                }
            }
            list.sort_unstable();
            if list.len() as f64 >= EVERY_FROM_SHARE * nnz as f64 {
                classes.push(ClassValues::Every(scratch.clone()));
            } else {
                let val = list.iter().map(|&e| scratch[e as usize]).collect();
                classes.push(ClassValues::Some {
                    at: list.clone(),
                    val,
                });
            }
            for &e in &list {
                scratch[e as usize] = 0.0;
                touched[e as usize] = false;
            }
            list.clear();
        }
        SparseStats {
            plan: Arc::new(plan),
            wtw,
            classes,
        }
    }
}

/// The sizes `budget` counts for a sparse fit of some data, from its plan alone (no
/// values are computed).
pub(crate) struct Footprint {
    /// Entries of `M`'s pattern.
    pub nnz: usize,
    /// Values of the factor `L`.
    pub factor: usize,
    /// Pairs of the site cliques (the plan's temporary lists hold each, before removing
    /// repeats).
    pub pairs: usize,
    /// Bytes of one factorisation's and one solve's workspace.
    pub scratch: usize,
}

/// See [`Footprint`].
pub(crate) fn footprint(data: &Data) -> Option<Footprint> {
    let layout = Layout::new(data);
    let mut per_site: Vec<Vec<u32>> = vec![Vec::new(); data.n_sites()];
    for (i, &s) in data.site.iter().enumerate() {
        let clique = &mut per_site[s as usize];
        clique.push(data.year[i]);
        for (k, g) in data.groups.iter().enumerate() {
            clique.push((layout.group_offsets[k] + g[i] as usize) as u32);
        }
    }
    let mut ptr = vec![0];
    let mut idx = Vec::new();
    let mut pairs = 0;
    for mut clique in per_site {
        clique.sort_unstable();
        clique.dedup();
        let size = clique.len() + layout.p;
        pairs += size * size;
        idx.extend(clique);
        idx.extend((layout.fixed_offset..layout.q).map(|j| j as u32));
        ptr.push(idx.len());
    }
    let plan = SparsePlan::new(layout.q, layout.n_years, layout.fixed_offset, &ptr, &idx)?;
    Some(Footprint {
        nnz: plan.nnz(),
        factor: plan.factor_len(),
        pairs,
        scratch: plan.numeric_scratch.size_bytes() + plan.solve_scratch.size_bytes(),
    })
}
