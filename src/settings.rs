//! The options of `map`, `fit` and `apply`, written once: [`MapArgs`] is filled by clap
//! from the flags and by serde from a configuration file whose keys are the long flag
//! names, and [`MapArgs::resolve`] turns the two (flags win) into the stages' options.

use std::path::{Path, PathBuf};

use serde::Deserialize;

use crate::characterise::{BackgroundMode, CompositionOptions, OxygenMode};
use crate::choice::Choice;
use crate::cluster::select::{ClusterParams, PhaseCount};
use crate::cluster::Method;
use crate::error::{Error, Result};
use crate::io::Limits;
use crate::map_options::MapOptions;
use crate::prepare::{Denoise, MinCounts, PrepareParams, Stabilise};
use crate::refine::RefineParams;
use crate::stack::FieldMetadata;

/// Parses and lists the values of a [`Choice`] for clap, with each value's help.
pub fn choice<T: Choice>() -> impl clap::builder::TypedValueParser<Value = T> {
    use clap::builder::{PossibleValue, PossibleValuesParser, TypedValueParser};
    let values = T::ALL
        .iter()
        .map(|&v| PossibleValue::new(v.name()).help(v.help()));
    PossibleValuesParser::new(values)
        .map(|name| crate::choice::from_name::<T>(&name).expect("clap offered only these names"))
}

/// Decoding limits shared by every command that reads maps.
#[derive(Debug, Clone, clap::Args)]
pub struct LimitArgs {
    /// Largest number of pixels accepted in one map (guards against hostile headers).
    #[arg(long, value_name = "N", default_value_t = Limits::DEFAULT_MAX_PIXELS)]
    pub max_pixels: u64,
}

impl LimitArgs {
    /// The checked limits.
    pub fn checked(&self) -> Result<Limits> {
        if self.max_pixels == 0 {
            return Err(Error::options(
                "--max-pixels 0 would refuse every map",
                format!(
                    "give the largest number of pixels to accept in one map (default {})",
                    Limits::DEFAULT_MAX_PIXELS
                ),
            ));
        }
        Ok(Limits {
            max_pixels: self.max_pixels,
        })
    }
}

impl Default for LimitArgs {
    fn default() -> Self {
        LimitArgs {
            max_pixels: Limits::DEFAULT_MAX_PIXELS,
        }
    }
}

