//! Convergence diagnostics of Vehtari, Gelman, Simpson, Carpenter & Bürkner (2021,
//! Bayesian Analysis 16(2), "Rank-normalization, folding, and localization: an improved
//! R-hat for assessing convergence of MCMC"): rank-normalised split R-hat (the maximum of
//! the bulk and the folded/tail versions), bulk-ESS and tail-ESS.
//!
//! The autocorrelation estimator follows Geyer's (1992) initial monotone sequence as in
//! the paper's reference implementation; the numbers agree with ArviZ (checked in
//! `tests/reference_diagnostics.rs`, including chains too short or too antithetic for
//! Geyer's sequence to add any pair of lags).

use crate::normal::inverse_normal;

/// Diagnostics of one scalar quantity.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Diagnostic {
    pub rhat: f64,
    pub ess_bulk: f64,
    pub ess_tail: f64,
}

/// Split each chain in two halves (the middle draw of an odd-length chain is dropped).
fn split_chains(chains: &[&[f64]]) -> Vec<Vec<f64>> {
    let mut out = Vec::with_capacity(2 * chains.len());
    for c in chains {
        let half = c.len() / 2;
        out.push(c[..half].to_vec());
        out.push(c[c.len() - half..].to_vec());
    }
    out
}

/// Normal scores `Phi^-1((r - 3/8) / (S + 1/4))` (Blom 1958) for every possible average
/// rank `r` (a multiple of 1/2) of `S` pooled draws. The inverse normal CDF dominates the
/// cost of diagnosing thousands of random effects; every quantity of a fit has the same
/// `S`, so one table serves them all.
pub(crate) struct ZTable {
    total: usize,
    by_twice_rank: Vec<f64>,
}

impl ZTable {
    pub(crate) fn new(total: usize) -> Self {
        // Ranks start at 1, so entries 0 and 1 are never read.
        let by_twice_rank = (0..=2 * total)
            .map(|k| {
                if k < 2 {
                    f64::NAN
                } else {
                    inverse_normal((k as f64 / 2.0 - 0.375) / (total as f64 + 0.25))
                }
            })
            .collect();
        ZTable {
            total,
            by_twice_rank,
        }
    }
}

/// Normal scores of pooled values given their ascending order (`order[k]` is the flat
/// index of the k-th smallest); ties share their average rank. Output has chain shapes.
fn z_from_order(
    values: &[f64],
    order: &[usize],
    chain_len: usize,
    table: &ZTable,
) -> Vec<Vec<f64>> {
    let total = values.len();
    debug_assert_eq!(table.total, total);
    let mut z = vec![0.0; total];
    let mut i = 0;
    while i < total {
        let mut j = i;
        while j + 1 < total && values[order[j + 1]] == values[order[i]] {
            j += 1;
        }
        // Average 1-based rank of the run i..=j, doubled to stay an integer.
        let twice_rank = i + j + 2;
        for &k in &order[i..=j] {
            z[k] = table.by_twice_rank[twice_rank];
        }
        i = j + 1;
    }
    z.chunks(chain_len).map(|c| c.to_vec()).collect()
}

fn mean(x: &[f64]) -> f64 {
    x.iter().sum::<f64>() / x.len() as f64
}

fn var(x: &[f64], ddof: f64) -> f64 {
    let m = mean(x);
    x.iter().map(|v| (v - m).powi(2)).sum::<f64>() / (x.len() as f64 - ddof)
}

/// Classic R-hat of Gelman et al. (2013, BDA3) on the chains as given.
fn rhat_basic(chains: &[Vec<f64>]) -> f64 {
    let n = chains[0].len() as f64;
    let means: Vec<f64> = chains.iter().map(|c| mean(c)).collect();
    let within = chains.iter().map(|c| var(c, 1.0)).sum::<f64>() / chains.len() as f64;
    let between = n * var(&means, 1.0);
    ((between / within + n - 1.0) / n).sqrt()
}

