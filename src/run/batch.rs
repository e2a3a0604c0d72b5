//! Batches of fields for `apply`: output names, resuming an interrupted batch, running
//! fields a few at a time through [`super::process_field`], and the batch summary.

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use super::{process_field, FieldJob, Labelling};
use crate::error::{Error, Result};
use crate::fields::ModelRef;
use crate::report::Report;

/// What happened to one field of a batch.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FieldOutcome {
    /// Field name (its output folder's name).
    pub field: String,
    /// Input path as given.
    pub input: String,
    /// Output folder.
    pub output: String,
    /// `ok` or `failed`.
    pub status: String,
    /// Error message, when it failed.
    #[serde(skip_serializing_if = "Option::is_none", default)]
    pub error: Option<String>,
    /// Number of phases with pixels, when it succeeded.
    #[serde(skip_serializing_if = "Option::is_none", default)]
    pub phases_present: Option<usize>,
}

/// True if `target` holds the complete output of an earlier run on `input` with this
/// model: a report of this field, made with the same model file (same SHA-256), from
/// files under `input`. (`apply` keeps such outputs instead of failing on them, so an
/// interrupted batch resumes where it stopped.)
pub fn done_earlier(target: &Path, input: &Path, model: &ModelRef) -> bool {
    let Ok(bytes) = crate::guard::read_regular(
        &target.join("report.json"),
        "report",
        crate::guard::MAX_JSON_BYTES,
    ) else {
        return false;
    };
    let Ok(report) = serde_json::from_slice::<Report>(&bytes) else {
        return false;
    };
    let from_input = report
        .provenance
        .inputs
        .first()
        .is_some_and(|f| Path::new(&f.path).starts_with(input));
    report
        .model
        .as_ref()
        .is_some_and(|m| m.sha256 == model.sha256)
        && report.field == crate::io::field_name(input)
        && from_input
}

/// Output folder names for a list of inputs: each input's field name, made unique by
/// `-2`, `-3`, ... in input order (so every shard names a field the same way).
pub fn output_names(inputs: &[PathBuf]) -> Vec<String> {
    let mut seen: Vec<String> = Vec::new();
    inputs
        .iter()
        .map(|p| {
            let base = crate::io::field_name(p);
            let mut name = base.clone();
            let mut k = 1;
            while seen.contains(&name) {
                k += 1;
                name = format!("{base}-{k}");
            }
            seen.push(name.clone());
            name
        })
        .collect()
}

/// Runs `fields` (input, output folder name) into `out`, `jobs` at a time, carrying on
/// past failures; `stage` hears (field, stage) as each field goes on (strips of a
/// montage included), `done` each finished field. Outcomes are in input order.
pub fn run_batch(
    fields: &[(PathBuf, String)],
    out: &Path,
    job: &FieldJob,
    jobs: usize,
    stage: &(dyn Fn(&str, &str) + Sync),
    done: &(dyn Fn(&FieldOutcome) + Sync),
) -> Vec<FieldOutcome> {
    use rayon::prelude::*;
    let run_one = |(input, name): &(PathBuf, String)| {
        let target = out.join(name);
        let r = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
            process_field(input, &target, job, &mut |s| stage(name, s))
        }))
        .unwrap_or_else(|_| {
            Err(Error::internal(format!(
                "labelling {} failed unexpectedly",
                input.display()
            )))
        });
        let outcome = FieldOutcome {
            field: name.clone(),
            input: input.display().to_string(),
            output: target.display().to_string(),
            status: if r.is_ok() { "ok" } else { "failed" }.into(),
            error: r.as_ref().err().map(|e| e.to_string()),
            phases_present: r
                .as_ref()
                .ok()
                .map(|rep| rep.phases.iter().filter(|p| p.pixels > 0).count()),
        };
        done(&outcome);
        outcome
    };
    match rayon::ThreadPoolBuilder::new()
        .num_threads(jobs.max(1))
        .build()
    {
        Ok(pool) if jobs > 1 => pool.install(|| fields.par_iter().map(run_one).collect()),
        _ => fields.iter().map(run_one).collect(),
    }
}

/// What [`apply_batch`] did.
#[derive(Debug, Clone)]
pub struct BatchResult {
    /// One outcome per field labelled in this run.
    pub outcomes: Vec<FieldOutcome>,
    /// Fields kept from an earlier run with the same model: (input, output name).
    pub kept: Vec<(PathBuf, String)>,
    /// The batch summary written (apply.json, or apply-I-of-N.json for a shard).
    pub summary: PathBuf,
}

/// Who hears how a batch goes.
pub struct BatchProgress<'a> {
    /// The number of fields to label, once known.
    pub start: &'a dyn Fn(usize),
    /// (field, stage) as each field goes through the stages.
    pub stage: &'a (dyn Fn(&str, &str) + Sync),
    /// Each field's outcome.
    pub done: &'a (dyn Fn(&FieldOutcome) + Sync),
}

/// Labels shard `i` of `n` of `inputs` with the job's saved model into folders of `out`,
/// `jobs` fields at a time, keeping fields an earlier run labelled with the same model
/// (unless the job forces), and writes the batch summary.
pub fn apply_batch(
    inputs: &[PathBuf],
    out: &Path,
    (i, n): (usize, usize),
    jobs: usize,
    job: &FieldJob,
    progress: &BatchProgress,
) -> Result<BatchResult> {
    let Labelling::Model { reference, .. } = job.labelling else {
        return Err(Error::internal("apply_batch needs a saved model"));
    };
    if out.is_file() {
        return Err(Error::output(
            out,
            "is a file, not a folder",
            "give a folder for the outputs (-o DIR)",
        ));
    }
    std::fs::create_dir_all(out).map_err(|e| {
        Error::output(
            out,
            format!("cannot be created: {e}"),
            "check that its parent folder exists and is writable",
        )
    })?;
    let all: Vec<(PathBuf, String)> = inputs.iter().cloned().zip(output_names(inputs)).collect();
    // Fields done by an earlier (interrupted) run with this model are kept.
    let (mine, kept): (Vec<_>, Vec<_>) = crate::fields::shard(&all, i, n)
        .into_iter()
        .partition(|(input, name)| job.force || !done_earlier(&out.join(name), input, reference));
    // Before any work: no field's output may replace an input of the batch.
    let fields: Vec<&Path> = all.iter().map(|(p, _)| p.as_path()).collect();
    let targets: Vec<PathBuf> = mine.iter().map(|(_, name)| out.join(name)).collect();
    job.check_outputs(&fields, &targets)?;
    (progress.start)(mine.len());
    let outcomes = run_batch(&mine, out, job, jobs, progress.stage, progress.done);
    let summary_name = if n > 1 {
        format!("apply-{i}-of-{n}.json")
    } else {
        "apply.json".into()
    };
    let summary = serde_json::json!({
        "model": reference,
        "shard": [i, n],
        "fields": outcomes,
        "kept": kept
            .iter()
            .map(|(input, name)| serde_json::json!({
                "field": name,
                "input": input.display().to_string(),
                "output": out.join(name).display().to_string(),
            }))
            .collect::<Vec<_>>(),
    });
    let text = serde_json::to_string_pretty(&summary)
        .map_err(|e| Error::internal(format!("summary encoding failed: {e}")))?;
    let summary = out.join(summary_name);
    crate::report::write_file_atomically(&summary, text.as_bytes())?;
    Ok(BatchResult {
        outcomes,
        kept,
        summary,
    })
}