/// Options of `map`, `fit` and `apply`: clap fills them from the flags, serde from a
/// configuration file whose keys are the long flag names (the command line wins).
#[derive(Debug, Clone, Default, clap::Args, Deserialize)]
#[serde(default, deny_unknown_fields, rename_all = "kebab-case")]
pub struct MapArgs {
    /// Number of phases, or `auto` (BIC; `auto:MAX` sets the largest count tried).
    #[arg(long, value_name = "N|auto")]
    #[serde(deserialize_with = "flag_text")]
    pub phases: Option<PhaseCount>,
    /// Clustering method: poisson (mixture of Poisson counts, default), kmeans, gmm.
    #[arg(long, value_parser = choice::<Method>())]
    pub method: Option<Method>,
    /// Seed of every random choice (same seed, same result).
    #[arg(long)]
    pub seed: Option<u64>,
    /// Pixel size in µm (overrides the field's metadata).
    #[arg(long, value_name = "UM")]
    pub pixel_size: Option<f64>,
    /// Beam energy in kV (overrides the field's metadata).
    #[arg(long, value_name = "KV")]
    pub kv: Option<f64>,
    /// Sum counts over N × N pixel blocks first.
    #[arg(long, value_name = "N")]
    pub bin: Option<usize>,
    /// Denoising before clustering: none, gaussian:SIGMA or median:RADIUS.
    #[arg(long, value_name = "METHOD")]
    #[serde(deserialize_with = "flag_text")]
    pub denoise: Option<Denoise>,
    /// Variance-stabilising transform for kmeans and gmm.
    #[arg(long, value_parser = choice::<Stabilise>())]
    pub transform: Option<Stabilise>,
    /// Pixels with fewer total counts are empty (default: 15 % of the median total).
    #[arg(long, value_name = "COUNTS")]
    pub min_counts: Option<f64>,
    /// Strength of the spatial prior (0 = off; default 1).
    #[arg(long, value_name = "BETA")]
    pub smoothing: Option<f64>,
    /// Merge features smaller than this many pixels into their surroundings.
    #[arg(long, value_name = "PX")]
    pub min_feature: Option<usize>,
    /// With --phases auto: dissolve phases smaller than this share of the pixels.
    #[arg(long, value_name = "FRACTION")]
    pub min_phase: Option<f64>,
    /// BSE image of the field for the contrast check (default: a `BSE…` image found with
    /// the maps, or the HDF5 input's `bse` dataset).
    #[arg(long, value_name = "IMAGE")]
    #[serde(skip)]
    pub bse: Option<PathBuf>,
    /// Pixel size of the BSE image in µm: with the maps' pixel size, sets the scale (and
    /// allows a BSE image that covers a larger field than the maps).
    #[arg(long, value_name = "UM")]
    pub bse_pixel_size: Option<f64>,
    /// Skip the BSE check even when a BSE image is found with the maps.
    #[arg(long, conflicts_with = "bse")]
    #[serde(skip)]
    pub no_bse: bool,
    /// k-factor file (format modalmap.kfactors/1) for compositions.
    #[arg(long, value_name = "FILE")]
    pub kfactors: Option<PathBuf>,
    /// Calibrate the k-factors on a phase of known composition: ID=COMPOSITION (e.g.
    /// 3=Cu6Sn5), NAME=COMPOSITION, or a library phase name; repeat for more phases.
    /// COMPOSITION is a library name, a formula, or wt% as Cu:39.1,Sn:60.9.
    #[arg(long, value_name = "PHASE=COMPOSITION")]
    pub calibrate: Vec<String>,
    /// Oxygen from its map (measured) or from the cations' valences (stoichiometry).
    #[arg(long, value_parser = choice::<OxygenMode>())]
    pub oxygen: Option<OxygenMode>,
    /// Valence for oxygen by stoichiometry, e.g. Fe=3 (repeatable; anions negative).
    #[arg(long, value_name = "EL=N")]
    pub valence: Vec<String>,
    /// Continuum background: from the phase poorest in each element (default), or none.
    #[arg(long, value_parser = choice::<BackgroundMode>())]
    pub background: Option<BackgroundMode>,
    /// Reference-phase library (format modalmap.phases/1), added to the built-in one;
    /// repeatable.
    #[arg(long, value_name = "FILE")]
    pub library: Vec<PathBuf>,
    /// TOML file with any of these options (keys as the long flag names).
    #[arg(long, value_name = "FILE")]
    #[serde(skip)]
    pub config: Option<PathBuf>,
    /// Worker threads (default: all cores). Results do not depend on it.
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Replace the contents of a non-empty output folder.
    #[arg(long)]
    #[serde(skip)]
    pub force: bool,
    /// Print nothing but errors.
    #[arg(long)]
    #[serde(skip)]
    pub quiet: bool,
    #[command(flatten)]
    #[serde(skip)]
    pub limits: LimitArgs,
}

/// Every option of `map`, flags and configuration file merged.
#[derive(Debug, Clone, PartialEq)]
pub struct Resolved {
    /// Options of the mapping stages.
    pub map: MapOptions,
    /// Metadata overrides.
    pub metadata: FieldMetadata,
    /// Worker threads.
    pub threads: Option<usize>,
    /// BSE pixel size, µm.
    pub bse_pixel_size: Option<f64>,
    /// Options of the composition stage.
    pub composition: CompositionOptions,
}

impl MapArgs {
    /// The flags over the configuration file's values: each option the command line
    /// leaves out is taken from the file.
    fn over(&self, file: MapArgs) -> MapArgs {
        let list = |flag: &[String], file: Vec<String>| {
            if flag.is_empty() {
                file
            } else {
                flag.to_vec()
            }
        };
        MapArgs {
            phases: self.phases.or(file.phases),
            method: self.method.or(file.method),
            seed: self.seed.or(file.seed),
            pixel_size: self.pixel_size.or(file.pixel_size),
            kv: self.kv.or(file.kv),
            bin: self.bin.or(file.bin),
            denoise: self.denoise.or(file.denoise),
            transform: self.transform.or(file.transform),
            min_counts: self.min_counts.or(file.min_counts),
            smoothing: self.smoothing.or(file.smoothing),
            min_feature: self.min_feature.or(file.min_feature),
            min_phase: self.min_phase.or(file.min_phase),
            bse_pixel_size: self.bse_pixel_size.or(file.bse_pixel_size),
            kfactors: self.kfactors.clone().or(file.kfactors),
            calibrate: list(&self.calibrate, file.calibrate),
            oxygen: self.oxygen.or(file.oxygen),
            valence: list(&self.valence, file.valence),
            background: self.background.or(file.background),
            library: if self.library.is_empty() {
                file.library
            } else {
                self.library.clone()
            },
            threads: self.threads.or(file.threads),
            ..self.clone()
        }
    }