/// Effective sample size of the chains as given (all of equal length, at least one draw).
///
/// Two degenerate inputs get the values ArviZ gives them (checked in
/// `tests/reference_diagnostics.rs`): all draws equal, `N` (the draws carry no
/// autocorrelation to estimate; only indicator chains of tied draws reach this, since
/// [`diagnose_with`] answers NaN for a constant quantity); and no pair of lags for
/// Geyer's initial positive sequence (at most 4 draws per chain, or the first pair sum
/// `rho_1 + rho_2` already <= 0, as in a perfectly alternating chain). The sum of
/// autocorrelations is then `rho_0` alone, the autocorrelation time `-1 + rho_0 = 0`, and
/// its usual floor `1 / log10 N` gives `ESS = N log10 N`, the cap every estimate is held
/// to. That is the right direction for antithetic draws; for chains this short it is a
/// bound, not an estimate (the sampler saves at least 10 draws per chain, so a gated
/// quantity reaches it only through antithetic draws).
pub(crate) fn ess_basic(chains: &[Vec<f64>]) -> f64 {
    let m = chains.len();
    let n = chains[0].len();
    let total = (m * n) as f64;
    if n < 2 {
        return f64::NAN;
    }
    let (lo, hi) = chains
        .iter()
        .flatten()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &v| {
            (lo.min(v), hi.max(v))
        });
    if hi - lo < 1e-15 {
        return total;
    }
    let centred: Vec<Vec<f64>> = chains
        .iter()
        .map(|c| {
            let mu = mean(c);
            c.iter().map(|v| v - mu).collect()
        })
        .collect();
    // Mean over chains of the biased autocovariance at lag t, computed on demand: a
    // well-mixed chain needs only a few lags.
    let acov = |t: usize| -> f64 {
        centred
            .iter()
            .map(|c| {
                c[..n - t]
                    .iter()
                    .zip(&c[t..])
                    .map(|(a, b)| a * b)
                    .sum::<f64>()
                    / n as f64
            })
            .sum::<f64>()
            / m as f64
    };
    let nf = n as f64;
    let acov0 = acov(0);
    let mean_var = acov0 * nf / (nf - 1.0);
    let mut var_plus = mean_var * (nf - 1.0) / nf;
    if m > 1 {
        let means: Vec<f64> = chains.iter().map(|c| mean(c)).collect();
        var_plus += var(&means, 1.0);
    }
    if var_plus.is_nan() || var_plus <= 0.0 || !var_plus.is_finite() {
        return f64::NAN;
    }
    let mut rho = vec![0.0; n];
    rho[0] = 1.0;
    let mut rho_even;
    let mut rho_odd = 1.0 - (mean_var - acov(1)) / var_plus;
    rho[1] = rho_odd;
    rho_even = 1.0;
    let mut t = 1;
    while t + 3 < n && rho_even + rho_odd > 0.0 {
        rho_even = 1.0 - (mean_var - acov(t + 1)) / var_plus;
        rho_odd = 1.0 - (mean_var - acov(t + 2)) / var_plus;
        if rho_even + rho_odd >= 0.0 {
            rho[t + 1] = rho_even;
            rho[t + 2] = rho_odd;
        }
        t += 2;
    }
    let tau = if t == 1 {
        // No pair of lags was taken (see the doc comment): -1 + rho_0.
        0.0
    } else {
        let max_t = t - 2;
        if rho_even > 0.0 {
            rho[max_t + 1] = rho_even;
        }
        // Geyer's initial monotone sequence.
        let mut t = 1;
        while t + 2 <= max_t {
            if rho[t + 1] + rho[t + 2] > rho[t - 1] + rho[t] {
                rho[t + 1] = (rho[t - 1] + rho[t]) / 2.0;
                rho[t + 2] = rho[t + 1];
            }
            t += 2;
        }
        -1.0 + 2.0 * rho[..=max_t].iter().sum::<f64>() + rho[max_t + 1]
    };
    let tau = tau.max(1.0 / total.log10());
    total / tau
}

/// Sample quantile with linear interpolation (type 7 of Hyndman & Fan 1996).
pub(crate) fn quantile_sorted(sorted: &[f64], p: f64) -> f64 {
    let h = (sorted.len() - 1) as f64 * p;
    let lo = h.floor() as usize;
    let hi = (lo + 1).min(sorted.len() - 1);
    sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo])
}

fn ess_quantile(split: &[Vec<f64>], sorted: &[f64], p: f64) -> f64 {
    let q = quantile_sorted(sorted, p);
    let indicator: Vec<Vec<f64>> = split
        .iter()
        .map(|c| c.iter().map(|&v| if v <= q { 1.0 } else { 0.0 }).collect())
        .collect();
    ess_basic(&indicator)
}

/// Rank-normalised split R-hat, bulk-ESS and tail-ESS of one quantity, given per chain.
///
/// Every figure is NaN (not estimable; a gate must count it as failing) when there are no
/// chains, chains of unequal length, fewer than 4 draws per chain, or all draws equal.
/// Very short or antithetic chains get `ESS = N log10 N` (see `ess_basic`).
pub fn diagnose(chains: &[&[f64]]) -> Diagnostic {
    let half = chains.first().map_or(0, |c| c.len() / 2);
    diagnose_with(chains, &ZTable::new(2 * half * chains.len())).0
}

