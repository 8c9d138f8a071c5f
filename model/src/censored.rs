//! Censored values, sampled exactly by data augmentation.
//!
//! A value known only to lie below (or above) a limit has the normal distribution
//! function (or survival function) at the limit as its likelihood. Each chain carries a
//! current value for every censored observation and alternates two exact steps:
//!
//! 1. given the completed data, the marginal Metropolis–Hastings step on the log standard
//!    deviations and the exact joint draw of every location parameter (`sampler`);
//! 2. given the location parameters and the standard deviations, each censored value
//!    drawn from its normal distribution truncated to its side of the limit — these are
//!    independent given the location parameters, so one sweep is an exact draw.
//!
//! Step 1 leaves `p(eta, location | y_observed, y_censored)` invariant (a kernel on `eta`
//! with that marginal as target, then an exact draw of the location given `eta`, which
//! ignores the old location), step 2 leaves `p(y_censored | eta, location, y_observed)`
//! invariant, so their cycle leaves the joint posterior of everything invariant and the
//! `(eta, location)` part of its draws is a draw of their posterior given what was
//! observed and censored (Tanner & Wong 1987, JASA 82, data augmentation; the censored
//! normal step as in Chib 1992, J. Econometrics 51, for the Tobit model).
//!
//! The design part of the sufficient statistics does not depend on the response, so a
//! move of the censored values only updates `W'y`, `y'y`, the site sums and the count
//! classes' `e_k`, `f_k`: O(censored values) per sweep, not O(observations). The chain's
//! cached log density depends on them, so it is evaluated again after every sweep
//! (`Target::rescore`).
//!
//! Start points and the data-scaled default priors need complete data: they read the
//! limits as provisional values, and nothing else does.

use crate::data::{Censoring, Data};
use crate::marginal::Factorised;
use crate::stats::{design_row, SuffStats};
use rand::Rng;
use rand_distr::{Exp1, StandardNormal};

/// One draw of `z ~ N(0, 1)` conditioned on `z > a`.
///
/// For `a < 0` plain rejection from the normal (acceptance above one half); for `a >= 0`
/// rejection from a shifted exponential with the optimal rate (Robert 1995, "Simulation
/// of truncated normal variables", Statistics and Computing 5), whose acceptance rate
/// stays above 0.76 however far in the tail `a` is.
pub(crate) fn normal_above<R: Rng + ?Sized>(a: f64, rng: &mut R) -> f64 {
    if a < 0.0 {
        loop {
            let z: f64 = rng.sample(StandardNormal);
            if z > a {
                return z;
            }
        }
    }
    let rate = 0.5 * (a + (a * a + 4.0).sqrt());
    loop {
        let e: f64 = rng.sample(Exp1);
        let z = a + e / rate;
        let accept = (-0.5 * (z - rate) * (z - rate)).exp();
        if rng.gen::<f64>() < accept {
            return z;
        }
    }
}

/// The censored values of one chain and the chain's own copy of the statistics they
/// move.
#[derive(Debug, Clone)]
pub(crate) struct Augmented {
    pub stats: SuffStats,
    site: Vec<u32>,
    side: Vec<Censoring>,
    /// Limits, centred like the response.
    limit: Vec<f64>,
    /// Current values, centred.
    value: Vec<f64>,
    /// Row `j` of `W`: entries `row_idx[row_ptr[j]..row_ptr[j + 1]]`.
    row_ptr: Vec<usize>,
    row_idx: Vec<u32>,
    row_val: Vec<f64>,
    /// Distinct sites with a censored value, and per site a scratch sum of moves.
    sites: Vec<u32>,
    site_move: Vec<f64>,
    site_effect: Vec<f64>,
}

impl Augmented {
    /// `None` when `data` has no censored value.
    pub fn new(data: &Data, stats: &SuffStats) -> Option<Augmented> {
        if data.censored.is_empty() {
            return None;
        }
        let n = data.censored.len();
        let mut aug = Augmented {
            stats: stats.clone(),
            site: Vec::with_capacity(n),
            side: Vec::with_capacity(n),
            limit: Vec::with_capacity(n),
            value: Vec::with_capacity(n),
            row_ptr: vec![0],
            row_idx: Vec::new(),
            row_val: Vec::new(),
            sites: Vec::new(),
            site_move: vec![0.0; stats.n_sites],
            site_effect: vec![0.0; stats.n_sites],
        };
        let mut entries = Vec::new();
        for &(row, side) in &data.censored {
            let i = row as usize;
            let centred = data.response[i] - stats.y_mean;
            aug.site.push(data.site[i]);
            aug.side.push(side);
            aug.limit.push(centred);
            aug.value.push(centred);
            design_row(
                data,
                &stats.layout,
                (&stats.cov_mean, &stats.cov_sd),
                i,
                &mut entries,
            );
            for &(a, v) in &entries {
                aug.row_idx.push(a as u32);
                aug.row_val.push(v);
            }
            aug.row_ptr.push(aug.row_idx.len());
            aug.sites.push(data.site[i]);
        }
        aug.sites.sort_unstable();
        aug.sites.dedup();
        Some(aug)
    }

