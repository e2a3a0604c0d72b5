//! The options of the main job for one field: [`MapOptions`] as given (command line and
//! configuration file merged, see [`crate::settings`]) and [`ValidMapOptions`], every
//! stage's options checked once, before any input is read.

use serde::{Deserialize, Serialize};

use crate::cluster::select::{ClusterParams, ValidClusterParams};
use crate::cluster::Method;
use crate::error::{Error, Result};
use crate::prepare::{FeatureTransform, PrepareParams, Stabilise};
use crate::refine::{RefineParams, ValidRefineParams};

/// Every option of `map`, as given (command line and configuration file merged).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct MapOptions {
    /// Prepare stage (the transform is ignored by the Poisson method, which works on counts).
    pub prepare: PrepareParams,
    /// Cluster stage.
    pub cluster: ClusterParams,
    /// Refine stage.
    pub refine: RefineParams,
    /// With an automatic phase count: phases smaller than this share of the pixels are
    /// dissolved into their neighbours.
    pub min_phase_fraction: f64,
}

impl Default for MapOptions {
    fn default() -> Self {
        MapOptions {
            prepare: PrepareParams::default(),
            cluster: ClusterParams::default(),
            refine: RefineParams::default(),
            min_phase_fraction: 2e-4,
        }
    }
}

/// Checked options.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ValidMapOptions {
    transform: FeatureTransform,
    cluster: ValidClusterParams,
    refine: ValidRefineParams,
    min_phase_fraction: f64,
    given: MapOptions,
}

impl MapOptions {
    /// Checks every stage's options; the Poisson method always works on raw counts.
    pub fn check(self) -> Result<ValidMapOptions> {
        let mut prep = self.prepare;
        if self.cluster.method == Method::Poisson {
            prep.stabilise = Stabilise::None;
            prep.dequantise = false;
        }
        if !(0.0..0.5).contains(&self.min_phase_fraction) {
            return Err(Error::options(
                format!(
                    "minimum phase size {} is out of range",
                    self.min_phase_fraction
                ),
                "give a share of the pixels from 0 to below 0.5, e.g. 0.0002",
            ));
        }
        Ok(ValidMapOptions {
            transform: prep.check()?,
            cluster: self.cluster.check()?,
            refine: self.refine.check()?,
            min_phase_fraction: self.min_phase_fraction,
            given: MapOptions {
                prepare: prep,
                ..self
            },
        })
    }
}

impl ValidMapOptions {
    /// The options as they were applied.
    pub fn options(&self) -> &MapOptions {
        &self.given
    }

    /// The checked feature transform.
    pub fn transform(&self) -> FeatureTransform {
        self.transform
    }

    /// The checked refine options.
    pub fn refine(&self) -> ValidRefineParams {
        self.refine
    }

    /// The checked cluster options.
    pub fn cluster(&self) -> &ValidClusterParams {
        &self.cluster
    }

    /// The size floor of a phase, as a share of the pixels.
    pub fn min_phase_fraction(&self) -> f64 {
        self.min_phase_fraction
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The Poisson mixture works on raw counts: whatever transform was asked for is
    /// recorded as none, and the options as applied say so.
    #[test]
    fn the_poisson_method_works_on_raw_counts() {
        let mut o = MapOptions::default();
        o.cluster.method = Method::Poisson;
        o.prepare.stabilise = Stabilise::Anscombe;
        o.prepare.dequantise = true;
        let v = o.check().unwrap();
        assert_eq!(v.options().prepare.stabilise, Stabilise::None);
        assert!(!v.options().prepare.dequantise);
        o.cluster.method = Method::Kmeans;
        let v = o.check().unwrap();
        assert_eq!(v.options().prepare.stabilise, Stabilise::Anscombe);
    }

    #[test]
    fn a_phase_size_floor_outside_zero_to_a_half_is_refused() {
        for bad in [-0.1, 0.5, f64::NAN] {
            let o = MapOptions {
                min_phase_fraction: bad,
                ..MapOptions::default()
            };
            let e = o.check().unwrap_err();
            assert!(e.to_string().contains("minimum phase size"), "{e}");
        }
        let ok = MapOptions {
            min_phase_fraction: 0.0,
            ..MapOptions::default()
        };
        assert_eq!(ok.check().unwrap().min_phase_fraction(), 0.0);
    }
}
