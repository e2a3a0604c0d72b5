//! The command line: clap definitions and the dispatch to the library.
//!
//! This is the only module that prints. Each subcommand turns its arguments into the
//! library's types, calls the library, and reports.

use std::path::PathBuf;

use clap::{Parser, Subcommand};

use crate::error::{Error, Result};
use crate::fields::PhaseModel;
use crate::io::{load_field, Limits};
use crate::run::{process_field, FieldJob, Labelling};
pub use crate::settings::{LimitArgs, MapArgs, Resolved};
use crate::synth::Scenario;

mod progress;

/// Phase maps from SEM-EDS element maps.
#[derive(Debug, Parser)]
#[command(name = "modalmap", version, about, long_about = None)]
pub struct Cli {
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// The command line as clap parses it: [`Cli`]'s arguments, with the options a saved
/// model fixes ([`crate::settings::FIXED_BY_A_MODEL`]) left out of `apply --help` (they
/// are still parsed, so that `apply` can refuse them by name).
pub fn command() -> clap::Command {
    <Cli as clap::CommandFactory>::command().mut_subcommand("apply", |apply| {
        crate::settings::FIXED_BY_A_MODEL
            .iter()
            .fold(apply, |c, id| c.mut_arg(*id, |a| a.hide(true)))
    })
}

/// Parses the process's arguments with [`command`]; exits with clap's message and code on
/// a usage error, as clap does.
pub fn parse() -> Cli {
    let matches = command().get_matches();
    <Cli as clap::FromArgMatches>::from_arg_matches(&matches).unwrap_or_else(|e| e.exit())
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
    /// Writes into OUT, atomically: labels.png (16-bit phase ids, 0 = unassigned),
    /// phase-map.png, phase-map.svg, phases.csv, report.json, report.html, element-EL.png
    /// for each map,
    /// and with a BSE image bse-registered.png and overlay.png.
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
        /// Output folder [default: a new folder modalmap-demo-N in the system's temporary
        /// folder, so nothing is written where the command runs].
        #[arg(short, long, value_name = "DIR")]
        output: Option<PathBuf>,
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
        #[arg(long, value_parser = crate::settings::choice::<Scenario>(), default_value = "solder-joint")]
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
        /// Give the benchmark rock a BSE image of S times its size (1.5: a 3072² image for
        /// a 2048² field), drifted by a few pixels.
        #[arg(long, value_name = "S")]
        bse_scale: Option<f64>,
        /// Replace the folder's contents if it holds files (never a field's maps).
        #[arg(long)]
        force: bool,
    },
}

/// Runs `map` on one field into `out`; returns the report.
pub fn map_field(
    input: &std::path::Path,
    out: &std::path::Path,
    args: &MapArgs,
    resolved: Resolved,
) -> Result<crate::report::Report> {
    let Resolved {
        map: opts,
        metadata,
        bse_pixel_size,
        composition,
        ..
    } = resolved;
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
        limits: args.limits.checked()?,
        force: args.force,
        stream: crate::run::Stream::Never,
        also_reads: config_reads(args),
    };
    let stages = progress::Stages::new(args.quiet);
    let result = process_field(input, out, &job, &mut |stage| stages.stage(stage));
    stages.finish();
    result
}

/// The configuration file a command reads, which no output may replace.
fn config_reads(args: &MapArgs) -> Vec<(&'static str, PathBuf)> {
    args.config
        .iter()
        .map(|p| ("configuration file", p.clone()))
        .collect()
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
            let resolved = map.resolve()?;
            crate::settings::install_threads(resolved.threads)?;
            let report = map_field(&input, &output, &map, resolved)?;
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
            let resolved = map.resolve()?;
            crate::settings::install_threads(resolved.threads)?;
            fit(&inputs, &output, &map, resolved)
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
            // Refused before the options are resolved (a configuration file is one of them).
            let fixed = map.fixed_by_a_model();
            if !fixed.is_empty() {
                return Err(Error::options(
                    format!("{} cannot be given to apply", fixed.join(", ")),
                    "the model fixes the mapping options (fit a new model to change them); a BSE image is found with each field",
                ));
            }
            let resolved = map.resolve()?;
            crate::settings::install_threads(resolved.threads)?;
            let stream = if stream {
                crate::run::Stream::Always(strip_rows)
            } else if no_stream {
                crate::run::Stream::Never
            } else {
                crate::run::Stream::Auto
            };
            apply(
                &model,
                (&inputs, &output),
                (shard.as_deref(), jobs, stream),
                &map,
                resolved,
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
            let output = match output {
                Some(dir) => dir,
                None => new_temporary_folder("modalmap-demo")?,
            };
            let field = crate::synth::sample_field()?;
            let scratch = crate::report::Scratch::beside(&output)?;
            let input = scratch.path().join("sample-maps");
            let args = MapArgs {
                force,
                ..MapArgs::default()
            };
            crate::synth::write_folder(&field, &input)?;
            let report = map_field(&input, &output, &args, args.resolve()?)?;
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
                "  outputs in {}; the maps were generated into a temporary folder, now removed (`modalmap synth -o DIR` writes the same maps)",
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
            bse_scale,
            force,
        } => synth(
            &output,
            truth.as_deref(),
            scenario,
            crate::synth::RockKnobs {
                size,
                seed,
                yield_ramp,
                bse_scale,
            },
            force,
        ),
    }
}

