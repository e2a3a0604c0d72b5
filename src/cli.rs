//! The command line: clap definitions and the dispatch to the library.
//!
//! This is the only module that prints. Each subcommand turns its arguments into the
//! library's types, calls the library, and reports.

use std::path::PathBuf;

use clap::{Parser, Subcommand};

use serde::Deserialize;

use crate::characterise::{BackgroundMode, CompositionOptions, OxygenMode};
use crate::cluster::select::{ClusterParams, PhaseCount};
use crate::cluster::Method;
use crate::error::{Error, Result};
use crate::fields::PhaseModel;
use crate::io::{load_field, Limits};
use crate::pipeline::MapOptions;
use crate::prepare::{Denoise, MinCounts, PrepareParams, Stabilise};
use crate::refine::RefineParams;
use crate::run::{process_field, FieldJob, Labelling};
use crate::stack::FieldMetadata;

/// Phase maps from SEM-EDS element maps.
#[derive(Debug, Parser)]
#[command(name = "modalmap", version, about, long_about = None)]
pub struct Cli {
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
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

/// The subcommands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Show what is in a field: elements, size, count statistics, metadata, warnings.
    ///
    /// INPUT is a folder with one grayscale image per element (PNG 8/16-bit, TIFF
    /// 8/16/32-bit integer or float) or an HDF5 file. A map's element is its file name up to
    /// the first `_`, `-`, space or `.`, case-sensitive: `Se.png` is selenium, `SE.png` is
    /// no element. Other files are listed as skipped.
    Inspect {
        /// Folder of element maps, or HDF5 file.
        input: PathBuf,
        /// Print the result as JSON instead of a table.
        #[arg(long)]
        json: bool,
        #[command(flatten)]
        limits: LimitArgs,
    },
    /// The main job: cluster a field's pixels into phases and report each phase.
    ///
    /// Writes labels.png, phase-map.png, report.json and phases.csv into OUT, atomically.
    Map {
        /// Folder of element maps, or HDF5 file.
        input: PathBuf,
        /// Output folder (must be empty or new, unless --force).
        #[arg(short, long, value_name = "OUT")]
        output: PathBuf,
        #[command(flatten)]
        map: Box<MapArgs>,
    },
    /// Fit one phase model on several fields (the same elements in each) and save it.
    ///
    /// Every field gives an equal-sized window at a seeded place; the windows are mapped
    /// together with the `map` pipeline. The model (JSON, schema modalmap.model/1) holds
    /// the options, the clusters and the phase names, for `apply`.
    Fit {
        /// Fields: folders of element maps or HDF5 files.
        #[arg(required = true)]
        inputs: Vec<PathBuf>,
        /// Model file to write.
        #[arg(short, long, value_name = "MODEL.json")]
        output: PathBuf,
        #[command(flatten)]
        map: Box<MapArgs>,
    },
    /// Label many fields with a saved model: one output folder per field in OUT.
    ///
    /// No refit: every field gets the model's phases, ids and names. A BSE image found
    /// with a field (a `BSE…` image in its folder, or the HDF5 `bse` dataset) is checked.
    /// A field that fails is reported and the others go on; the exit code is then 5.
    /// Writes OUT/apply.json (or OUT/apply-I-of-N.json with --shard) listing every field.
    Apply {
        /// Model file written by `modalmap fit`.
        model: PathBuf,
        /// Fields: folders of element maps or HDF5 files.
        #[arg(required = true)]
        inputs: Vec<PathBuf>,
        /// Output folder (one subfolder per field).
        #[arg(short, long, value_name = "OUT")]
        output: PathBuf,
        /// Take only the I-th of N slices of the inputs (every N-th field from the I-th),
        /// e.g. --shard $SLURM_ARRAY_TASK_ID/4.
        #[arg(long, value_name = "I/N")]
        shard: Option<String>,
        /// Fields processed at the same time (default 2; each also uses every thread).
        #[arg(long, value_name = "N")]
        jobs: Option<usize>,
        /// Label every field strip by strip in bounded memory (a folder of PNG maps or an
        /// HDF5 file of 2-D maps; done anyway for such fields over 2^28 values).
        #[arg(long, conflicts_with = "no_stream")]
        stream: bool,
        /// Load every field whole, however big.
        #[arg(long)]
        no_stream: bool,
        /// Strip height in rows for --stream (for tests and measurements).
        #[arg(long, value_name = "ROWS", hide = true, requires = "stream")]
        strip_rows: Option<usize>,
        #[command(flatten)]
        map: Box<MapArgs>,
    },
    /// Pool the per-field reports of `apply` (one model) into field-to-field statistics.
    ///
    /// Reads every report.json below the given folders; writes summary.json,
    /// summary.csv and summary.html into SUMMARY.
    Merge {
        /// Output folders of `apply` (searched recursively for report.json).
        #[arg(required = true)]
        folders: Vec<PathBuf>,
        /// Summary folder (must be empty or new, unless --force).
        #[arg(short, long, value_name = "SUMMARY")]
        output: PathBuf,
        /// Replace the summary folder's contents.
        #[arg(long)]
        force: bool,
        /// Print nothing but errors.
        #[arg(long)]
        quiet: bool,
    },
    /// Map the bundled sample field (an invented solder joint) and compare with its truth.
    Demo {
        /// Output folder.
        #[arg(short, long, value_name = "DIR", default_value = "modalmap-demo")]
        output: PathBuf,
        /// Replace the folder's contents if it exists.
        #[arg(long)]
        force: bool,
    },
    /// Write a synthetic field with known phases (an invented scenario) as a maps folder.
    Synth {
        /// Folder to write the maps, BSE image and field.toml into.
        #[arg(short, long)]
        output: PathBuf,
        /// Also write the true labels (16-bit PNG, 0 = void) to this file.
        #[arg(long, value_name = "FILE")]
        truth: Option<PathBuf>,
        /// Which invented scenario: the bundled solder joint, or a large rock for benchmarks.
        #[arg(long, value_enum, default_value = "solder-joint")]
        scenario: Scenario,
        /// Width and height of the benchmark rock, pixels (2048).
        #[arg(long)]
        size: Option<usize>,
        /// Seed of the benchmark rock's microstructure and counts (2048).
        #[arg(long)]
        seed: Option<u64>,
        /// Give the benchmark rock an X-ray yield rising from left to right by ±A about
        /// its mean (0.2 for ±20 %), as at low magnification.
        #[arg(long, value_name = "A")]
        yield_ramp: Option<f64>,
        /// Replace the folder's contents if it holds files (never a field's maps).
        #[arg(long)]
        force: bool,
    },
}

