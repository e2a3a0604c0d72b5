//! One field end to end (load → label → compositions → BSE check → report → outputs), as
//! `map` and `apply` run it, and batches of fields for `apply`.
//!
//! The command line resolves options into a [`FieldJob`]; nothing here prints, progress is
//! reported through callbacks. `fit` (one model from several fields, [`fit`]) and batches
//! of fields (`apply`, [`batch`]) are in their own files.

use std::path::{Path, PathBuf};

use crate::advisor::Advice;
use crate::bse::{BseImage, Geometry};
use crate::characterise::{CompositionReport, ValidCompositionOptions};
use crate::chem::ElementInfo;
use crate::error::{Error, Result};
use crate::fields::{ModelRef, PhaseModel};
use crate::io::rows::StreamedField;
use crate::io::{load_field, BseSource, Limits};
use crate::map_options::ValidMapOptions;
use crate::phase_count::Decision;
use crate::phases::{ClearSums, PhaseTable};
use crate::refine::Segmentation;
use crate::report::Report;
use crate::stack::{FieldMetadata, MapStack};
use crate::xray_yield::YieldField;

mod batch;
mod fit;

pub use batch::{
    apply_batch, done_earlier, output_names, run_batch, BatchProgress, BatchResult, FieldOutcome,
};
pub use fit::{fit_model, FitJob, Fitted};

/// How a field's pixels are labelled.
#[derive(Debug, Clone, Copy)]
pub enum Labelling<'a> {
    /// Fit a model to this field (`map`).
    Fit,
    /// Use a saved model (`apply`): no refit, the model's phase ids and names.
    Model {
        /// The model.
        model: &'a PhaseModel,
        /// Its file and hash, for the report.
        reference: &'a ModelRef,
    },
}

/// Everything needed to run one field, resolved from the command line.
#[derive(Debug, Clone)]
pub struct FieldJob<'a> {
    /// Labelling.
    pub labelling: Labelling<'a>,
    /// Mapping options (for `apply`, the model's).
    pub map: &'a ValidMapOptions,
    /// Composition options.
    pub composition: &'a ValidCompositionOptions,
    /// Metadata given on the command line (wins over the field's).
    pub metadata: FieldMetadata,
    /// A BSE image given explicitly.
    pub bse_file: Option<PathBuf>,
    /// Skip the BSE check.
    pub no_bse: bool,
    /// BSE pixel size given on the command line.
    pub bse_pixel_size: Option<f64>,
    /// Decoding limits.
    pub limits: Limits,
    /// Replace a non-empty output folder.
    pub force: bool,
    /// Whether to label the field strip by strip (with a saved model only).
    pub stream: Stream,
    /// Other files the command reads (configuration, model), which no output may replace.
    pub also_reads: Vec<(&'static str, PathBuf)>,
}

impl FieldJob<'_> {
    /// Refuses an output folder that holds, or is, one of the job's inputs for `input`.
    pub fn check_output(&self, input: &Path, out: &Path) -> Result<()> {
        self.check_outputs(&[input], &[out.to_path_buf()])
    }

    /// Refuses output folders that hold, or are, a field of `fields` or another input of
    /// the job.
    pub fn check_outputs(&self, fields: &[&Path], outs: &[PathBuf]) -> Result<()> {
        use crate::guard::Input;
        let mut inputs: Vec<Input> = fields
            .iter()
            .map(|path| Input {
                what: "field",
                path,
            })
            .collect();
        inputs.extend(self.bse_file.iter().map(|p| Input {
            what: "BSE image",
            path: p,
        }));
        inputs.extend(
            self.composition
                .input_files()
                .map(|(what, path)| Input { what, path }),
        );
        inputs.extend(
            self.also_reads
                .iter()
                .map(|(what, p)| Input { what, path: p }),
        );
        crate::guard::check_no_overlap(outs, &inputs)
    }
}

