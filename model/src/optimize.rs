//! A small box-constrained quasi-Newton minimiser (BFGS, Nocedal & Wright 2006, Alg. 6.1)
//! with central-difference gradients, and a finite-difference Hessian.
//!
//! The objectives here have at most a handful of parameters (log standard deviations) and
//! cost microseconds each, so numerical derivatives are cheap and keep every objective a
//! single function. Bounds are handled by projection; a coordinate pinned at a bound
//! (a variance estimated at zero) is reported as such.

pub(crate) struct Minimum {
    pub x: Vec<f64>,
    pub value: f64,
    pub iterations: usize,
    pub converged: bool,
}

fn project(x: &mut [f64], lower: &[f64], upper: &[f64]) {
    for ((v, &lo), &hi) in x.iter_mut().zip(lower).zip(upper) {
        *v = v.clamp(lo, hi);
    }
}

/// Central differences, one-sided where a step would leave the box.
pub(crate) fn gradient(
    f: &dyn Fn(&[f64]) -> f64,
    x: &[f64],
    h: f64,
    lower: &[f64],
    upper: &[f64],
) -> Vec<f64> {
    let mut g = vec![0.0; x.len()];
    let mut xp = x.to_vec();
    let f0 = f(x);
    for i in 0..x.len() {
        let up = x[i] + h <= upper[i];
        let down = x[i] - h >= lower[i];
        let fp = if up {
            xp[i] = x[i] + h;
            f(&xp)
        } else {
            f0
        };
        let fm = if down {
            xp[i] = x[i] - h;
            f(&xp)
        } else {
            f0
        };
        xp[i] = x[i];
        let width = if up && down { 2.0 * h } else { h };
        g[i] = (fp - fm) / width;
    }
    g
}

pub(crate) fn hessian(f: &dyn Fn(&[f64]) -> f64, x: &[f64], h: f64) -> nalgebra::DMatrix<f64> {
    let n = x.len();
    let f0 = f(x);
    let mut hm = nalgebra::DMatrix::zeros(n, n);
    let mut xp = x.to_vec();
    for i in 0..n {
        for j in 0..=i {
            let v = if i == j {
                xp[i] = x[i] + h;
                let fp = f(&xp);
                xp[i] = x[i] - h;
                let fm = f(&xp);
                xp[i] = x[i];
                (fp - 2.0 * f0 + fm) / (h * h)
            } else {
                let mut e = |di: f64, dj: f64| {
                    xp[i] = x[i] + di;
                    xp[j] = x[j] + dj;
                    let v = f(&xp);
                    xp[i] = x[i];
                    xp[j] = x[j];
                    v
                };
                (e(h, h) - e(h, -h) - e(-h, h) + e(-h, -h)) / (4.0 * h * h)
            };
            hm[(i, j)] = v;
            hm[(j, i)] = v;
        }
    }
    hm
}

/// Minimise `f` within `[lower, upper]` from `x0`.
pub(crate) fn minimise(
    f: &dyn Fn(&[f64]) -> f64,
    x0: &[f64],
    lower: &[f64],
    upper: &[f64],
    tol: f64,
    max_iter: usize,
) -> Minimum {
    let n = x0.len();
    let h = 1e-5;
    let mut x = x0.to_vec();
    project(&mut x, lower, upper);
    let mut fx = f(&x);
    let mut g = gradient(f, &x, h, lower, upper);
    let mut hinv = nalgebra::DMatrix::<f64>::identity(n, n);
    let mut converged = false;
    let mut iterations = 0;
    for it in 0..max_iter {
        iterations = it + 1;
        // Coordinates held at a bound with the gradient pushing outward are frozen.
        let free: Vec<bool> = (0..n)
            .map(|i| !((x[i] <= lower[i] && g[i] > 0.0) || (x[i] >= upper[i] && g[i] < 0.0)))
            .collect();
        let gnorm = (0..n)
            .filter(|&i| free[i])
            .map(|i| g[i].abs())
            .fold(0.0, f64::max);
        if gnorm < tol {
            converged = true;
            break;
        }
        let gv = nalgebra::DVector::from_fn(n, |i, _| if free[i] { g[i] } else { 0.0 });
        let mut dir = -(&hinv * &gv);
        for i in 0..n {
            if !free[i] {
                dir[i] = 0.0;
            }
        }
        if dir.dot(&gv) >= 0.0 {
            hinv = nalgebra::DMatrix::identity(n, n);
            dir = -gv.clone();
        }
        // Backtracking line search with the Armijo condition on the projected step.
        let mut step = 1.0;
        let mut accepted = None;
        for _ in 0..60 {
            let mut xn: Vec<f64> = (0..n).map(|i| x[i] + step * dir[i]).collect();
            project(&mut xn, lower, upper);
            let fnew = f(&xn);
            let decrease: f64 = (0..n).map(|i| g[i] * (xn[i] - x[i])).sum();
            if fnew.is_finite() && fnew <= fx + 1e-4 * decrease {
                accepted = Some((xn, fnew));
                break;
            }
            step *= 0.5;
        }
        let Some((xn, fnew)) = accepted else {
            // No descent possible at this resolution: we are at the minimum up to noise.
            converged = gnorm < tol * 1e3;
            break;
        };
        let gn = gradient(f, &xn, h, lower, upper);
        let s = nalgebra::DVector::from_fn(n, |i, _| xn[i] - x[i]);
        let yv = nalgebra::DVector::from_fn(n, |i, _| gn[i] - g[i]);
        let sy = s.dot(&yv);
        if sy > 1e-12 {
            let rho = 1.0 / sy;
            let id = nalgebra::DMatrix::<f64>::identity(n, n);
            let a = &id - rho * &s * yv.transpose();
            let b = &id - rho * &yv * s.transpose();
            hinv = &a * &hinv * &b + rho * &s * s.transpose();
        }
        let small_change = (fx - fnew).abs() < 1e-14 * fx.abs().max(1.0);
        x = xn;
        fx = fnew;
        g = gn;
        if small_change && s.amax() < 1e-10 {
            converged = true;
            break;
        }
    }
    Minimum {
        x,
        value: fx,
        iterations,
        converged,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn finds_the_minimum_of_a_rosenbrock_valley_and_respects_bounds() {
        let f = |x: &[f64]| (1.0 - x[0]).powi(2) + 100.0 * (x[1] - x[0] * x[0]).powi(2);
        let m = minimise(&f, &[-1.2, 1.0], &[-5.0, -5.0], &[5.0, 5.0], 1e-8, 500);
        assert!(m.converged);
        assert!(
            (m.x[0] - 1.0).abs() < 1e-5 && (m.x[1] - 1.0).abs() < 1e-5,
            "{:?}",
            m.x
        );
        let m = minimise(&f, &[-1.2, 1.0], &[-5.0, -5.0], &[0.5, 5.0], 1e-8, 500);
        assert!(
            (m.x[0] - 0.5).abs() < 1e-12 && (m.x[1] - 0.25).abs() < 1e-5,
            "{:?}",
            m.x
        );
    }
}