    /// Draw every censored value from its truncated normal given the location
    /// parameters `u` and the site effects, and update the statistics by the moves.
    /// `sites`, when given, holds every site effect already drawn with this `u`;
    /// otherwise the site effects of the censored values' sites are drawn here.
    pub fn sweep<R: Rng + ?Sized>(
        &mut self,
        fac: &Factorised,
        u: &[f64],
        sites: Option<&[f64]>,
        rng: &mut R,
    ) {
        let stats = &mut self.stats;
        for &s in &self.sites {
            let s = s as usize;
            self.site_effect[s] = match sites {
                Some(all) => all[s],
                None => fac.draw_site(stats, s, u, rng),
            };
        }
        let sd = fac.sds[0];
        for j in 0..self.value.len() {
            let (lo, hi) = (self.row_ptr[j], self.row_ptr[j + 1]);
            let s = self.site[j] as usize;
            let mut mean = self.site_effect[s];
            for x in lo..hi {
                mean += self.row_val[x] * u[self.row_idx[x] as usize];
            }
            let bound = (self.limit[j] - mean) / sd;
            let z = match self.side[j] {
                Censoring::Below => -normal_above(-bound, rng),
                Censoring::Above => normal_above(bound, rng),
            };
            let new = mean + sd * z;
            let old = self.value[j];
            let delta = new - old;
            self.value[j] = new;
            stats.yty += new * new - old * old;
            for x in lo..hi {
                stats.wty[self.row_idx[x] as usize] += self.row_val[x] * delta;
            }
            self.site_move[s] += delta;
        }
        for &s in &self.sites {
            let s = s as usize;
            let delta = std::mem::take(&mut self.site_move[s]);
            let old = stats.site_ysum[s];
            let new = old + delta;
            stats.site_ysum[s] = new;
            let class = &mut stats.classes[stats.site_class[s]];
            class.f += new * new - old * old;
            for x in stats.site_w_ptr[s]..stats.site_w_ptr[s + 1] {
                class.e[stats.site_w_idx[x] as usize] += stats.site_w_val[x] * delta;
            }
        }
    }