/// When a field is labelled strip by strip ([`crate::montage`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Stream {
    /// Never: load it whole.
    Never,
    /// When a folder of PNG maps holds more than [`STREAM_ABOVE_VALUES`] values.
    Auto,
    /// Always, with this strip height (rows of the labelling grid) if given.
    Always(Option<usize>),
}

/// Fields with more values (pixels × elements) than this are streamed by `apply` when they
/// can be (1 GiB as 32-bit floats).
pub const STREAM_ABOVE_VALUES: u64 = 1 << 28;

/// Runs one field into `out` (atomically); `progress` hears the stage names.
///
/// One path for every field: a field source (read whole, or strip by strip with a saved
/// model) labels it, with a model fitted here or the job's saved model, into a
/// [`LabelledField`]; the shared tail ([`finish_field`]) then takes it through the
/// compositions, the BSE check, the report and the outputs.
pub fn process_field(
    input: &Path,
    out: &Path,
    job: &FieldJob,
    progress: &mut dyn FnMut(&str),
) -> Result<Report> {
    job.check_output(input, out)?;
    let strips = match job.labelling {
        Labelling::Model { model, .. } => strip_choice(input, job).map(|rows| (model, rows)),
        Labelling::Fit => None,
    };
    let dir = crate::report::prepare_output(out, job.force)?;
    let field = match strips {
        Some((model, rows)) => label_strips(input, job, model, rows, &dir.recovered, progress)?,
        None => label_whole(input, job, &dir.recovered, progress)?,
    };
    finish_field(dir, field, job, progress)
}

/// A field labelled by one of the field sources, handed to the shared tail.
struct LabelledField {
    name: String,
    /// Every file read (maps, BSE image, k-factor and library files), for the provenance.
    files: Vec<PathBuf>,
    warnings: Vec<String>,
    lines: Vec<(ElementInfo, Option<String>)>,
    metadata: FieldMetadata,
    table: PhaseTable,
    segmentation: Segmentation,
    decision: Decision,
    min_counts_used: f64,
    xray_yield: YieldField,
    counts: Counts,
    /// The BSE image and how it relates to the maps, when the check runs.
    bse: Option<(BseImage, Geometry)>,
}

/// The counts behind a labelled field, for its compositions.
enum Counts {
    /// The field held whole, on the label grid.
    Whole(MapStack),
    /// A field read strip by strip: the interior sums added over the strips (by model
    /// index), and the field, read whole a third time only if a thin phase needs unmixing
    /// and the field fits in memory.
    Strips {
        clear: ClearSums,
        field: StreamedField,
    },
}

/// Field source 1: the field read whole, labelled by a model fitted here or the job's
/// saved model. `recovered` are the output folder's warnings, reported after the loader's.
fn label_whole(
    input: &Path,
    job: &FieldJob,
    recovered: &[String],
    progress: &mut dyn FnMut(&str),
) -> Result<LabelledField> {
    let Inputs {
        stack,
        name,
        files,
        mut warnings,
        bse,
        geometry,
    } = load_inputs(input, job)?;
    warnings.extend(recovered.iter().cloned());
    let result = label(stack, job, &mut warnings, progress)?;
    let crate::pipeline::MapResult {
        decision,
        segmentation,
        table,
        counts,
        min_counts_used,
        xray_yield,
        ..
    } = result;
    Ok(LabelledField {
        name,
        files,
        warnings,
        lines: counts
            .maps()
            .iter()
            .map(|m| (m.element, m.line.clone()))
            .collect(),
        metadata: counts.metadata().clone(),
        table,
        segmentation,
        decision,
        min_counts_used,
        xray_yield,
        counts: Counts::Whole(counts),
        bse: bse.map(|img| (img, geometry)),
    })
}