/// Synthetic scenarios.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum Scenario {
    /// The bundled sample field.
    SolderJoint,
    /// A six-mineral rock in ten elements, for benchmarks.
    BenchmarkRock,
}

/// Options of `map` (each may also come from --config; the command line wins).
#[derive(Debug, Clone, Default, clap::Args)]
pub struct MapArgs {
    /// Number of phases, or `auto` (BIC; `auto:MAX` sets the largest count tried).
    #[arg(long, value_name = "N|auto")]
    pub phases: Option<PhaseCount>,
    /// Clustering method: poisson (mixture of Poisson counts, default), kmeans, gmm.
    #[arg(long, value_enum)]
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
    pub denoise: Option<Denoise>,
    /// Variance-stabilising transform for kmeans and gmm.
    #[arg(long, value_enum)]
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
    pub bse: Option<PathBuf>,
    /// Pixel size of the BSE image in µm: with the maps' pixel size, sets the scale (and
    /// allows a BSE image that covers a larger field than the maps).
    #[arg(long, value_name = "UM")]
    pub bse_pixel_size: Option<f64>,
    /// Skip the BSE check even when a BSE image is found with the maps.
    #[arg(long, conflicts_with = "bse")]
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
    #[arg(long, value_enum)]
    pub oxygen: Option<OxygenMode>,
    /// Valence for oxygen by stoichiometry, e.g. Fe=3 (repeatable; anions negative).
    #[arg(long, value_name = "EL=N")]
    pub valence: Vec<String>,
    /// Continuum background: from the phase poorest in each element (default), or none.
    #[arg(long, value_enum)]
    pub background: Option<BackgroundMode>,
    /// Reference-phase library (format modalmap.phases/1), added to the built-in one;
    /// repeatable.
    #[arg(long, value_name = "FILE")]
    pub library: Vec<PathBuf>,
    /// TOML file with any of these options (keys as the long flag names).
    #[arg(long, value_name = "FILE")]
    pub config: Option<PathBuf>,
    /// Worker threads (default: all cores). Results do not depend on it.
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Replace the contents of a non-empty output folder.
    #[arg(long)]
    pub force: bool,
    /// Print nothing but errors.
    #[arg(long)]
    pub quiet: bool,
    #[command(flatten)]
    pub limits: LimitArgs,
}

