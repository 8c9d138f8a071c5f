//! Exact identities of the collapsed computation, checked against dense direct
//! computation (an exact reference: no approximation is involved on either side).

use nalgebra::{DMatrix, DVector};
use tidemark_model::simulate::{simulate, NetworkSpec};
use tidemark_model::*;

fn small_spec() -> NetworkSpec {
    NetworkSpec {
        sites: 9,
        years: 6,
        missing: 0.25,
        covariates: 1,
        seed: 11,
        ..Default::default()
    }
}

/// A small crossed design with a covariate and one further grouping factor.
fn small_design() -> Data {
    let (rows, _) = tidemark_model::simulate::simulate_rows(&small_spec());
    let mut b = DataBuilder::new(vec!["x1".into()], vec!["crew".into()]);
    for (i, r) in rows.iter().enumerate() {
        let crew = ["north", "south", "east"][i % 3];
        b.push(
            &simulate::site_label(r.site),
            r.year,
            &[crew],
            &r.covariates,
            r.y + 0.1 * (i % 3) as f64,
        )
        .unwrap();
    }
    b.build().unwrap()
}

/// Dense design matrix `[Z_site, Z_year, Z_crew, 1, x]` in the conditional's order.
fn dense_design(
    data: &Data,
    rows: &[(String, i32, String, f64, f64)],
) -> (DMatrix<f64>, DVector<f64>) {
    let s_n = data.n_sites();
    let t_n = data.n_years();
    let g_n = data.group_labels()[0].len();
    let cols = s_n + t_n + g_n + 2;
    let mut h = DMatrix::zeros(rows.len(), cols);
    let mut y = DVector::zeros(rows.len());
    for (i, (site, year, crew, x, resp)) in rows.iter().enumerate() {
        let s = data.site_labels().iter().position(|l| l == site).unwrap();
        let t = data.year_labels().iter().position(|l| l == year).unwrap();
        let g = data.group_labels()[0]
            .iter()
            .position(|l| l == crew)
            .unwrap();
        h[(i, s)] = 1.0;
        h[(i, s_n + t)] = 1.0;
        h[(i, s_n + t_n + g)] = 1.0;
        h[(i, s_n + t_n + g_n)] = 1.0;
        h[(i, s_n + t_n + g_n + 1)] = *x;
        y[i] = *resp;
    }
    (h, y)
}

#[test]
fn conditional_of_location_parameters_equals_a_dense_solve() {
    let data = small_design();
    // Rebuild the raw rows in the same way as `small_design`.
    let (raw, _) = tidemark_model::simulate::simulate_rows(&small_spec());
    let rows: Vec<(String, i32, String, f64, f64)> = raw
        .iter()
        .enumerate()
        .map(|(i, r)| {
            let crew = ["north", "south", "east"][i % 3].to_string();
            (
                simulate::site_label(r.site),
                r.year,
                crew,
                r.covariates[0],
                r.y + 0.1 * (i % 3) as f64,
            )
        })
        .collect();
    let (h, y) = dense_design(&data, &rows);
    let sds = [0.35, 0.7, 0.45, 0.2];
    let priors = Priors {
        intercept: Some(NormalPrior { mean: 1.0, sd: 3.0 }),
        coefficients: Some(NormalPrior { mean: 0.2, sd: 0.5 }),
        ..Default::default()
    };

    // Prior of (intercept, slope) in original units. The documented convention: the
    // intercept prior is on the mean at the covariate's average, the coefficient prior on
    // the standardised covariate (population sd). So theta_std = Tinv beta_orig with
    // Tinv = [[1, mean_x], [0, sd_x]].
    let xs: Vec<f64> = rows.iter().map(|r| r.3).collect();
    let n = xs.len() as f64;
    let mean_x = xs.iter().sum::<f64>() / n;
    let sd_x = (xs.iter().map(|x| (x - mean_x).powi(2)).sum::<f64>() / n).sqrt();
    let tinv = DMatrix::from_row_slice(2, 2, &[1.0, mean_x, 0.0, sd_x]);
    let prec_std = DMatrix::from_diagonal(&DVector::from_vec(vec![1.0 / 9.0, 1.0 / 0.25]));
    let prec_beta = tinv.transpose() * &prec_std * &tinv;
    let mean_beta = tinv.clone().try_inverse().unwrap() * DVector::from_vec(vec![1.0, 0.2]);

    let (s_n, t_n, g_n) = (data.n_sites(), data.n_years(), data.group_labels()[0].len());
    let dim = s_n + t_n + g_n + 2;
    let lambda = 1.0 / (sds[0] * sds[0]);
    let mut q = h.transpose() * &h * lambda;
    for i in 0..s_n {
        q[(i, i)] += 1.0 / (sds[1] * sds[1]);
    }
    for i in s_n..s_n + t_n {
        q[(i, i)] += 1.0 / (sds[2] * sds[2]);
    }
    for i in s_n + t_n..s_n + t_n + g_n {
        q[(i, i)] += 1.0 / (sds[3] * sds[3]);
    }
    let b0 = s_n + t_n + g_n;
    let mut rhs = h.transpose() * &y * lambda;
    for i in 0..2 {
        for j in 0..2 {
            q[(b0 + i, b0 + j)] += prec_beta[(i, j)];
        }
    }
    let prior_term = &prec_beta * &mean_beta;
    rhs[b0] += prior_term[0];
    rhs[b0 + 1] += prior_term[1];
    let cov = q.clone().try_inverse().unwrap();
    let mean = &cov * rhs;

    // Both storages of the reduced system must give the same exact conditional.
    for normal in [NormalEquations::Dense, NormalEquations::Sparse] {
        let cond = location_conditional(&data, &priors, &sds, normal).unwrap();
        assert_eq!(cond.mean.len(), dim);
        let scale_mean = mean.amax();
        for i in 0..dim {
            assert!(
                (cond.mean[i] - mean[i]).abs() < 1e-9 * scale_mean,
                "mean[{i}]: {} vs {}",
                cond.mean[i],
                mean[i]
            );
        }
        let scale_cov = cov.amax();
        for i in 0..dim {
            for j in 0..dim {
                assert!(
                    (cond.cov[(i, j)] - cov[(i, j)]).abs() < 1e-9 * scale_cov,
                    "{normal:?} cov[{i},{j}]: {} vs {}",
                    cond.cov[(i, j)],
                    cov[(i, j)]
                );
            }
        }
    }
}