/// Field source 2: a field too big to hold whole, labelled strip by strip with a saved
/// model ([`crate::montage`]); `strip` is the strip height if given.
fn label_strips(
    input: &Path,
    job: &FieldJob,
    model: &PhaseModel,
    strip: Option<usize>,
    recovered: &[String],
    progress: &mut dyn FnMut(&str),
) -> Result<LabelledField> {
    let mut field = StreamedField::open(input, &job.limits)?;
    field.metadata.override_with(&job.metadata);
    model.check_symbols(&field.symbols(), input)?;
    let mut warnings = std::mem::take(&mut field.warnings);
    warnings.extend(recovered.iter().cloned());
    if !job.no_bse && field.has_bse {
        warnings.push(
            "the BSE check is not run on a field labelled strip by strip (a montage); check the contrast on a field small enough to map whole".into(),
        );
    }
    let crate::montage::Streamed {
        table,
        segmentation,
        clear,
        min_counts_used,
        ..
    } = crate::montage::label_streamed(
        &mut field,
        job.map,
        &model.clusters,
        &model.order(),
        strip,
        &mut |done, all| progress(&format!("strip {done} of {all}")),
    )?;
    let mut files = field.files.clone();
    add_composition_inputs(&mut files, job);
    Ok(LabelledField {
        name: field.name.clone(),
        files,
        warnings,
        lines: field.lines.clone(),
        metadata: field.metadata.clone(),
        table,
        segmentation,
        decision: Decision::saved_model(job.map.cluster().get().phases),
        min_counts_used,
        xray_yield: YieldField::not_estimated(
            "not estimated when the field is labelled strip by strip (--stream)",
        ),
        counts: Counts::Strips { clear, field },
        bse: None,
    })
}

/// The shared tail of every field: compositions, the saved model's names, the BSE check,
/// then the report and every output written into `dir`, committed at the end.
fn finish_field(
    dir: crate::report::OutputDir,
    mut field: LabelledField,
    job: &FieldJob,
    progress: &mut dyn FnMut(&str),
) -> Result<Report> {
    progress("compositions");
    let (composition, advice) = compositions(&mut field, job)?;
    let model_ref = match job.labelling {
        Labelling::Model { model, reference } => {
            use_model_names(&mut field.table, model);
            Some(reference)
        }
        Labelling::Fit => None,
    };
    let bse = match &field.bse {
        Some((img, geometry)) => {
            progress("BSE check");
            let _t = crate::profile::stage("bse check");
            let seg = &field.segmentation;
            Some(crate::bse::check(
                img,
                &seg.labels,
                seg.width,
                seg.height,
                &field.table,
                *geometry,
            )?)
        }
        None => None,
    };
    let labelled = crate::report::Labelled {
        table: &field.table,
        segmentation: &field.segmentation,
        decision: &field.decision,
        min_counts_used: field.min_counts_used,
        xray_yield: &field.xray_yield,
        metadata: &field.metadata,
        lines: &field.lines,
        counts: match &field.counts {
            Counts::Whole(stack) => Some(stack),
            Counts::Strips { .. } => None,
        },
    };
    let findings = crate::report::Findings {
        bse: bse.as_ref(),
        composition: &composition,
        advisor: &advice,
        model: model_ref,
    };
    let t = crate::profile::stage("report (hashes)");
    let report = crate::report::build(
        &field.name,
        &field.files,
        &labelled,
        job.map.options(),
        field.warnings.clone(),
        findings,
    )?;
    drop(t);
    let _t = crate::profile::stage("write outputs");
    crate::report::write_outputs(&dir, &report, &labelled, bse.as_ref())?;
    dir.commit()?;
    Ok(report)
}