/// The configuration file: the same keys as the flags.
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
struct ConfigFile {
    /// `phases = 5` or `phases = "auto:8"`: a number or a string, as the flag's values.
    #[serde(default, deserialize_with = "number_or_string")]
    phases: Option<String>,
    method: Option<String>,
    seed: Option<u64>,
    pixel_size: Option<f64>,
    kv: Option<f64>,
    bin: Option<usize>,
    denoise: Option<String>,
    transform: Option<String>,
    min_counts: Option<f64>,
    smoothing: Option<f64>,
    min_feature: Option<usize>,
    min_phase: Option<f64>,
    threads: Option<usize>,
    bse_pixel_size: Option<f64>,
    kfactors: Option<PathBuf>,
    calibrate: Option<Vec<String>>,
    oxygen: Option<String>,
    valence: Option<Vec<String>>,
    background: Option<String>,
    library: Option<Vec<PathBuf>>,
}

/// A configuration value written as a TOML integer or string, as text.
fn number_or_string<'de, D: serde::Deserializer<'de>>(
    d: D,
) -> std::result::Result<Option<String>, D::Error> {
    #[derive(Deserialize)]
    #[serde(untagged)]
    enum Scalar {
        Int(i64),
        Text(String),
    }
    Ok(Option::<Scalar>::deserialize(d)?.map(|s| match s {
        Scalar::Int(i) => i.to_string(),
        Scalar::Text(t) => t,
    }))
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

fn read_config(path: &std::path::Path) -> Result<ConfigFile> {
    let text = crate::guard::read_text(
        path,
        "configuration file (--config)",
        crate::guard::MAX_TEXT_BYTES,
    )
    .map_err(|e| Error::options_in(path, e.problem, e.fix))?;
    toml::from_str(&text).map_err(|e| {
        Error::options_in(
            path,
            format!("is not a valid configuration: {}", e.message()),
            "use the long option names as keys, e.g. phases = \"auto\", method = \"poisson\", bin = 2",
        )
    })
}

fn parse_in<T: std::str::FromStr>(
    path: &std::path::Path,
    key: &str,
    v: Option<String>,
) -> Result<Option<T>>
where
    T::Err: std::fmt::Display,
{
    v.map(|s| {
        s.parse::<T>().map_err(|e| {
            Error::options_in(
                path,
                format!("{key} = \"{s}\": {e}"),
                format!("see `modalmap map --help` for the values of --{key}"),
            )
        })
    })
    .transpose()
}

fn parse_value_enum<T: clap::ValueEnum>(
    path: &std::path::Path,
    key: &str,
    v: Option<String>,
) -> Result<Option<T>> {
    v.map(|s| {
        T::from_str(&s, false).map_err(|e| {
            Error::options_in(
                path,
                format!("{key} = \"{s}\": {e}"),
                format!("see `modalmap map --help` for the values of --{key}"),
            )
        })
    })
    .transpose()
}

impl MapArgs {
    /// Merges the flags with the configuration file (flags win) into checked options.
    pub fn resolve(&self) -> Result<Resolved> {
        let cfg = match &self.config {
            Some(p) => Some((p.clone(), read_config(p)?)),
            None => None,
        };
        let (cp, c) = match cfg {
            Some((p, c)) => (p, c),
            None => (PathBuf::new(), ConfigFile::default()),
        };
        let phases = self
            .phases
            .or(parse_in::<PhaseCount>(&cp, "phases", c.phases)?);
        let method = self
            .method
            .or(parse_value_enum::<Method>(&cp, "method", c.method)?);
        let denoise = self
            .denoise
            .or(parse_in::<Denoise>(&cp, "denoise", c.denoise)?);
        let transform = self.transform.or(parse_value_enum::<Stabilise>(
            &cp,
            "transform",
            c.transform,
        )?);
        let d = MapOptions::default();
        let min_counts = self.min_counts.or(c.min_counts);
        let opts = MapOptions {
            prepare: PrepareParams {
                bin: self.bin.or(c.bin).unwrap_or(d.prepare.bin),
                denoise: denoise.unwrap_or(d.prepare.denoise),
                stabilise: transform.unwrap_or(d.prepare.stabilise),
                min_counts: min_counts.map_or(d.prepare.min_counts, |counts| MinCounts::Absolute {
                    counts,
                }),
                dequantise: d.prepare.dequantise,
            },
            cluster: ClusterParams {
                method: method.unwrap_or(d.cluster.method),
                phases: phases.unwrap_or(d.cluster.phases),
                seed: self.seed.or(c.seed).unwrap_or(d.cluster.seed),
                ..d.cluster
            },
            refine: RefineParams {
                smoothing: self.smoothing.or(c.smoothing).unwrap_or(d.refine.smoothing),
                min_feature_px: self
                    .min_feature
                    .or(c.min_feature)
                    .unwrap_or(d.refine.min_feature_px),
                ..d.refine
            },
            min_phase_fraction: self
                .min_phase
                .or(c.min_phase)
                .unwrap_or(d.min_phase_fraction),
        };
        let md = FieldMetadata {
            pixel_size_um: self.pixel_size.or(c.pixel_size),
            beam_kv: self.kv.or(c.kv),
            ..Default::default()
        };
        let bse_pixel_size = self.bse_pixel_size.or(c.bse_pixel_size);
        for (name, key, v) in [
            ("--pixel-size", "pixel_size_um", md.pixel_size_um),
            ("--kv", "beam_kv", md.beam_kv),
            ("--bse-pixel-size", "bse_pixel_size_um", bse_pixel_size),
        ] {
            if let Some(v) = v {
                crate::stack::check_metadata_value(key, v).map_err(|p| {
                    Error::options(format!("{name} {p}"), format!("give {name} in that range"))
                })?;
            }
        }
        let or_list = |flag: &[String], file: Option<Vec<String>>| {
            if flag.is_empty() {
                file.unwrap_or_default()
            } else {
                flag.to_vec()
            }
        };
        let composition = CompositionOptions {
            kfactors: self.kfactors.clone().or(c.kfactors),
            calibrate: or_list(&self.calibrate, c.calibrate),
            oxygen: self
                .oxygen
                .or(parse_value_enum::<OxygenMode>(&cp, "oxygen", c.oxygen)?)
                .unwrap_or_default(),
            valences: or_list(&self.valence, c.valence),
            background: self
                .background
                .or(parse_value_enum::<BackgroundMode>(
                    &cp,
                    "background",
                    c.background,
                )?)
                .unwrap_or_default(),
            libraries: if self.library.is_empty() {
                c.library.unwrap_or_default()
            } else {
                self.library.clone()
            },
        };
        Ok(Resolved {
            map: opts,
            metadata: md,
            threads: self.threads.or(c.threads),
            bse_pixel_size,
            composition,
        })
    }
}

/// Runs `map` on one field into `out`; returns the report.
pub fn map_field(
    input: &std::path::Path,
    out: &std::path::Path,
    args: &MapArgs,
) -> Result<crate::report::Report> {
    let Resolved {
        map: opts,
        metadata,
        bse_pixel_size,
        composition,
        ..
    } = args.resolve()?;
    let valid = opts.check()?;
    let composition = composition.check()?;
    let job = FieldJob {
        labelling: Labelling::Fit,
        map: &valid,
        composition: &composition,
        metadata,
        bse_file: args.bse.clone(),
        no_bse: args.no_bse,
        bse_pixel_size,
        max_pixels: args.limits.checked()?.max_pixels,
        force: args.force,
        stream: crate::run::Stream::Never,
        also_reads: args
            .config
            .iter()
            .map(|p| ("configuration file", p.clone()))
            .collect(),
    };
    let spinner = spinner(args.quiet);
    let result = process_field(input, out, &job, &mut |stage| {
        if let Some(s) = &spinner {
            s.set_message(stage.to_string());
        }
    });
    if let Some(s) = spinner {
        s.finish_and_clear();
    }
    result
}

/// A spinner with the current stage on standard error, only when it is a terminal and the
/// user did not ask for quiet.
fn spinner(quiet: bool) -> Option<indicatif::ProgressBar> {
    use std::io::IsTerminal;
    if quiet || !std::io::stderr().is_terminal() {
        return None;
    }
    let s = indicatif::ProgressBar::new_spinner();
    s.enable_steady_tick(std::time::Duration::from_millis(120));
    Some(s)
}

fn install_threads(n: Option<usize>) -> Result<()> {
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

/// Runs a parsed command line; returns the process exit code on success.
pub fn run(cli: Cli) -> Result<u8> {
    match cli.command {
        Command::Inspect {
            input,
            json,
            limits,
        } => {
            let field = load_field(&input, &limits.checked()?)?;
            let report = crate::inspect::inspect(&field);
            if json {
                let text = serde_json::to_string_pretty(&report)
                    .map_err(|e| Error::internal(format!("JSON encoding failed: {e}")))?;
                println!("{text}");
            } else {
                print!("{report}");
            }
            Ok(0)
        }
        Command::Map { input, output, map } => {
            install_threads(map.resolve()?.threads)?;
            let report = map_field(&input, &output, &map)?;
            if !map.quiet {
                print!("{}", crate::report::summary(&report));
                println!("\n  outputs in {}", output.display());
            }
            Ok(0)
        }
        Command::Fit {
            inputs,
            output,
            map,
        } => {
            install_threads(map.resolve()?.threads)?;
            fit(&inputs, &output, &map)
        }
        Command::Apply {
            model,
            inputs,
            output,
            shard,
            jobs,
            stream,
            no_stream,
            strip_rows,
            map,
        } => {
            install_threads(map.resolve()?.threads)?;
            let stream = if stream {
                crate::run::Stream::Always(strip_rows)
            } else if no_stream {
                crate::run::Stream::Never
            } else {
                crate::run::Stream::Auto
            };
            apply(
                &model,
                &inputs,
                &output,
                shard.as_deref(),
                jobs,
                stream,
                &map,
            )
        }
        Command::Merge {
            folders,
            output,
            force,
            quiet,
        } => merge(&folders, &output, force, quiet),
        Command::Demo { output, force } => {
            // The sample field is generated into a working folder beside OUT (the same
            // maps as sample-maps/), mapped into OUT, then removed.
            let field = crate::synth::sample_field()?;
            let scratch = crate::report::Scratch::beside(&output)?;
            let input = scratch.path().join("sample-maps");
            let args = MapArgs {
                force,
                ..MapArgs::default()
            };
            crate::synth::write_folder(&field, &input)?;
            let report = map_field(&input, &output, &args)?;
            drop(scratch);
            print!("{}", crate::report::summary(&report));
            let labels = crate::io::read_raster(&output.join("labels.png"), &Limits::default())?;
            let pred: Vec<u16> = labels.data.iter().map(|&v| v as u16).collect();
            let agree = crate::synth::agreement(&pred, &field.truth);
            println!(
                "\n  the sample is synthetic, so its true phases are known: {:.1} % of pixels agree with them",
                100.0 * agree
            );
            println!(
                "  outputs in {} (the maps are those of sample-maps/)",
                output.display()
            );
            Ok(0)
        }
        Command::Synth {
            output,
            truth,
            scenario,
            size,
            seed,
            yield_ramp,
            force,
        } => synth(
            &output,
            truth.as_deref(),
            scenario,
            (size, seed, yield_ramp),
            force,
        ),
    }
}

/// `synth`: an invented field, written atomically into a new or empty folder (or, with
/// `force`, replacing a folder that holds no field).
fn synth(
    output: &std::path::Path,
    truth: Option<&std::path::Path>,
    scenario: Scenario,
    (size, seed, ramp): (Option<usize>, Option<u64>, Option<f64>),
    force: bool,
) -> Result<u8> {
    if scenario == Scenario::SolderJoint && (size.is_some() || seed.is_some() || ramp.is_some()) {
        return Err(Error::options(
            "--size, --seed and --yield-ramp set the benchmark rock; the solder joint is the bundled sample, always the same",
            "leave them out, or add --scenario benchmark-rock",
        ));
    }
    let (size, seed) = (size.unwrap_or(2048), seed.unwrap_or(2048));
    if scenario == Scenario::BenchmarkRock && !(16..=20_000).contains(&size) {
        return Err(Error::options(
            format!("--size {size} is out of range"),
            "use 16 to 20000 pixels",
        ));
    }
    if let Some(t) = truth {
        if t.exists() && !force {
            return Err(Error::output(
                t,
                "already exists",
                "choose another file for the true labels, or add --force to replace it",
            ));
        }
        let folder = crate::guard::resolve_output(t)?;
        if let Some(file) = folder.parent().and_then(crate::io::folder::field_file_in) {
            return Err(Error::output(
                t,
                format!(
                    "lies in a field's folder (it holds {file}); synth never writes into a field"
                ),
                "write the true labels outside any field",
            ));
        }
    }
    if let Some(r) = ramp {
        crate::synth::check_ramp(r)?;
    }
    let dir = crate::report::prepare_output(output, force)?;
    let field = match scenario {
        Scenario::SolderJoint => crate::synth::sample_field()?,
        Scenario::BenchmarkRock => {
            let (micro, opts) = crate::synth::benchmark_rock(size, seed);
            let mut field = crate::synth::generate(&micro, &opts)?;
            if let Some(r) = ramp {
                crate::synth::shade(&mut field, r, seed)?;
            }
            field
        }
    };
    crate::synth::write_folder(&field, dir.folder())?;
    dir.commit()?;
    if let Some(t) = truth {
        let png = crate::io::raster::encode_png_u16(
            field.stack.width(),
            field.stack.height(),
            &field.truth,
        );
        crate::report::write_file_atomically(t, &png)?;
    }
    println!(
        "wrote a {}×{} synthetic field ({}) to {}",
        field.stack.width(),
        field.stack.height(),
        field.phase_names.join(", "),
        output.display()
    );
    Ok(0)
}

/// `fit`: one model from several fields.
fn fit(inputs: &[PathBuf], output: &std::path::Path, args: &MapArgs) -> Result<u8> {
    let Resolved {
        map: opts,
        metadata,
        composition,
        ..
    } = args.resolve()?;
    let valid = opts.check()?;
    let composition = composition.check()?;
    if args.bse.is_some() || args.bse_pixel_size.is_some() {
        return Err(Error::options(
            "--bse and --bse-pixel-size cannot be given to fit",
            "fit learns the phases from the element maps; check the BSE contrast with map or apply",
        ));
    }
    let job = crate::run::FitJob {
        map: &valid,
        composition: &composition,
        metadata,
        max_pixels: args.limits.checked()?.max_pixels,
        force: args.force,
        also_reads: args
            .config
            .iter()
            .map(|p| ("configuration file", p.clone()))
            .collect(),
    };
    let spinner = spinner(args.quiet);
    let fitted = crate::run::fit_model(inputs, output, &job, &mut |stage| {
        if let Some(s) = &spinner {
            s.set_message(stage.to_string());
        }
    });
    if let Some(s) = spinner {
        s.finish_and_clear();
    }
    let crate::run::Fitted { model, windows } = fitted?;
    if !args.quiet {
        println!(
            "fitted {} phases on {} fields ({} × {} pixel windows):",
            model.phases.len(),
            inputs.len(),
            windows[0][2],
            windows[0][3]
        );
        for p in &model.phases {
            println!(
                "  {:>3}  {:<24} {:>6.2} % of the training windows",
                p.id,
                p.name,
                100.0 * p.training_area_fraction
            );
        }
        println!("  model written to {}", output.display());
    }
    Ok(0)
}

/// Options of `map` that a saved model fixes, when given to `apply`.
fn model_fixed_options(args: &MapArgs) -> Vec<&'static str> {
    let mut v = Vec::new();
    let given = [
        ("--phases", args.phases.is_some()),
        ("--method", args.method.is_some()),
        ("--seed", args.seed.is_some()),
        ("--bin", args.bin.is_some()),
        ("--denoise", args.denoise.is_some()),
        ("--transform", args.transform.is_some()),
        ("--min-counts", args.min_counts.is_some()),
        ("--smoothing", args.smoothing.is_some()),
        ("--min-feature", args.min_feature.is_some()),
        ("--min-phase", args.min_phase.is_some()),
        ("--bse", args.bse.is_some()),
        ("--config", args.config.is_some()),
    ];
    for (name, set) in given {
        if set {
            v.push(name);
        }
    }
    v
}

/// `apply`: label fields with a saved model.
fn apply(
    model_path: &std::path::Path,
    inputs: &[PathBuf],
    out: &std::path::Path,
    shard: Option<&str>,
    jobs: Option<usize>,
    stream: crate::run::Stream,
    args: &MapArgs,
) -> Result<u8> {
    let fixed = model_fixed_options(args);
    if !fixed.is_empty() {
        return Err(Error::options(
            format!("{} cannot be given to apply", fixed.join(", ")),
            "the model fixes the mapping options (fit a new model to change them); a BSE image is found with each field",
        ));
    }
    let (model, reference) = PhaseModel::load(model_path)?;
    let valid = model.options.check()?;
    let Resolved {
        metadata,
        bse_pixel_size,
        composition,
        ..
    } = args.resolve()?;
    let composition = composition.check()?;
    let (i, n) = match shard {
        Some(s) => crate::fields::parse_shard(s).map_err(|p| {
            Error::options(
                format!("--shard {p}"),
                "give the slice as I/N with 1 ≤ I ≤ N, e.g. --shard 2/4",
            )
        })?,
        None => (1, 1),
    };
    let jobs = jobs.unwrap_or(2);
    if jobs == 0 || jobs > 256 {
        return Err(Error::options(
            format!("--jobs {jobs} is out of range"),
            "give 1 to 256 fields at a time",
        ));
    }
    let job = FieldJob {
        labelling: Labelling::Model {
            model: &model,
            reference: &reference,
        },
        map: &valid,
        composition: &composition,
        metadata,
        bse_file: None,
        no_bse: args.no_bse,
        bse_pixel_size,
        max_pixels: args.limits.checked()?.max_pixels,
        force: args.force,
        stream,
        also_reads: vec![("model file", model_path.to_path_buf())],
    };
    let bar = progress_bar(args.quiet);
    let batch = crate::run::apply_batch(
        inputs,
        out,
        (i, n),
        jobs,
        &job,
        &crate::run::BatchProgress {
            start: &|fields| {
                if let Some(b) = &bar {
                    b.set_length(fields as u64);
                }
            },
            stage: &|field, stage| {
                if let Some(b) = &bar {
                    b.set_message(format!("{field}: {stage}"));
                }
            },
            done: &|o| {
                if let Some(b) = &bar {
                    b.set_message(o.field.clone());
                    b.inc(1);
                }
            },
        },
    );
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    let crate::run::BatchResult {
        outcomes,
        kept,
        summary,
    } = batch?;
    let failed: Vec<&crate::run::FieldOutcome> =
        outcomes.iter().filter(|o| o.status != "ok").collect();
    if !args.quiet {
        println!(
            "labelled {} of {} fields with {} (shard {i}/{n}); outputs in {}",
            outcomes.len() - failed.len(),
            outcomes.len(),
            model_path.display(),
            out.display()
        );
        if !kept.is_empty() {
            println!(
                "kept {} fields an earlier run labelled with this model (add --force to label them again)",
                kept.len()
            );
        }
    }
    for f in &failed {
        eprintln!(
            "error: field {} failed: {}",
            f.field,
            f.error.as_deref().unwrap_or("")
        );
    }
    if failed.is_empty() {
        Ok(0)
    } else {
        eprintln!(
            "{} of {} fields failed; the others are done (listed in {})",
            failed.len(),
            outcomes.len(),
            summary.display()
        );
        Ok(crate::error::PARTIAL_FAILURE_EXIT)
    }
}

/// A progress bar over fields with an ETA, on a terminal only.
fn progress_bar(quiet: bool) -> Option<indicatif::ProgressBar> {
    use std::io::IsTerminal;
    if quiet || !std::io::stderr().is_terminal() {
        return None;
    }
    let b = indicatif::ProgressBar::new(0);
    if let Ok(style) = indicatif::ProgressStyle::with_template(
        "{bar:30} {pos}/{len} fields, {elapsed} elapsed, ETA {eta}  {msg}",
    ) {
        b.set_style(style);
    }
    Some(b)
}

/// `merge`: pool reports made with one model.
fn merge(folders: &[PathBuf], out: &std::path::Path, force: bool, quiet: bool) -> Result<u8> {
    let summary = crate::fields::merge_folders(folders, out, force)?;
    if !quiet {
        println!(
            "pooled {} fields labelled with {}\n",
            summary.fields.len(),
            summary.model.path
        );
        println!(
            "  {:>3}  {:<24} {:>10} {:>8} {:>17} {:>7}",
            "id", "phase", "mean area %", "SD %", "95 % CI %", "%RA"
        );
        for p in &summary.phases {
            println!(
                "  {:>3}  {:<24} {:>10.2} {:>8.2} {:>17} {:>7}",
                p.id,
                p.name,
                100.0 * p.area_fraction_mean,
                100.0 * p.area_fraction_sd,
                crate::fields::pooled_ci_text(p, "–"),
                p.relative_accuracy_pct
                    .map_or("–".into(), |v| format!("{v:.1}"))
            );
        }
        println!("\n  outputs in {}", out.display());
    }
    Ok(0)
}