    /// Current values on the model scale (for tests).
    #[cfg(test)]
    pub fn values(&self) -> Vec<f64> {
        self.value.iter().map(|v| v + self.stats.y_mean).collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::data::DataBuilder;
    use crate::marginal::Factorised;
    use crate::normal::norm_cdf;
    use crate::stats::NormalEquations;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    /// Kolmogorov–Smirnov distance of draws of `normal_above(a)` against the exact
    /// truncated distribution function, `(Phi(z) - Phi(a)) / (1 - Phi(a))`.
    fn ks_distance(a: f64, n: usize) -> f64 {
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let mut z: Vec<f64> = (0..n).map(|_| normal_above(a, &mut rng)).collect();
        z.sort_by(f64::total_cmp);
        let tail = 1.0 - norm_cdf(a);
        z.iter()
            .enumerate()
            .map(|(i, &x)| {
                let f = if a > 5.0 {
                    // Far in the tail: the ratio of survival functions keeps precision.
                    1.0 - (1.0 - norm_cdf(x)) / tail
                } else {
                    (norm_cdf(x) - norm_cdf(a)) / tail
                };
                let lo = i as f64 / n as f64;
                let hi = (i + 1) as f64 / n as f64;
                (f - lo).abs().max((hi - f).abs())
            })
            .fold(0.0, f64::max)
    }

    #[test]
    fn truncated_normal_draws_follow_the_exact_distribution_in_body_and_tails() {
        // 1% critical value of the KS statistic at n = 20000: 1.63 / sqrt(n) = 0.0115.
        for a in [-3.0, -0.5, 0.0, 0.3, 1.5, 4.0, 9.0] {
            let d = ks_distance(a, 20_000);
            assert!(d < 0.0115, "a = {a}: KS distance {d}");
            let mut rng = ChaCha8Rng::seed_from_u64(1);
            assert!((0..1000).all(|_| normal_above(a, &mut rng) > a));
        }
    }

    #[test]
    fn a_sweep_keeps_the_statistics_equal_to_a_fresh_pass_over_the_moved_values() {
        sweep_matches_a_fresh_pass(false, NormalEquations::Dense);
    }

    /// The same with a further grouping factor (crossed with site and year) on the
    /// sparse reduced system: the group levels are entries of every censored row of `W`.
    #[test]
    fn a_sweep_keeps_the_statistics_right_with_a_grouping_factor_on_the_sparse_path() {
        sweep_matches_a_fresh_pass(true, NormalEquations::Sparse);
    }

    fn sweep_matches_a_fresh_pass(grouped: bool, normal: NormalEquations) {
        let groups = if grouped { vec!["crew".into()] } else { vec![] };
        let mut b = DataBuilder::new(vec!["depth".into()], groups);
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let mut rows = Vec::new();
        for s in 0..9 {
            for t in 0..6 {
                for v in 0..(1 + (s + t) % 3) {
                    let x = (s * 7 + t * 3 + v) as f64 % 5.0;
                    let y = 0.4 * s as f64 - 0.2 * t as f64
                        + 0.1 * x
                        + rng.sample::<f64, _>(StandardNormal);
                    rows.push((s, t, x, y));
                }
            }
        }
        let limit = 0.3;
        for (i, &(s, t, x, y)) in rows.iter().enumerate() {
            let site = format!("s{s}");
            let crew = format!("c{}", (i * 7 + s as usize) % 4);
            let g: Vec<&str> = if grouped { vec![crew.as_str()] } else { vec![] };
            if y < limit {
                b.push_censored(&site, 2000 + t, &g, &[x], Censoring::Below, limit)
                    .unwrap();
            } else if y > 2.5 {
                b.push_censored(&site, 2000 + t, &g, &[x], Censoring::Above, 2.5)
                    .unwrap();
            } else {
                b.push(&site, 2000 + t, &g, &[x], y).unwrap();
            }
        }
        let data = b.build().unwrap();
        assert!(data.n_censored() > 10);
        let stats = SuffStats::new(&data, normal).unwrap();
        let mut aug = Augmented::new(&data, &stats).unwrap();
        let sds: &[f64] = if grouped {
            &[0.8, 0.5, 0.3, 0.4]
        } else {
            &[0.8, 0.5, 0.3]
        };
        let fac = Factorised::new(&stats, sds, None).unwrap();
        for _ in 0..50 {
            let u = fac.draw_u(&mut rng);
            aug.sweep(&fac, u.as_slice(), None, &mut rng);
        }
        let values = aug.values();
        for (j, &(row, side)) in data.censored.iter().enumerate() {
            let v = values[j];
            match side {
                Censoring::Below => assert!(v < data.response[row as usize]),
                Censoring::Above => assert!(v > data.response[row as usize]),
            }
        }
        // The same data with the current values in place of the limits.
        let mut moved = data.clone();
        for (j, &(row, _)) in data.censored.iter().enumerate() {
            moved.response[row as usize] = values[j];
        }
        let fresh = SuffStats::new(&moved, normal).unwrap();
        // Fresh statistics centre at the new mean; shift them to the chain's centring.
        let shift = fresh.y_mean - stats.y_mean;
        let close = |a: f64, b: f64| (a - b).abs() <= 1e-9 * (1.0 + a.abs().max(b.abs()));
        let n = data.n_obs() as f64;
        let sum_now = n * shift; // sum of the chain's centred values
        let yty = fresh.yty + 2.0 * shift * sum_now - n * shift * shift;
        assert!(close(aug.stats.yty, yty), "{} vs {}", aug.stats.yty, yty);
        for s in 0..stats.n_sites {
            let n_s = stats.classes[stats.site_class[s]].n;
            assert!(close(
                aug.stats.site_ysum[s],
                fresh.site_ysum[s] + n_s * shift
            ));
        }
        // W'y at the chain's centring: the fresh one plus the shift times W's column
        // sums (the sums of the sites' rows w_s).
        let mut column_sums = vec![0.0; stats.layout.q];
        for x in 0..stats.site_w_idx.len() {
            column_sums[stats.site_w_idx[x] as usize] += stats.site_w_val[x];
        }
        for (a, sum) in column_sums.iter().enumerate() {
            let want = fresh.wty[a] + shift * sum;
            assert!(close(aug.stats.wty[a], want), "W'y[{a}]");
        }
        for (k, class) in aug.stats.classes.iter().enumerate() {
            let f: f64 = (0..stats.n_sites)
                .filter(|&s| stats.site_class[s] == k)
                .map(|s| aug.stats.site_ysum[s].powi(2))
                .sum();
            assert!(close(class.f, f), "f of class {k}");
            let mut e = vec![0.0; stats.layout.q];
            for s in (0..stats.n_sites).filter(|&s| stats.site_class[s] == k) {
                for x in stats.site_w_ptr[s]..stats.site_w_ptr[s + 1] {
                    e[stats.site_w_idx[x] as usize] += stats.site_w_val[x] * aug.stats.site_ysum[s];
                }
            }
            for (a, want) in e.iter().enumerate() {
                assert!(close(class.e[a], *want), "e of class {k}, entry {a}");
            }
        }
    }
}
