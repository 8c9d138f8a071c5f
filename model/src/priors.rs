//! Prior distributions of the model and their weakly informative defaults.
//!
//! Standard deviations get half-normal, half-Student-t or exponential priors; the intercept
//! and the coefficients get normal priors. All scales are on the model scale of the
//! response (after its transform). Coefficient priors apply to *standardised* covariates
//! (the effect of one standard deviation of the covariate); the intercept prior applies
//! to the network mean at average covariate values. Defaults scale with the response's
//! standard deviation `sd_y` on the model scale, so the same defaults serve µg/L and
//! metres alike:
//!
//! - every standard deviation: half-normal with scale `2 sd_y`;
//! - intercept: normal with mean `mean_y` and sd `10 sd_y`;
//! - each standardised coefficient: normal with mean 0 and sd `2.5 sd_y`
//!   (the autoscaling habit of Gelman, Jakulin, Pittau & Su 2008 — common practice).

use crate::error::ModelError;
use serde::{Deserialize, Serialize};
use statrs::function::gamma::ln_gamma;

/// Prior on a standard deviation (support `sd > 0`).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum SdPrior {
    HalfNormal { scale: f64 },
    HalfStudentT { df: f64, scale: f64 },
    Exponential { rate: f64 },
}

impl SdPrior {
    /// Log density at `sd` (normalised).
    pub fn ln_pdf(&self, sd: f64) -> f64 {
        if sd <= 0.0 {
            return f64::NEG_INFINITY;
        }
        match *self {
            SdPrior::HalfNormal { scale } => {
                let z = sd / scale;
                std::f64::consts::LN_2
                    - 0.5 * (2.0 * std::f64::consts::PI).ln()
                    - scale.ln()
                    - 0.5 * z * z
            }
            SdPrior::HalfStudentT { df, scale } => {
                let z = sd / scale;
                std::f64::consts::LN_2 + ln_gamma(0.5 * (df + 1.0))
                    - ln_gamma(0.5 * df)
                    - 0.5 * (df * std::f64::consts::PI).ln()
                    - scale.ln()
                    - 0.5 * (df + 1.0) * (z * z / df).ln_1p()
            }
            SdPrior::Exponential { rate } => rate.ln() - rate * sd,
        }
    }

    /// Draw from the prior given a standard normal and a chi-square helper (used by SBC).
    pub fn sample<R: rand::Rng + ?Sized>(&self, rng: &mut R) -> f64 {
        use rand_distr::{Distribution, Exp, StandardNormal, StudentT};
        match *self {
            SdPrior::HalfNormal { scale } => {
                let z: f64 = StandardNormal.sample(rng);
                scale * z.abs()
            }
            SdPrior::HalfStudentT { df, scale } => {
                let t = StudentT::new(df).map(|d| d.sample(rng)).unwrap_or(0.0);
                scale * t.abs()
            }
            SdPrior::Exponential { rate } => Exp::new(rate).map(|d| d.sample(rng)).unwrap_or(0.0),
        }
    }

    fn validate(&self, target: &str) -> Result<(), ModelError> {
        let bad = |reason: &str| {
            Err(ModelError::InvalidPrior {
                target: target.to_string(),
                reason: reason.to_string(),
            })
        };
        match *self {
            SdPrior::HalfNormal { scale } if !(scale > 0.0 && scale.is_finite()) => {
                bad("half-normal scale must be a positive number")
            }
            SdPrior::HalfStudentT { df, scale }
                if !(df > 0.0 && df.is_finite() && scale > 0.0 && scale.is_finite()) =>
            {
                bad("half-Student-t needs positive df and scale")
            }
            SdPrior::Exponential { rate } if !(rate > 0.0 && rate.is_finite()) => {
                bad("exponential rate must be a positive number")
            }
            _ => Ok(()),
        }
    }
}

/// Normal prior on the intercept or on a standardised coefficient.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct NormalPrior {
    pub mean: f64,
    pub sd: f64,
}

impl NormalPrior {
    fn validate(&self, target: &str) -> Result<(), ModelError> {
        if self.mean.is_finite() && self.sd > 0.0 && self.sd.is_finite() {
            Ok(())
        } else {
            Err(ModelError::InvalidPrior {
                target: target.to_string(),
                reason: "normal prior needs a finite mean and a positive sd".into(),
            })
        }
    }
}

/// Priors as the user wrote them; `None` means "use the documented default".
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct Priors {
    pub residual_sd: Option<SdPrior>,
    pub site_sd: Option<SdPrior>,
    pub year_sd: Option<SdPrior>,
    /// Prior for the sd of every further grouping factor (one prior for all of them).
    pub group_sd: Option<SdPrior>,
    pub intercept: Option<NormalPrior>,
    pub coefficients: Option<NormalPrior>,
}

/// Priors with every default filled in: what a fit actually used, recorded with the fit.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ResolvedPriors {
    /// One prior per variance component, in the order of [`crate::Posterior::sd_names`].
    pub sd: Vec<(String, SdPrior)>,
    pub intercept: NormalPrior,
    /// Per standardised covariate.
    pub coefficients: Vec<(String, NormalPrior)>,
}

impl Priors {
    /// Fill in defaults for the given data summary (`mean_y`, `sd_y` on the model scale).
    pub(crate) fn resolve(
        &self,
        sd_names: &[String],
        covariate_names: &[String],
        mean_y: f64,
        sd_y: f64,
    ) -> Result<ResolvedPriors, ModelError> {
        let default_sd = SdPrior::HalfNormal { scale: 2.0 * sd_y };
        let mut sd = Vec::with_capacity(sd_names.len());
        for (k, name) in sd_names.iter().enumerate() {
            let chosen = match k {
                0 => self.residual_sd,
                1 => self.site_sd,
                2 => self.year_sd,
                _ => self.group_sd,
            }
            .unwrap_or(default_sd);
            chosen.validate(&format!("{name}_sd"))?;
            sd.push((name.clone(), chosen));
        }
        let intercept = self.intercept.unwrap_or(NormalPrior {
            mean: mean_y,
            sd: 10.0 * sd_y,
        });
        intercept.validate("intercept")?;
        let coef = self.coefficients.unwrap_or(NormalPrior {
            mean: 0.0,
            sd: 2.5 * sd_y,
        });
        coef.validate("coefficients")?;
        Ok(ResolvedPriors {
            sd,
            intercept,
            coefficients: covariate_names.iter().map(|n| (n.clone(), coef)).collect(),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Each density integrates to one (trapezoid rule on a fine grid; exact reference).
    #[test]
    fn sd_priors_are_normalised() {
        for prior in [
            SdPrior::HalfNormal { scale: 1.7 },
            SdPrior::HalfStudentT {
                df: 3.0,
                scale: 0.8,
            },
            SdPrior::Exponential { rate: 2.0 },
        ] {
            let (upper, n) = (400.0, 2_000_000);
            let h = upper / n as f64;
            let mut total = 0.0;
            for i in 0..=n {
                let x = (i as f64 * h).max(1e-300);
                let w = if i == 0 || i == n { 0.5 } else { 1.0 };
                total += w * prior.ln_pdf(x).exp();
            }
            let total = total * h;
            // The half-t(3) tail beyond 400 scales holds about 1e-7 of the mass.
            assert!(
                (total - 1.0).abs() < 1e-5,
                "{prior:?} integrates to {total}"
            );
        }
    }
}