/// `synth`: writes a synthetic field (and its true labels).
/// A path `PREFIX-N` in the system's temporary folder that does not exist yet (N counts up
/// from the process id), for a command's outputs when the user names no folder.
fn new_temporary_folder(prefix: &str) -> Result<PathBuf> {
    let tmp = std::env::temp_dir();
    let id = std::process::id();
    (0..1000u32)
        .map(|n| tmp.join(format!("{prefix}-{}", id.wrapping_add(n))))
        .find(|p| !p.exists())
        .ok_or_else(|| {
            Error::options(
                format!("no free name {prefix}-N in {}", tmp.display()),
                "name the output folder with -o DIR",
            )
        })
}

fn synth(
    output: &std::path::Path,
    truth: Option<&std::path::Path>,
    scenario: Scenario,
    knobs: crate::synth::RockKnobs,
    force: bool,
) -> Result<u8> {
    let field = crate::synth::write_scenario(output, truth, scenario, knobs, force)?;
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
fn fit(
    inputs: &[PathBuf],
    output: &std::path::Path,
    args: &MapArgs,
    resolved: Resolved,
) -> Result<u8> {
    let Resolved {
        map: opts,
        metadata,
        composition,
        ..
    } = resolved;
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
        limits: args.limits.checked()?,
        force: args.force,
        also_reads: config_reads(args),
    };
    let stages = progress::Stages::new(args.quiet);
    let fitted = crate::run::fit_model(inputs, output, &job, &mut |stage| stages.stage(stage));
    stages.finish();
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

/// `apply`: label fields with a saved model; `batch` is the shard (I/N), the fields at a
/// time and the streaming choice.
fn apply(
    model_path: &std::path::Path,
    (inputs, out): (&[PathBuf], &std::path::Path),
    (shard, jobs, stream): (Option<&str>, Option<usize>, crate::run::Stream),
    args: &MapArgs,
    resolved: Resolved,
) -> Result<u8> {
    let (model, reference) = PhaseModel::load(model_path)?;
    let valid = model.options.check()?;
    let Resolved {
        metadata,
        bse_pixel_size,
        composition,
        ..
    } = resolved;
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
        limits: args.limits.checked()?,
        force: args.force,
        stream,
        also_reads: vec![("model file", model_path.to_path_buf())],
    };
    let fields = progress::Fields::new(args.quiet);
    let batch = crate::run::apply_batch(
        inputs,
        out,
        (i, n),
        jobs,
        &job,
        &crate::run::BatchProgress {
            start: &|n| fields.start(n),
            stage: &|field, stage| fields.stage(field, stage),
            done: &|o| fields.done(o),
        },
    );
    fields.finish();
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
                "  {:>3}  {:<24} {:>10.2} {:>8} {:>17} {:>7}",
                p.id,
                p.name,
                100.0 * p.area_fraction_mean,
                crate::fields::sd_pct(&summary, p.area_fraction_sd)
                    .map_or("undefined".into(), |v| format!("{v:.2}")),
                crate::fields::pooled_ci_text(p, "–"),
                p.relative_accuracy_pct
                    .map_or("–".into(), |v| format!("{v:.1}"))
            );
        }
        println!(
            "  {:>3}  {:<24} {:>10.2}",
            0,
            "unassigned",
            100.0 * summary.unassigned_fraction_mean
        );
        println!("\n  outputs in {}", out.display());
    }
    Ok(0)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse_from(args: &[&str]) -> Cli {
        let m = command().try_get_matches_from(args).unwrap();
        <Cli as clap::FromArgMatches>::from_arg_matches(&m).unwrap()
    }

    fn long_help(sub: &str) -> String {
        let mut c = command();
        c.find_subcommand_mut(sub)
            .unwrap()
            .render_long_help()
            .to_string()
    }

    /// `apply --help` lists only what `apply` accepts; `map --help` still lists everything.
    #[test]
    fn apply_help_leaves_out_what_a_model_fixes() {
        let (apply, map) = (long_help("apply"), long_help("map"));
        for id in crate::settings::FIXED_BY_A_MODEL {
            let flag = format!("--{} ", id.replace('_', "-"));
            assert!(!apply.contains(&flag), "apply --help lists {flag}");
            assert!(map.contains(&flag), "map --help lacks {flag}");
        }
        for kept in ["--kv ", "--pixel-size ", "--bse-pixel-size ", "--kfactors "] {
            assert!(apply.contains(kept), "apply --help lacks {kept}");
        }
    }

    /// The hidden options still parse, so that `apply` refuses them by name, before it
    /// reads anything (the model file here does not exist).
    #[test]
    fn apply_refuses_what_a_model_fixes_by_name() {
        let cli = parse_from(&[
            "modalmap",
            "apply",
            "no-model.json",
            "field",
            "-o",
            "out",
            "--phases",
            "3",
            "--min-counts",
            "5",
        ]);
        let e = run(cli).unwrap_err();
        assert_eq!(e.kind, crate::ErrorKind::Options);
        assert!(
            e.to_string()
                .contains("--phases, --min-counts cannot be given to apply"),
            "{e}"
        );
    }
}