/// Compositions, reference names and beam advice of a labelled field, from the counts
/// its source kept ([`crate::characterise`]); notes on what could not be done go to the
/// field's warnings.
fn compositions(field: &mut LabelledField, job: &FieldJob) -> Result<(CompositionReport, Advice)> {
    let seg = &field.segmentation;
    let (clear, streamed) = match &mut field.counts {
        Counts::Whole(stack) => {
            let _t = crate::profile::stage("composition");
            return crate::characterise::characterise(
                &mut field.table,
                &seg.labels,
                seg.width,
                seg.height,
                stack,
                job.composition,
            );
        }
        Counts::Strips { clear, field } => (clear, field),
    };
    let model_index: Vec<usize> = field.table.phases.iter().map(|p| p.model_index).collect();
    let whole = std::cell::RefCell::new((streamed, None));
    let bin = job.map.options().prepare.bin;
    let max_values = job.limits.max_field_values();
    let unmix = |wanted: &[bool]| -> Option<crate::unmix::Unmixing> {
        let mut w = whole.borrow_mut();
        let stack = match w.0.read_whole(bin, max_values) {
            Ok(Some(s)) => s,
            Ok(None) => {
                w.1 = Some("the field is too large to hold whole, so phases without interior pixels are not unmixed from their neighbours (raise --max-pixels to allow it)".to_string());
                return None;
            }
            Err(e) => {
                w.1 = Some(format!(
                    "phases without interior pixels are not unmixed: {e}"
                ));
                return None;
            }
        };
        let planes: Vec<&[f32]> = stack.maps().iter().map(|m| m.counts.as_slice()).collect();
        crate::unmix::unmix(&seg.labels, seg.width, seg.height, &planes, wanted)
    };
    let found = crate::characterise::characterise_with(
        &mut field.table,
        &field.lines,
        &field.metadata,
        &|r| {
            let by_model = clear.at(r);
            model_index.iter().map(|&m| by_model[m].clone()).collect()
        },
        &unmix,
        job.composition,
    )?;
    field.warnings.extend(whole.into_inner().1);
    Ok(found)
}

/// Whether a field labelled with a saved model is streamed, and with which strip height
/// (`None` for the default): always with `--stream`, and by default when a folder of PNG
/// maps holds more than [`STREAM_ABOVE_VALUES`] values.
fn strip_choice(input: &Path, job: &FieldJob) -> Option<Option<usize>> {
    match job.stream {
        Stream::Never => None,
        Stream::Always(rows) => Some(rows),
        Stream::Auto => {
            let limits = job.limits;
            let big = crate::io::rows::StreamedField::open(input, &limits)
                .is_ok_and(|f| streams_automatically(f.width, f.height, f.lines.len()));
            big.then_some(None)
        }
    }
}

/// Whether a field of `maps` maps of `width × height` is streamed when the user leaves it
/// to `apply`: above [`STREAM_ABOVE_VALUES`] values.
fn streams_automatically(width: usize, height: usize, maps: usize) -> bool {
    (width as u64)
        .saturating_mul(height as u64)
        .saturating_mul(maps as u64)
        > STREAM_ABOVE_VALUES
}

/// A field's inputs, loaded and checked.
struct Inputs {
    stack: crate::stack::MapStack,
    name: String,
    /// Every file read (maps, BSE image, k-factor and library files), for the provenance.
    files: Vec<PathBuf>,
    warnings: Vec<String>,
    bse: Option<crate::bse::BseImage>,
    /// How the BSE image relates to the maps.
    geometry: crate::bse::Geometry,
}

