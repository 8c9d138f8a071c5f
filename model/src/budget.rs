//! How much memory a fit will need, estimated from the data's shape and the sampler
//! settings before any of it is allocated, so that a caller can refuse a fit that would
//! not fit in memory with a figure instead of the process aborting half-way.
//!
//! The estimate counts the allocations that grow with the settings or the data: the
//! sufficient statistics (dense in the `q` non-site parameters, one matrix per count
//! class; or, kept sparse, values on the pattern its plan computes here), each worker's
//! factorisation workspace, every chain's saved draws and warm-up
//! history, the assembled posterior (a second copy of the draws), and the summaries, where
//! every worker holds several copies of one quantity's draws at once. It leaves out the
//! data itself, which the caller already holds. It is an upper-leaning estimate, not an
//! accounting: `tests/memory_peak.rs` checks that it covers the peak a counting allocator
//! measures during `sample`, and is within twice it.

use crate::data::Data;
use crate::sampler::{effect_thinning, SamplerSettings};

/// Bytes of one `f64`.
const F64: u64 = 8;
/// A warm-up history entry is its own vector: its header plus the allocator's overhead.
const VEC_OVERHEAD: u64 = 24 + 16;
/// faer's matrix products (inside the sparse factorisation) keep one packing buffer per
/// thread that runs them, sized by the CPU's caches: 4 MiB here (heaptrack, on the
/// 2-core development machine). A sparse fit runs them on the calling thread (the point
/// fit that starts the chains) and on every worker.
const GEMM_PACKING_PER_THREAD: u64 = 4 << 20;
/// Copies of one scalar's draws that its summary holds at once: the chains, their split
/// halves, the flattened draws, their order, the sorted draws, the normal scores (and
/// their per-chain copies), the folded draws, their order and scores, and the tail
/// indicators. Counted from `diagnostics::diagnose_with`, with copies to spare;
/// `tests/memory_peak.rs` checks the total against a counting allocator.
const SUMMARY_COPIES: u64 = 14;

/// Estimated peak memory in bytes of `sample(data, _, settings, _, _)`.
///
/// Saturates at `u64::MAX` instead of overflowing, so any setting a user can write gives a
/// figure.
pub fn memory_estimate(data: &Data, settings: &SamplerSettings) -> u64 {
    let m = data.sd_names().len() as u64;
    let p = 1 + data.covariate_names().len() as u64;
    let n_sites = data.n_sites() as u64;
    let q = data.n_years() as u64
        + data
            .group_labels()
            .iter()
            .map(|l| l.len() as u64)
            .sum::<u64>()
        + p;
    let classes = count_classes(data) as u64;
    let chains = settings.chains as u64;
    let draws = settings.draws as u64;
    let warmup = settings.warmup.max(settings.warm_warmup) as u64;
    let (_, n_effect) = effect_thinning(settings.draws, settings.effect_draws);
    let n_effect = n_effect as u64;
    // The worker count `sample` uses: `threads`, or one per core when it is 0.
    let threads = match settings.threads {
        0 => std::thread::available_parallelism().map_or(1, |n| n.get() as u64),
        t => t as u64,
    }
    .clamp(1, chains.max(1));

    let sat = |terms: &[u64]| terms.iter().fold(0u64, |a, &t| a.saturating_add(t));
    let mul = |terms: &[u64]| terms.iter().fold(1u64, |a, &t| a.saturating_mul(t));

    // Sufficient statistics: W'W and one q x q matrix per count class, and the sparse
    // per-site rows (at most one entry per observation and parameter it touches). Kept
    // sparse, the matrices are values on M's pattern (a class at most on every entry,
    // with an index each) and each worker holds the values of M and of a few factors.
    let nnz_per_obs = 1 + data.group_labels().len() as u64 + p;
    let (matrices, workspace) = match settings
        .normal_equations
        .is_sparse_for(data)
        .then(|| crate::sparse::footprint(data))
        .flatten()
    {
        Some(f) => {
            let (nnz, factor, pairs) = (f.nnz as u64, f.factor as u64, f.pairs as u64);
            (
                sat(&[
                    mul(&[classes + 1, nnz, F64 + 4]),
                    mul(&[factor, 4]),
                    // The plan's pair lists (both triangles, grown by doubling).
                    mul(&[pairs, 4, 2]),
                ]),
                mul(&[
                    threads + 1,
                    sat(&[
                        mul(&[2, nnz, F64]),
                        mul(&[4, factor, F64]),
                        f.scratch as u64,
                        GEMM_PACKING_PER_THREAD,
                    ]),
                ]),
            )
        }
        // Each worker factorises q x q matrices (the matrix, its factor and a copy).
        None => (
            mul(&[classes + 1, q, q, F64]),
            mul(&[threads, 3, q, q, F64]),
        ),
    };
    let stats = sat(&[
        matrices,
        mul(&[data.n_obs() as u64, nnz_per_obs, F64 + 4]),
        mul(&[n_sites, 3, F64]),
    ]);
    // Per chain: saved variance and coefficient draws, thinned effect draws, warm-up
    // history of the log standard deviations.
    let per_chain = sat(&[
        mul(&[draws, m + p, F64]),
        mul(&[n_effect, n_sites + q, F64]),
        mul(&[warmup, sat(&[mul(&[m, F64]), VEC_OVERHEAD])]),
    ]);
    let chains_out = mul(&[chains, per_chain]);
    // Censored values: every chain, the target and its template hold their own copy of
    // the response part of the statistics (per class `e_k`, `W'y`, the site sums and
    // classes) and of each censored value's row, limit and current value.
    let censored = data.n_censored() as u64;
    let censored_copies = if censored == 0 {
        0
    } else {
        mul(&[
            chains + 2,
            sat(&[
                mul(&[classes + 2, q, F64]),
                mul(&[n_sites, 4, F64]),
                mul(&[censored, sat(&[mul(&[nnz_per_obs, F64 + 4]), 4 * F64])]),
            ]),
        ])
    };
    // Assembly copies the draws into the posterior; then every worker summarises one
    // scalar at a time, each holding several copies of that scalar's draws, beside one
    // shared table of normal scores per draw count.
    let assembled = sat(&[
        mul(&[chains, draws, m + p, F64]),
        mul(&[chains, n_effect, sat(&[n_sites, q, m, p, 2]), F64]),
    ]);
    let per_scalar = mul(&[chains, draws.max(n_effect), F64]);
    let summaries = sat(&[
        mul(&[threads, SUMMARY_COPIES, per_scalar]),
        mul(&[chains, sat(&[draws, n_effect]), F64]),
    ]);
    sat(&[
        stats,
        workspace,
        chains_out,
        censored_copies,
        assembled,
        summaries,
    ])
}