    /// Merges the flags with the configuration file (flags win) into the stages' options,
    /// with every value range-checked that can be before any input is read.
    pub fn resolve(&self) -> Result<Resolved> {
        let a = match &self.config {
            Some(p) => self.over(read_config(p)?),
            None => self.clone(),
        };
        let d = MapOptions::default();
        let map = MapOptions {
            prepare: PrepareParams {
                bin: a.bin.unwrap_or(d.prepare.bin),
                denoise: a.denoise.unwrap_or(d.prepare.denoise),
                stabilise: a.transform.unwrap_or(d.prepare.stabilise),
                min_counts: a.min_counts.map_or(d.prepare.min_counts, |counts| {
                    MinCounts::Absolute { counts }
                }),
                dequantise: d.prepare.dequantise,
            },
            cluster: ClusterParams {
                method: a.method.unwrap_or(d.cluster.method),
                phases: a.phases.unwrap_or(d.cluster.phases),
                seed: a.seed.unwrap_or(d.cluster.seed),
                ..d.cluster
            },
            refine: RefineParams {
                smoothing: a.smoothing.unwrap_or(d.refine.smoothing),
                min_feature_px: a.min_feature.unwrap_or(d.refine.min_feature_px),
                ..d.refine
            },
            min_phase_fraction: a.min_phase.unwrap_or(d.min_phase_fraction),
        };
        let metadata = FieldMetadata {
            pixel_size_um: a.pixel_size,
            beam_kv: a.kv,
            ..Default::default()
        };
        for (name, key, v) in [
            ("--pixel-size", "pixel_size_um", a.pixel_size),
            ("--kv", "beam_kv", a.kv),
            ("--bse-pixel-size", "bse_pixel_size_um", a.bse_pixel_size),
        ] {
            if let Some(v) = v {
                crate::stack::check_metadata_value(key, v).map_err(|p| {
                    Error::options(format!("{name} {p}"), format!("give {name} in that range"))
                })?;
            }
        }
        let composition = CompositionOptions {
            kfactors: a.kfactors,
            calibrate: a.calibrate,
            oxygen: a.oxygen.unwrap_or_default(),
            valences: a.valence,
            background: a.background.unwrap_or_default(),
            libraries: a.library,
        };
        Ok(Resolved {
            map,
            metadata,
            threads: a.threads,
            bse_pixel_size: a.bse_pixel_size,
            composition,
        })
    }

    /// The options given that a saved model fixes (`apply` refuses them), as flags.
    pub fn fixed_by_a_model(&self) -> Vec<String> {
        let given = [
            self.phases.is_some(),
            self.method.is_some(),
            self.seed.is_some(),
            self.bin.is_some(),
            self.denoise.is_some(),
            self.transform.is_some(),
            self.min_counts.is_some(),
            self.smoothing.is_some(),
            self.min_feature.is_some(),
            self.min_phase.is_some(),
            self.bse.is_some(),
            self.config.is_some(),
        ];
        FIXED_BY_A_MODEL
            .iter()
            .zip(given)
            .filter(|(_, set)| *set)
            .map(|(id, _)| format!("--{}", id.replace('_', "-")))
            .collect()
    }
}

/// The options of [`MapArgs`] (clap's argument ids, the field names) that a saved model
/// fixes: `apply` refuses them and its `--help` does not list them.
pub const FIXED_BY_A_MODEL: [&str; 12] = [
    "phases",
    "method",
    "seed",
    "bin",
    "denoise",
    "transform",
    "min_counts",
    "smoothing",
    "min_feature",
    "min_phase",
    "bse",
    "config",
];