/// Loads a field and its BSE image (unless the job skips it) and checks them against the
/// job: the model's elements, the pixel sizes the BSE check needs.
fn load_inputs(input: &Path, job: &FieldJob) -> Result<Inputs> {
    let t = crate::profile::stage("load");
    let limits = job.limits;
    let mut field = load_field(input, &limits)?;
    drop(t);
    field.stack.override_metadata(&job.metadata);
    if let Labelling::Model { model, .. } = job.labelling {
        model.check_elements(&field.stack, input)?;
    }
    let map_size = (field.stack.width(), field.stack.height());
    let map_pixel_um = field.stack.metadata().pixel_size_um;
    // Both values were range-checked where they came from (the flag, or field.toml).
    let bse_pixel_size = job
        .bse_pixel_size
        .or(field.stack.metadata().bse_pixel_size_um);
    if bse_pixel_size.is_some() && map_pixel_um.is_none() {
        let from = if job.bse_pixel_size.is_some() {
            "--bse-pixel-size".to_string()
        } else {
            format!("bse_pixel_size_um in {}", input.display())
        };
        return Err(Error::options(
            format!("{from} needs the maps' pixel size too"),
            "set pixel_size_um in field.toml or give --pixel-size",
        ));
    }
    let bse_source = if job.no_bse {
        None
    } else {
        job.bse_file
            .clone()
            .map(BseSource::File)
            .or(field.bse.clone())
    };
    // The BSE image shares the field's memory budget with the maps (at least one map's
    // worth is left to it).
    let stack_values = (map_size.0 * map_size.1 * field.stack.maps().len()) as u64;
    let bse_limits = Limits {
        max_pixels: limits
            .max_field_values()
            .saturating_sub(stack_values)
            .max(limits.max_pixels),
    };
    let bse = bse_source
        .as_ref()
        .map(|s| crate::io::load_bse(s, &bse_limits))
        .transpose()?;
    let crate::io::LoadedField {
        stack,
        name,
        mut files,
        mut warnings,
        skipped,
        ..
    } = field;
    warnings.extend(crate::io::dropped_inputs(&skipped));
    add_composition_inputs(&mut files, job);
    // The BSE image is an input too.
    if let Some(BseSource::File(p)) = bse_source {
        if !files.contains(&p) {
            files.push(p);
        }
    }
    Ok(Inputs {
        stack,
        name,
        files,
        warnings,
        bse,
        geometry: crate::bse::Geometry {
            map_size,
            bin: job.map.options().prepare.bin,
            pixel_sizes_um: map_pixel_um.zip(bse_pixel_size),
        },
    })
}

/// Labels the field: a model fitted here, or the job's saved model (with a warning when
/// the field's live time differs from the model's training fields').
fn label(
    stack: crate::stack::MapStack,
    job: &FieldJob,
    warnings: &mut Vec<String>,
    progress: &mut dyn FnMut(&str),
) -> Result<crate::pipeline::MapResult> {
    match job.labelling {
        Labelling::Fit => crate::pipeline::map_stack_with_progress(stack, job.map, progress),
        Labelling::Model { model, .. } => {
            if let (Some(a), Some(b)) = (model.live_time_s, stack.metadata().live_time_s) {
                if (a - b).abs() > 0.05 * a {
                    warnings.push(format!(
                        "this field's live time ({b} s) differs from the model's training fields ({a} s): counts scale with live time, so phases may be mislabelled; fit a model on fields acquired alike"
                    ));
                }
            }
            progress("labelling pixels with the model");
            crate::pipeline::label_with_model(stack, job.map, &model.clusters, &model.order())
        }
    }
}

/// k-factor and library files are inputs too: their hashes go into the provenance.
fn add_composition_inputs(files: &mut Vec<PathBuf>, job: &FieldJob) {
    for (_, p) in job.composition.input_files() {
        if !files.iter().any(|f| f == p) {
            files.push(p.to_path_buf());
        }
    }
}

/// One model, one set of names: the model's, whatever each field's phases match.
fn use_model_names(table: &mut crate::phases::PhaseTable, model: &PhaseModel) {
    for (p, m) in table.phases.iter_mut().zip(&model.phases) {
        p.name = m.name.clone();
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// 2²⁸ values (1 GiB as 32-bit floats) are held whole; one more map or row streams.
    #[test]
    fn fields_above_a_gibibyte_of_values_stream() {
        assert!(!streams_automatically(8192, 8192, 4));
        assert!(streams_automatically(8192, 8192, 5));
        assert!(streams_automatically(8192, 8193, 4));
        assert!(!streams_automatically(2048, 2048, 10));
        // No overflow on absurd headers.
        assert!(streams_automatically(usize::MAX, 2, 1));
    }
}
