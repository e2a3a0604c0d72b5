//! The command line: clap definitions and the dispatch to the library.
//!
//! This is the only module that prints. Each subcommand turns its arguments into the
//! library's types, calls the library, and reports.

use std::path::PathBuf;

use clap::{Parser, Subcommand};

use crate::error::{Error, Result};
use crate::io::{load_field, Limits};

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
    /// Write a synthetic field with known phases (an invented scenario) as a maps folder.
    Synth {
        /// Folder to write the maps, BSE image and field.toml into.
        #[arg(short, long)]
        output: PathBuf,
        /// Also write the true labels (16-bit PNG, 0 = void) to this file.
        #[arg(long, value_name = "FILE")]
        truth: Option<PathBuf>,
    },
}

/// Runs a parsed command line; returns the process exit code on success.
pub fn run(cli: Cli) -> Result<u8> {
    match cli.command {
        Command::Inspect {
            input,
            json,
            limits,
        } => {
            let field = load_field(
                &input,
                &Limits {
                    max_pixels: limits.max_pixels,
                },
            )?;
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
        Command::Synth { output, truth } => {
            let field = crate::synth::sample_field()?;
            crate::synth::write_folder(&field, &output)?;
            if let Some(t) = truth {
                crate::io::raster::write_png_u16(
                    &t,
                    field.stack.width(),
                    field.stack.height(),
                    &field.truth,
                )?;
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
    }
}