/// Distinct per-site observation counts (the count classes of the sufficient statistics).
fn count_classes(data: &Data) -> usize {
    let mut counts = vec![0usize; data.n_sites()];
    for &s in &data.site {
        counts[s as usize] += 1;
    }
    counts.sort_unstable();
    counts.dedup();
    counts.len()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::{sample, Controls, DataBuilder, Priors};

    fn network(sites: usize, years: i32, group_levels: usize) -> Data {
        let groups = if group_levels > 0 {
            vec!["basin".to_string()]
        } else {
            vec![]
        };
        let mut b = DataBuilder::new(vec![], groups);
        for s in 0..sites {
            for t in 0..years {
                let y = (s as f64 * 0.37).sin()
                    + (t as f64 * 1.3).cos()
                    + ((s * 7 + t as usize) % 5) as f64 * 0.1;
                let g = format!("g{}", s % group_levels.max(1));
                let g: Vec<&str> = if group_levels > 0 {
                    vec![g.as_str()]
                } else {
                    vec![]
                };
                b.push(&format!("site-{s}"), 2000 + t, &g, &[], y).unwrap();
            }
        }
        b.build().unwrap()
    }

    fn settings(chains: usize, draws: usize) -> SamplerSettings {
        SamplerSettings {
            chains,
            draws,
            warmup: 200,
            threads: 1,
            ..SamplerSettings::default()
        }
    }

    /// Bytes held by the vectors of a posterior: the part of the peak a fit cannot avoid.
    fn held(post: &crate::Posterior) -> u64 {
        let e = &post.effects;
        let floats = post.sd_draws.len()
            + post.coef_draws.len()
            + e.site.len()
            + e.year.len()
            + e.groups.iter().map(Vec::len).sum::<usize>()
            + e.sd.len()
            + e.coef.len();
        floats as u64 * F64
    }

    #[test]
    fn estimate_covers_the_posterior_it_describes() {
        let data = network(40, 8, 6);
        let s = settings(3, 600);
        let post = sample(&data, &Priors::default(), &s, None, Controls::default()).unwrap();
        let estimate = memory_estimate(&data, &s);
        let held = held(&post);
        assert!(
            estimate >= 2 * held,
            "estimate {estimate} < twice the posterior's {held} bytes"
        );
        assert!(
            estimate <= 20 * held,
            "estimate {estimate} far above the posterior's {held} bytes"
        );
    }

    #[test]
    fn estimate_grows_with_chains_draws_and_factor_levels() {
        let data = network(30, 6, 0);
        let small = memory_estimate(&data, &settings(2, 1000));
        let more_draws = memory_estimate(&data, &settings(2, 10_000));
        let more_chains = memory_estimate(&data, &settings(20, 1000));
        // Saved draws dominate: ten times the draws or chains is several times the bytes.
        assert!(more_draws > 4 * small, "{more_draws} vs {small}");
        assert!(more_chains > 4 * small, "{more_chains} vs {small}");
        // A factor with many levels makes the dense statistics quadratic in its levels.
        let few = memory_estimate(&network(400, 2, 10), &settings(2, 1000));
        let many = memory_estimate(&network(400, 2, 400), &settings(2, 1000));
        let q_few = 2 + 10 + 1;
        let q_many = 2 + 400 + 1;
        assert!(many - few >= ((q_many * q_many - q_few * q_few) * 8) as u64);
    }

    #[test]
    fn estimate_saturates_instead_of_overflowing() {
        let data = network(5, 3, 0);
        let s = SamplerSettings {
            chains: usize::MAX / 2,
            draws: usize::MAX / 2,
            warmup: usize::MAX / 2,
            effect_draws: 100,
            ..SamplerSettings::default()
        };
        assert_eq!(memory_estimate(&data, &s), u64::MAX);
    }
}
