//! `fit`: one phase model from windows of several fields side by side, labelled by the
//! same fitting source as `map` ([`crate::pipeline::map_stack_with_progress`]) and named by
//! the same composition stage, written as a model file.

use std::path::{Path, PathBuf};

use crate::characterise::ValidCompositionOptions;
use crate::error::{Error, Result};
use crate::fields::PhaseModel;
use crate::io::{load_field, Limits};
use crate::map_options::ValidMapOptions;
use crate::stack::FieldMetadata;

/// Everything `fit` needs, resolved from the command line.
#[derive(Debug, Clone)]
pub struct FitJob<'a> {
    /// Mapping options.
    pub map: &'a ValidMapOptions,
    /// Composition options (the names of the model's phases come from them).
    pub composition: &'a ValidCompositionOptions,
    /// Metadata given on the command line (wins over the fields').
    pub metadata: FieldMetadata,
    /// Decoding limits.
    pub limits: Limits,
    /// Replace an existing model file.
    pub force: bool,
    /// Other files the command reads (configuration), which the model may not replace.
    pub also_reads: Vec<(&'static str, PathBuf)>,
}

/// A model fitted by [`fit_model`], and the window of each training field.
#[derive(Debug, Clone)]
pub struct Fitted {
    /// The model as written.
    pub model: PhaseModel,
    /// x, y, width, height of each field's training window, in map pixels.
    pub windows: Vec<[usize; 4]>,
}

/// Fits one model on windows of `inputs` side by side and writes it to `output`
/// (atomically); `progress` hears the stage names.
pub fn fit_model(
    inputs: &[PathBuf],
    output: &Path,
    job: &FitJob,
    progress: &mut dyn FnMut(&str),
) -> Result<Fitted> {
    check_model_output(inputs, output, job)?;
    let limits = job.limits;
    let mut fields = Vec::new();
    for input in inputs {
        let mut f = load_field(input, &limits)?;
        f.stack.override_metadata(&job.metadata);
        fields.push(f);
    }
    let named: Vec<(String, &crate::stack::MapStack)> = fields
        .iter()
        .map(|f| (f.input.display().to_string(), &f.stack))
        .collect();
    let options = job.map.options();
    let (training, windows) =
        crate::fields::training_stack(&named, options.prepare.bin, options.cluster.seed)?;
    let mut result = crate::pipeline::map_stack_with_progress(training, job.map, progress)?;
    crate::pipeline::characterise(&mut result, job.composition)?;
    let live: Vec<Option<f64>> = fields
        .iter()
        .map(|f| f.stack.metadata().live_time_s)
        .collect();
    let training = fields
        .iter()
        .zip(&windows)
        .map(|(f, w)| {
            Ok(crate::fields::TrainingField {
                field: f.name.clone(),
                window: *w,
                inputs: crate::report::hash_files(&f.files)?,
            })
        })
        .collect::<Result<Vec<_>>>()?;
    let model = PhaseModel {
        schema: crate::fields::MODEL_SCHEMA.into(),
        tool_version: env!("CARGO_PKG_VERSION").into(),
        elements: result.table.elements.clone(),
        options: *options,
        clusters: result.clusters.clone(),
        phases: result
            .table
            .phases
            .iter()
            .map(|p| crate::fields::ModelPhase {
                id: p.id,
                name: p.name.clone(),
                model_index: p.model_index,
                training_area_fraction: p.area_fraction,
            })
            .collect(),
        live_time_s: live[0].filter(|a| live.iter().all(|b| *b == Some(*a))),
        training,
    };
    let json = serde_json::to_string_pretty(&model)
        .map_err(|e| Error::internal(format!("model encoding failed: {e}")))?;
    crate::report::write_file_atomically(output, json.as_bytes())?;
    Ok(Fitted { model, windows })
}

/// Refuses a model file that is a folder, exists (without `force`), or would replace an
/// input of the fit.
fn check_model_output(inputs: &[PathBuf], output: &Path, job: &FitJob) -> Result<()> {
    if output.is_dir() {
        return Err(Error::output(
            output,
            "is a folder",
            "give the model a file name, e.g. -o model.json",
        ));
    }
    if output.exists() && !job.force {
        return Err(Error::output(
            output,
            "already exists",
            "choose another file name, or add --force to replace it",
        ));
    }
    use crate::guard::Input;
    let mut reads: Vec<Input> = inputs
        .iter()
        .map(|path| Input {
            what: "field",
            path,
        })
        .collect();
    reads.extend(
        job.also_reads
            .iter()
            .map(|(what, path)| Input { what, path }),
    );
    reads.extend(
        job.composition
            .input_files()
            .map(|(what, path)| Input { what, path }),
    );
    crate::guard::check_file_output(output, &reads)
}
