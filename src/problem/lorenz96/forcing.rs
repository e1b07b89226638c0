//! Joint estimation of the forcing F with the initial state: the settings `estimate_forcing`,
//! `forcing_prior_mean` and `forcing_prior_sd`, and the Gaussian prior of F they define.
//!
//! With `estimate_forcing=true` the control vector is u = [x0 (n sites); F] and the cost gains the
//! background term ½ (F − F_b)² / σ_F², independent of x0's B (the joint prior is block-diagonal).
//! F_b defaults to the `forcing` setting and σ_F to 1.0: one unit around the standard F = 8 keeps nearly
//! every draw of F in the chaotic regime of the model (F between about 6 and 10), so the prior says
//! "F is known to about ±1" without letting the model leave the regime the scenario was made in.
//!
//! How the synthetic truth's F relates to the prior (see `Scenario::synthesize`): with `synth=demo` the
//! truth runs with F = `forcing`, so the prior mean equals the truth's F unless `forcing_prior_mean` is
//! given (set it to study a prior that is off); with `synth=calibration` the truth's F is drawn from
//! N(F_b, σ_F²), like the truth's x0 from N(xb, B), so that the truth is a draw from the joint prior.

use nalgebra::DMatrix;

use super::config::Lorenz96Config;
use crate::error::{Error, Result};
use crate::problem::prior::DensePrior;
use crate::problem::settings::{in_range, scale, Settings};

/// Default prior standard deviation σ_F of the forcing.
pub const DEFAULT_FORCING_PRIOR_SD: f64 = 1.0;

/// The Gaussian prior N(mean, sd²) of the forcing F when it is estimated with the initial state.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ForcingPrior {
    /// Prior mean F_b.
    pub mean: f64,
    /// Prior standard deviation σ_F.
    pub sd: f64,
}

impl ForcingPrior {
    /// Reads `estimate_forcing` (true or false, default false), and with it `forcing_prior_mean`
    /// (default `forcing`) and `forcing_prior_sd` (default 1.0). Prior settings given without
    /// `estimate_forcing=true` are refused: they would have no effect. The values' ranges are checked
    /// by [`ForcingPrior::validate`], which `Lorenz96Config::validate` calls.
    pub fn from_settings(s: &Settings, forcing: f64) -> Result<Option<Self>> {
        let estimate = match s.get_str("estimate_forcing").as_deref() {
            None | Some("false") => false,
            Some("true") => true,
            Some(o) => {
                return Err(Error::Config(format!(
                "setting estimate_forcing={o}: use 'true' (estimate the forcing F together with \
                     the initial state) or 'false' (F fixed at the setting forcing)"
            )))
            }
        };
        let mean = s.get("forcing_prior_mean", forcing)?;
        let sd = s.get("forcing_prior_sd", DEFAULT_FORCING_PRIOR_SD)?;
        if !estimate {
            for key in ["forcing_prior_mean", "forcing_prior_sd"] {
                if s.contains(key) {
                    return Err(Error::Config(format!(
                        "setting {key}: it is only used with estimate_forcing=true; add \
                         --set estimate_forcing=true or drop it"
                    )));
                }
            }
            return Ok(None);
        }
        // Ranges are checked by `Lorenz96Config::validate`, after `forcing` itself (the default mean).
        Ok(Some(ForcingPrior { mean, sd }))
    }

    /// Checks that the mean is a finite number in the range the `forcing` setting allows and the
    /// standard deviation a positive finite scale.
    pub fn validate(&self) -> Result<()> {
        in_range(
            "forcing_prior_mean",
            self.mean,
            -1e6,
            1e6,
            "the standard forcing is 8; the model blows up long before these bounds",
        )?;
        scale("forcing_prior_sd", self.sd)?;
        Ok(())
    }
}

impl Lorenz96Config {
    /// Length of the control vector: n, plus one when the forcing is estimated.
    pub fn control_dim(&self) -> usize {
        self.model.n + usize::from(self.forcing_prior.is_some())
    }

    /// The prior of the control vector: N(xb, B) over x0, and with the forcing estimated the
    /// block-diagonal N([xb; F_b], diag(B, σ_F²)).
    pub(super) fn control_prior(&self, xb: Vec<f64>) -> Result<DensePrior> {
        let Some(fp) = self.forcing_prior else {
            return self.dense_prior(xb);
        };
        let n = self.model.n;
        let b = self.background_cov();
        let mut cov = DMatrix::zeros(n + 1, n + 1);
        cov.view_mut((0, 0), (n, n)).copy_from(&b);
        cov[(n, n)] = fp.sd * fp.sd;
        let mut mean = xb;
        mean.push(fp.mean);
        DensePrior::new(mean, cov).map_err(|e| {
            Error::Config(format!(
                "settings corr_len={} and n={}: {e}; use a shorter corr_len",
                self.corr_len, self.model.n
            ))
        })
    }
}