/// The −2 REML log-likelihood from the Schur complement equals the dense formula
/// `log|V| + log|X'V^-1 X| + r'V^-1 r + (n-p) log 2pi` (docs/architecture.md,
/// "Parameterisation") at the estimate, with the reduced system stored dense and sparse.
#[test]
fn neg2_reml_loglik_equals_the_dense_formula() {
    let spec = NetworkSpec {
        sites: 12,
        years: 7,
        visits: 1,
        missing: 0.2,
        covariates: 2,
        seed: 3,
        ..Default::default()
    };
    let (data, _) = simulate(&spec);
    for normal in [NormalEquations::Dense, NormalEquations::Sparse] {
        let fit = fit_point_using(&data, Method::Reml, normal).unwrap();
        let (rows, _) = tidemark_model::simulate::simulate_rows(&spec);
        let n = rows.len();
        let sd = |name: &str| fit.sd_of(name).unwrap();
        let mut v = DMatrix::from_diagonal_element(n, n, sd("residual").powi(2));
        for i in 0..n {
            for j in 0..n {
                if rows[i].site == rows[j].site {
                    v[(i, j)] += sd("site").powi(2);
                }
                if rows[i].year == rows[j].year {
                    v[(i, j)] += sd("year").powi(2);
                }
            }
        }
        let x = DMatrix::from_fn(n, 3, |i, j| {
            if j == 0 {
                1.0
            } else {
                rows[i].covariates[j - 1]
            }
        });
        let y = DVector::from_fn(n, |i, _| rows[i].y);
        let chol = v.clone().cholesky().unwrap();
        let vinv = chol.inverse();
        let xtvx = x.transpose() * &vinv * &x;
        let beta = xtvx.clone().try_inverse().unwrap() * x.transpose() * &vinv * &y;
        let r = &y - &x * &beta;
        let log_det_v: f64 = chol.l().diagonal().iter().map(|d| 2.0 * d.ln()).sum();
        let crit = log_det_v
            + xtvx.determinant().ln()
            + (r.transpose() * &vinv * &r)[0]
            + (n as f64 - 3.0) * (2.0 * std::f64::consts::PI).ln();
        assert!(
            (fit.criterion - crit).abs() < 1e-8 * crit.abs(),
            "{} vs {crit}",
            fit.criterion
        );
        let cov = xtvx.try_inverse().unwrap();
        for j in 0..3 {
            assert!((fit.coef[j].estimate - beta[j]).abs() < 1e-8 * beta[j].abs().max(1.0));
            assert!((fit.coef[j].se - cov[(j, j)].sqrt()).abs() < 1e-7 * cov[(j, j)].sqrt());
        }
    }
}