/// [`diagnose`] with a shared table of normal scores (for `S` = all split draws); also
/// returns all draws sorted ascending, which summaries reuse for quantiles.
///
/// One sort serves everything: the ranks of the draws come from it, and so do the ranks
/// of the folded draws `|x - median|`, by merging outward from the median.
pub(crate) fn diagnose_with(chains: &[&[f64]], table: &ZTable) -> (Diagnostic, Vec<f64>) {
    let nan = Diagnostic {
        rhat: f64::NAN,
        ess_bulk: f64::NAN,
        ess_tail: f64::NAN,
    };
    if chains.is_empty() || chains[0].len() < 4 || chains.iter().any(|c| c.len() != chains[0].len())
    {
        let mut all: Vec<f64> = chains.iter().flat_map(|c| c.iter().copied()).collect();
        all.sort_unstable_by(f64::total_cmp);
        return (nan, all);
    }
    let split = split_chains(chains);
    let chain_len = split[0].len();
    let flat: Vec<f64> = split.iter().flatten().copied().collect();
    let total = flat.len();
    let mut order: Vec<usize> = (0..total).collect();
    order.sort_unstable_by(|&a, &b| flat[a].total_cmp(&flat[b]));
    let sorted: Vec<f64> = order.iter().map(|&k| flat[k]).collect();
    if sorted[0] == sorted[total - 1] {
        let mut all: Vec<f64> = chains.iter().flat_map(|c| c.iter().copied()).collect();
        all.sort_unstable_by(f64::total_cmp);
        return (nan, all);
    }
    let z = z_from_order(&flat, &order, chain_len, table);
    let median = quantile_sorted(&sorted, 0.5);
    let folded: Vec<f64> = flat.iter().map(|v| (v - median).abs()).collect();
    // Ascending order of |x - median|: walk down from the median on the left, up on the
    // right, taking the nearer one each time.
    let split_at = sorted.partition_point(|&v| v < median);
    let (mut left, mut right) = (split_at, split_at);
    let mut folded_order = Vec::with_capacity(total);
    while folded_order.len() < total {
        let take_left = match (left > 0, right < total) {
            (true, true) => folded[order[left - 1]] <= folded[order[right]],
            (true, false) => true,
            _ => false,
        };
        if take_left {
            left -= 1;
            folded_order.push(order[left]);
        } else {
            folded_order.push(order[right]);
            right += 1;
        }
    }
    let z_folded = z_from_order(&folded, &folded_order, chain_len, table);
    let rhat_bulk = rhat_basic(&z);
    let rhat_tail = rhat_basic(&z_folded);
    let d = Diagnostic {
        rhat: rhat_bulk.max(rhat_tail),
        ess_bulk: ess_basic(&z),
        ess_tail: 0.0,
    };
    // The tail quantiles are those of all draws, the middle draw of odd-length chains
    // included (as in ArviZ); with even lengths the split draws are all the draws.
    let all = if chains[0].len().is_multiple_of(2) {
        sorted
    } else {
        let mut all: Vec<f64> = chains.iter().flat_map(|c| c.iter().copied()).collect();
        all.sort_unstable_by(f64::total_cmp);
        all
    };
    let ess_tail = ess_quantile(&split, &all, 0.05).min(ess_quantile(&split, &all, 0.95));
    (Diagnostic { ess_tail, ..d }, all)
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};

    /// Ranks by a plain sort of the values themselves (the textbook route).
    fn z_naive(chains: &[Vec<f64>], table: &ZTable) -> Vec<Vec<f64>> {
        let flat: Vec<f64> = chains.iter().flatten().copied().collect();
        let mut order: Vec<usize> = (0..flat.len()).collect();
        order.sort_by(|&a, &b| flat[a].total_cmp(&flat[b]));
        z_from_order(&flat, &order, chains[0].len(), table)
    }

    /// The merged order of folded draws gives the same R-hat as sorting them directly,
    /// including with ties (values on a coarse grid).
    #[test]
    fn folded_ranks_by_merging_equal_ranks_by_sorting() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
        for coarse in [false, true] {
            let chains: Vec<Vec<f64>> = (0..4)
                .map(|c| {
                    (0..101)
                        .map(|_| {
                            let v: f64 = rng.gen::<f64>() * 3.0 + c as f64 * 0.2;
                            if coarse {
                                (v * 4.0).round() / 4.0
                            } else {
                                v
                            }
                        })
                        .collect()
                })
                .collect();
            let refs: Vec<&[f64]> = chains.iter().map(|c| c.as_slice()).collect();
            let split = split_chains(&refs);
            let table = ZTable::new(split.iter().map(|c| c.len()).sum());
            let mut sorted: Vec<f64> = split.iter().flatten().copied().collect();
            sorted.sort_by(f64::total_cmp);
            let median = quantile_sorted(&sorted, 0.5);
            let folded: Vec<Vec<f64>> = split
                .iter()
                .map(|c| c.iter().map(|v| (v - median).abs()).collect())
                .collect();
            let expected =
                rhat_basic(&z_naive(&split, &table)).max(rhat_basic(&z_naive(&folded, &table)));
            let (got, _) = diagnose_with(&refs, &table);
            assert!(
                (got.rhat - expected).abs() < 1e-12,
                "coarse={coarse}: {} vs {expected}",
                got.rhat
            );
        }
    }
}