/// Reads a configuration file (the keys of [`MapArgs`]).
fn read_config(path: &Path) -> Result<MapArgs> {
    let text = crate::guard::read_text(
        path,
        "configuration file (--config)",
        crate::guard::MAX_TEXT_BYTES,
    )
    .map_err(|e| Error::options_in(path, e.problem, e.fix))?;
    toml::from_str(&text).map_err(|e| {
        // The line the error is on, so that the message names the key.
        let line = e
            .span()
            .and_then(|s| text[..s.start].lines().count().checked_sub(1))
            .and_then(|i| text.lines().nth(i))
            .map_or(String::new(), |l| format!(" (`{}`)", l.trim()));
        Error::options_in(
            path,
            format!("is not a valid configuration{line}: {}", e.message()),
            "use the long option names as keys, e.g. phases = \"auto\", method = \"poisson\", bin = 2; see `modalmap map --help` for the values",
        )
    })
}

/// A value written as on the command line (`phases = "auto:8"`, `denoise =
/// "median:1"`), or as a TOML integer (`phases = 5`), parsed as the flag parses it.
fn flag_text<'de, D, T>(d: D) -> std::result::Result<Option<T>, D::Error>
where
    D: serde::Deserializer<'de>,
    T: std::str::FromStr,
    T::Err: std::fmt::Display,
{
    #[derive(Deserialize)]
    #[serde(untagged)]
    enum Scalar {
        Int(i64),
        Text(String),
    }
    let text = match Scalar::deserialize(d)? {
        Scalar::Int(i) => i.to_string(),
        Scalar::Text(t) => t,
    };
    text.parse::<T>()
        .map(Some)
        .map_err(|e| serde::de::Error::custom(format!("\"{text}\": {e}")))
}

/// Sets the number of worker threads (`--threads`; all cores when not given). Results do
/// not depend on it.
pub fn install_threads(n: Option<usize>) -> Result<()> {
    if let Some(n) = n.filter(|&n| n > 0) {
        if n > 1024 {
            return Err(Error::options(
                format!("--threads {n} is too many"),
                "use at most 1024 threads, or leave it out",
            ));
        }
        // Fails only if a pool was installed before, which is harmless.
        let _ = rayon::ThreadPoolBuilder::new()
            .num_threads(n)
            .build_global();
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn file(text: &str) -> MapArgs {
        toml::from_str(text).unwrap()
    }

    #[test]
    fn a_configuration_file_takes_the_flag_names_and_natural_types() {
        let f = file(
            "phases = 5\nmethod = \"gmm\"\ndenoise = \"median:1\"\nmin-counts = 3.5\n\
             calibrate = [\"1=Cu\"]\nbackground = \"none\"\n",
        );
        assert_eq!(f.phases, Some("5".parse().unwrap()));
        assert_eq!(f.method, Some(Method::Gmm));
        assert_eq!(f.denoise, Some("median:1".parse().unwrap()));
        assert_eq!(f.min_counts, Some(3.5));
        assert_eq!(f.calibrate, vec!["1=Cu"]);
        assert_eq!(f.background, Some(BackgroundMode::None));
        assert_eq!(
            file("phases = \"auto:8\"\n").phases,
            Some("auto:8".parse().unwrap())
        );
        for bad in [
            "phases = \"many\"\n",
            "force = true\n",
            "bse = \"x.png\"\n",
            "bin = \"2\"\n",
        ] {
            assert!(toml::from_str::<MapArgs>(bad).is_err(), "{bad}");
        }
    }

    #[test]
    fn flags_win_over_the_file_and_lists_replace_lists() {
        let flags = MapArgs {
            phases: Some("3".parse().unwrap()),
            valence: vec!["Fe=3".into()],
            ..Default::default()
        };
        let merged = flags.over(file(
            "phases = 5\nseed = 7\nvalence = [\"Mn=3\", \"Cr=2\"]\nlibrary = [\"lab.toml\"]\n",
        ));
        assert_eq!(merged.phases, Some("3".parse().unwrap()));
        assert_eq!(merged.seed, Some(7));
        assert_eq!(merged.valence, vec!["Fe=3"]);
        assert_eq!(merged.library, vec![PathBuf::from("lab.toml")]);
    }

    #[test]
    fn a_model_fixes_the_mapping_options_only() {
        let a = MapArgs {
            seed: Some(2),
            kv: Some(15.0),
            config: Some("run.toml".into()),
            ..Default::default()
        };
        assert_eq!(a.fixed_by_a_model(), vec!["--seed", "--config"]);
        assert!(MapArgs::default().fixed_by_a_model().is_empty());
    }
}
