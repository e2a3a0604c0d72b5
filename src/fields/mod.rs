//! Many fields: one saved phase model for all of them (`fit`), labelling with it (`apply`,
//! in shards), and pooling the fields' reports (`merge`).
//!
//! **Model file** (`modalmap.model/1`, JSON): the element list, the `map` options (feature
//! transform, clustering, spatial prior), the fitted clusters, the phases in id order with
//! their names, and the training fields with their windows and input hashes. A model only
//! labels fields with exactly its elements.
//!
//! **Fitting.** Each training field gives a window of the same size at a seeded random
//! place (so every field weighs the same, whatever its size); the windows are set side by
//! side, separated by a strip of empty pixels (which the pipeline treats as pores, so no
//! spatial step couples two fields), and mapped as one field with the `map` pipeline. The
//! phases are numbered by their area on the training windows.
//!
//! **Pooling** follows the field-to-field statistics of quantitative metallography
//! (ASTM E562, E1245): per phase the mean area fraction over n fields, the sample standard
//! deviation s, the 95 % interval mean ± t₀.₉₇₅,ₙ₋₁ · s/√n and the relative accuracy
//! %RA = 100 · (t s/√n) / mean.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use rand::Rng;
use serde::{Deserialize, Serialize};

use crate::cluster::Clusters;
use crate::error::{Error, Result};
use crate::map_options::MapOptions;
use crate::phases::mean_ci;
use crate::report::{InputFile, Report};
use crate::stack::{ElementMap, MapStack};

mod summary;

pub use summary::AREAS_PNG_ZOOM;

pub use summary::{pooled_ci_text, sd_pct, summary_csv, summary_html};

/// The model file's schema name and version.
pub const MODEL_SCHEMA: &str = "modalmap.model/1";

/// The merged summary's schema name and version.
pub const SUMMARY_SCHEMA: &str = "modalmap.summary/2";

/// Most pixels of all training windows together (common practice, no source: the fit
/// itself samples at most 200 000 pixels; windows this size keep the spatial steps
/// meaningful).
pub const TRAINING_PIXELS: usize = 2_000_000;

/// Empty columns between training windows.
pub const GAP_PX: usize = 4;

/// One phase of a model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelPhase {
    /// Phase id in every output made with the model.
    pub id: u16,
    /// Name.
    pub name: String,
    /// Index of the phase in the clusters.
    pub model_index: usize,
    /// Area fraction on the training windows.
    pub training_area_fraction: f64,
}

/// One training field.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrainingField {
    /// Field name.
    pub field: String,
    /// Window used: x, y, width, height in map pixels.
    pub window: [usize; 4],
    /// Its input files and their SHA-256.
    pub inputs: Vec<InputFile>,
}

/// A saved phase model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PhaseModel {
    /// Schema name and version.
    pub schema: String,
    /// Version of modalmap that wrote it.
    pub tool_version: String,
    /// Element symbols, in the order of the clusters' dimensions.
    pub elements: Vec<String>,
    /// The `map` options of the fit (applied again when labelling).
    pub options: MapOptions,
    /// The fitted clusters.
    pub clusters: Clusters,
    /// Phases in id order.
    pub phases: Vec<ModelPhase>,
    /// Live time of the training fields, s, when known and equal.
    pub live_time_s: Option<f64>,
    /// The training fields.
    pub training: Vec<TrainingField>,
}

pub use crate::report::ModelRef;

impl PhaseModel {
    /// Reads and checks a model file; returns it with a reference for reports.
    pub fn load(path: &Path) -> Result<(PhaseModel, ModelRef)> {
        let bytes = crate::guard::read_regular(path, "model file", crate::guard::MAX_JSON_BYTES)?;
        let value: serde_json::Value = serde_json::from_slice(&bytes).map_err(|e| {
            Error::input(
                path,
                format!("is not a modalmap model (not JSON: {e})"),
                "give a model file written by `modalmap fit`",
            )
        })?;
        let schema = value.get("schema").and_then(|s| s.as_str()).unwrap_or("");
        if schema != MODEL_SCHEMA {
            return Err(Error::input(
                path,
                format!(
                    "is a model of schema \"{schema}\"; this modalmap reads \"{MODEL_SCHEMA}\""
                ),
                "fit the model again with this version (`modalmap fit`)",
            ));
        }
        let mut model: PhaseModel = serde_json::from_value(value).map_err(|e| {
            Error::input(
                path,
                format!("is a damaged model file: {e}"),
                "fit the model again (`modalmap fit`)",
            )
        })?;
        model
            .check()
            .map_err(|p| tampered(path, p, "fit the model again (`modalmap fit`)"))?;
        let sha = crate::report::sha256_hex(&bytes);
        Ok((
            model,
            ModelRef {
                path: path.display().to_string(),
                sha256: sha,
                schema: MODEL_SCHEMA.into(),
            },
        ))
    }

    /// Checks that the elements, clusters and phases agree (see the module docs); returns
    /// what is wrong.
    pub fn check(&mut self) -> std::result::Result<(), String> {
        self.clusters.check()?;
        let (k, d) = (self.clusters.k(), self.clusters.d());
        if self.elements.len() != d {
            return Err(format!(
                "{} elements but clusters of {d} dimensions",
                self.elements.len()
            ));
        }
        let mut seen = std::collections::BTreeSet::new();
        for e in &self.elements {
            if crate::chem::element(e).is_none() || !seen.insert(e) {
                return Err(format!("the element {e:?} is unknown or repeated"));
            }
        }
        if self.phases.len() != k {
            return Err(format!("{} phases but {k} clusters", self.phases.len()));
        }
        let mut used = vec![false; k];
        for (i, p) in self.phases.iter().enumerate() {
            if usize::from(p.id) != i + 1 {
                return Err(format!("phase ids are not 1 to {k} in order"));
            }
            if p.model_index >= k || std::mem::replace(&mut used[p.model_index], true) {
                return Err(format!(
                    "phase {} points at cluster {}, which is missing or taken by another phase",
                    p.id, p.model_index
                ));
            }
            if p.name.chars().count() > MAX_NAME_CHARS || p.name.chars().any(char::is_control) {
                return Err(format!(
                    "phase {}'s name is longer than {MAX_NAME_CHARS} characters or holds control characters",
                    p.id
                ));
            }
            if !(0.0..=1.0).contains(&p.training_area_fraction) {
                return Err(format!(
                    "phase {}'s training area fraction is {}, outside 0 to 1",
                    p.id, p.training_area_fraction
                ));
            }
        }
        if self
            .phases
            .iter()
            .map(|p| p.training_area_fraction)
            .sum::<f64>()
            > 1.0 + 1e-6
        {
            return Err("the training area fractions add up to more than 1".into());
        }
        if self
            .live_time_s
            .is_some_and(|t| !(t.is_finite() && t > 0.0))
        {
            return Err("the live time is not a positive number".into());
        }
        self.clusters.refresh().map_err(|e| e.to_string())
    }

    /// The model's phase order: model indices in id order.
    pub fn order(&self) -> Vec<usize> {
        self.phases.iter().map(|p| p.model_index).collect()
    }

    /// Refuses a field whose elements differ from the model's.
    pub fn check_elements(&self, stack: &MapStack, field: &Path) -> Result<()> {
        self.check_symbols(&stack.symbols(), field)
    }

    /// Refuses a field whose element symbols (by atomic number) differ from the model's.
    pub fn check_symbols(&self, have: &[&str], field: &Path) -> Result<()> {
        if have != self.elements.iter().map(String::as_str).collect::<Vec<_>>() {
            return Err(Error::input(
                field,
                format!(
                    "has the elements {}, but the model was fitted on {}",
                    have.join(", "),
                    self.elements.join(", ")
                ),
                "label it with a model fitted on fields with the same element maps, or add or remove maps",
            ));
        }
        Ok(())
    }
}

/// Training windows side by side (see the module docs). `bin` keeps windows and gaps
/// whole multiples of the binning factor. Returns the combined stack and each field's
/// window.
pub fn training_stack(
    fields: &[(String, &MapStack)],
    bin: usize,
    seed: u64,
) -> Result<(MapStack, Vec<[usize; 4]>)> {
    let first = fields
        .first()
        .ok_or_else(|| Error::options("no field given", "give at least one field to fit on"))?;
    let symbols = first.1.symbols();
    for (name, s) in fields {
        if s.symbols() != symbols {
            return Err(Error::input(
                Path::new(name),
                format!(
                    "has the elements {}, but {} has {}",
                    s.symbols().join(", "),
                    first.0,
                    symbols.join(", ")
                ),
                "fit a model on fields mapped for the same elements",
            ));
        }
    }
    let n = fields.len();
    let cap = ((TRAINING_PIXELS / n) as f64).sqrt() as usize;
    let round = |v: usize| (v / bin) * bin;
    let ww = round(
        fields
            .iter()
            .map(|f| f.1.width())
            .min()
            .unwrap_or(0)
            .min(cap.max(bin)),
    );
    let wh = round(
        fields
            .iter()
            .map(|f| f.1.height())
            .min()
            .unwrap_or(0)
            .min(cap.max(bin)),
    );
    if ww == 0 || wh == 0 {
        return Err(Error::input(
            Path::new(&first.0),
            "is too small to fit on",
            "fit on fields of at least a few pixels, or bin less",
        ));
    }
    let gap = GAP_PX.div_ceil(bin) * bin;
    let width = n * ww + (n - 1) * gap;
    let mut rng = crate::cluster::Seed(seed).windows();
    let windows: Vec<[usize; 4]> = fields
        .iter()
        .map(|(_, s)| {
            let x = round(rng.random_range(0..=s.width() - ww));
            let y = round(rng.random_range(0..=s.height() - wh));
            [x, y, ww, wh]
        })
        .collect();
    let maps: Vec<ElementMap> = (0..symbols.len())
        .map(|e| {
            let mut counts = vec![0f32; width * wh];
            for (f, ((_, s), w)) in fields.iter().zip(&windows).enumerate() {
                let src = &s.maps()[e].counts;
                let x0 = f * (ww + gap);
                for y in 0..wh {
                    let from = (w[1] + y) * s.width() + w[0];
                    counts[y * width + x0..y * width + x0 + ww]
                        .copy_from_slice(&src[from..from + ww]);
                }
            }
            ElementMap {
                element: first.1.maps()[e].element,
                line: first.1.maps()[e].line.clone(),
                counts,
                source: "training windows".into(),
            }
        })
        .collect();
    let stack = MapStack::new(
        Path::new("training windows"),
        width,
        wh,
        maps,
        first.1.metadata().clone(),
    )?;
    Ok((stack, windows))
}

/// The fields of shard `i` of `n` (1-based): every n-th field starting at the i-th, in
/// the order given, so shards are deterministic and balanced.
pub fn shard<T: Clone>(items: &[T], i: usize, n: usize) -> Vec<T> {
    items
        .iter()
        .enumerate()
        .filter(|(k, _)| k % n == i - 1)
        .map(|(_, x)| x.clone())
        .collect()
}

/// Parses `I/N` (1 ≤ I ≤ N).
pub fn parse_shard(s: &str) -> std::result::Result<(usize, usize), String> {
    let (i, n) = s
        .split_once('/')
        .ok_or_else(|| format!("`{s}` is not I/N"))?;
    let (i, n): (usize, usize) = (
        i.trim()
            .parse()
            .map_err(|_| format!("`{i}` is not a number"))?,
        n.trim()
            .parse()
            .map_err(|_| format!("`{n}` is not a number"))?,
    );
    if n == 0 || i == 0 || i > n {
        return Err(format!("shard {i}/{n}: need 1 ≤ I ≤ N"));
    }
    Ok((i, n))
}

/// Field-to-field statistics of one phase.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PooledPhase {
    /// Phase id (the model's).
    pub id: u16,
    /// Name (the model's).
    pub name: String,
    /// Fields pooled.
    pub fields: usize,
    /// Mean area fraction over the fields, 0..1.
    pub area_fraction_mean: f64,
    /// Sample standard deviation of the fields' area fractions.
    pub area_fraction_sd: f64,
    /// 95 % interval of the mean (Student t, n − 1 degrees of freedom).
    /// `None` with one field: the field-to-field spread is undefined.
    pub area_fraction_ci95: Option<[f64; 2]>,
    /// Two-sided 95 % t quantile used.
    pub t_quantile: f64,
    /// Relative accuracy, % (half-width of the interval over the mean).
    pub relative_accuracy_pct: Option<f64>,
    /// Composition, wt%, pooled over the fields weighted by the pixels each was summed
    /// over.
    pub composition_wt: BTreeMap<String, f64>,
    /// Standard deviation of the fields' compositions, wt%, weighted by the pixels each
    /// was summed over; empty with one field (undefined).
    #[serde(default)]
    pub composition_wt_sd_between_fields: BTreeMap<String, f64>,
    /// What the compositions are relative to (the fields' basis, or "mixed").
    #[serde(default)]
    pub composition_basis: String,
    /// Features over all fields; `particles` in summary schema 1, still read.
    #[serde(alias = "particles")]
    pub features: usize,
    /// Pixels over all fields.
    pub pixels: usize,
}

/// One pooled field.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PooledField {
    /// Field name.
    pub field: String,
    /// Its report.
    pub report: String,
    /// Its phases' area fractions, 0..1, in the order of the summary's phases.
    #[serde(default)]
    pub area_fractions: Vec<f64>,
    /// Its unassigned fraction, 0..1.
    #[serde(default)]
    pub unassigned_fraction: f64,
}

/// `summary.json`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Summary {
    /// Schema name and version.
    pub schema: String,
    /// The model every field was labelled with.
    pub model: ModelRef,
    /// The fields pooled.
    pub fields: Vec<PooledField>,
    /// Per phase, in id order.
    pub phases: Vec<PooledPhase>,
    /// Mean unassigned fraction.
    pub unassigned_fraction_mean: f64,
    /// Sample standard deviation of the fields' unassigned fractions (0 with one field).
    #[serde(default)]
    pub unassigned_fraction_sd: f64,
    /// 95 % interval of the mean unassigned fraction; `None` with one field.
    #[serde(default)]
    pub unassigned_fraction_ci95: Option<[f64; 2]>,
    /// How the statistics were computed.
    pub method: String,
    /// Limits of what the numbers mean.
    pub cautions: Vec<String>,
}

/// Longest phase or field name accepted in a model or report (common practice, no source:
/// far more than any name a person gives, small enough for every figure).
pub const MAX_NAME_CHARS: usize = 200;

/// Most phases in a model (the labels are 16-bit; common practice, no source).
pub const MAX_PHASES: usize = 256;

fn tampered(path: &Path, problem: String, what: &str) -> Error {
    Error::input(
        path,
        format!("is inconsistent: {problem}"),
        format!("{what}; a file edited by hand or damaged in copying cannot be trusted"),
    )
}

/// Refuses a report whose numbers cannot be right: area fractions outside [0, 1] or
/// summing to more than 1, repeated phase ids, names too long to show.
pub fn check_report(path: &Path, r: &Report) -> Result<()> {
    let redo = "label the field again with `modalmap apply`";
    let frac = |v: f64| v.is_finite() && (0.0..=1.0).contains(&v);
    if r.phases.len() > MAX_PHASES || r.field.chars().count() > MAX_NAME_CHARS {
        return Err(tampered(
            path,
            format!("{} phases or a field name too long", r.phases.len()),
            redo,
        ));
    }
    if !frac(r.unassigned_fraction) {
        return Err(tampered(
            path,
            format!("its unassigned fraction is {}", r.unassigned_fraction),
            redo,
        ));
    }
    let mut ids = std::collections::BTreeSet::new();
    for p in &r.phases {
        if !frac(p.area_fraction) {
            return Err(tampered(
                path,
                format!(
                    "phase {} ({}) has the area fraction {}, outside 0 to 1",
                    p.id, p.name, p.area_fraction
                ),
                redo,
            ));
        }
        if !ids.insert(p.id) || p.name.chars().count() > MAX_NAME_CHARS {
            return Err(tampered(
                path,
                format!("phase id {} repeated or its name too long", p.id),
                redo,
            ));
        }
        if p.composition_wt.values().any(|v| !v.is_finite()) {
            return Err(tampered(
                path,
                format!("phase {} has a composition that is not a number", p.id),
                redo,
            ));
        }
    }
    let total: f64 = r.phases.iter().map(|p| p.area_fraction).sum::<f64>() + r.unassigned_fraction;
    if total > 1.0 + 1e-6 {
        return Err(tampered(
            path,
            format!(
                "its area fractions and the unassigned fraction add up to {:.4}, more than 1",
                total
            ),
            redo,
        ));
    }
    Ok(())
}

/// Pools reports made with one model. `reports` are (path of report.json, report); each
/// must list the same phases (a phase absent from a field is listed with area 0).
pub fn merge(reports: &[(PathBuf, Report)]) -> Result<Summary> {
    let Some((_, first)) = reports.first() else {
        return Err(Error::options(
            "no report.json found below the given folders",
            "give the output folders of `modalmap apply`",
        ));
    };
    let model = check_one_model(reports)?;
    let phases = first
        .phases
        .iter()
        .map(|p0| pool_phase(p0, reports))
        .collect();
    let unassigned = mean_ci(
        &reports
            .iter()
            .map(|(_, r)| r.unassigned_fraction)
            .collect::<Vec<_>>(),
    );
    Ok(Summary {
        schema: SUMMARY_SCHEMA.into(),
        model,
        fields: reports
            .iter()
            .map(|(p, r)| PooledField {
                field: r.field.clone(),
                report: p.display().to_string(),
                area_fractions: r.phases.iter().map(|q| q.area_fraction).collect(),
                unassigned_fraction: r.unassigned_fraction,
            })
            .collect(),
        phases,
        unassigned_fraction_mean: unassigned.0,
        unassigned_fraction_sd: unassigned.1,
        unassigned_fraction_ci95: unassigned
            .2
            .is_finite()
            .then(|| [(unassigned.0 - unassigned.2).max(0.0), (unassigned.0 + unassigned.2).min(1.0)]),
        method: "per phase over n fields: mean area fraction, sample SD s, 95 % interval mean ± t·s/√n (Student t, n − 1 degrees of freedom), %RA = 100·(t·s/√n)/mean (ASTM E562, E1245 field statistics); compositions pooled weighted by the pixels each field's was summed over, their ± the pixel-weighted SD between fields (undefined with one field: see that field's report for its counting σ)".into(),
        cautions: vec![
            "The interval covers the variation between these fields; it estimates the material's value only if the fields were placed without regard to the microstructure (systematic or random sampling) and are enough in number (ASTM E562 §11: four times the fields halves %RA).".into(),
            "Area fractions estimate volume fractions only for an isotropic, uniform microstructure.".into(),
            "Compositions carry the cautions of the individual reports: semi-quantitative, and uncalibrated unless a report says otherwise.".into(),
            "Follow your laboratory's accredited procedures and the applicable standards for results that go into a materials report.".into(),
        ],
    })
}

/// The model every report was made with, after checking that there is one and that every
/// report lists the same phases and passes [`check_report`].
fn check_one_model(reports: &[(PathBuf, Report)]) -> Result<ModelRef> {
    let (first_path, first) = &reports[0]; // merge refuses an empty list first
    let model = first.model.clone().ok_or_else(|| {
        Error::input(
            first_path,
            "was made by `map`, not with a saved model",
            "label every field with one model (`modalmap fit`, then `modalmap apply`) and merge those outputs",
        )
    })?;
    for (p, r) in reports {
        match &r.model {
            Some(m) if m.sha256 == model.sha256 => {}
            Some(m) => {
                return Err(Error::input(
                    p,
                    format!(
                        "was made with another model ({}, not {})",
                        m.path, model.path
                    ),
                    "merge only fields labelled with the same model file",
                ))
            }
            None => {
                return Err(Error::input(
                    p,
                    "was made by `map`, not with a saved model",
                    "merge only the outputs of `modalmap apply`",
                ))
            }
        }
    }
    for (p, r) in reports {
        check_report(p, r)?;
        let ids = |r: &Report| r.phases.iter().map(|q| q.id).collect::<Vec<_>>();
        if ids(r) != ids(first) {
            return Err(tampered(
                p,
                format!(
                    "it lists the phases {:?}, but {} lists {:?} (every report of one model lists every phase, with area 0 where absent)",
                    ids(r),
                    first_path.display(),
                    ids(first)
                ),
                "label the field again with `modalmap apply` and this model",
            ));
        }
    }
    Ok(model)
}

/// Field-to-field statistics of the phase `p0` (as the first report lists it) over every
/// report (a report without it counts as area 0).
fn pool_phase(p0: &crate::report::PhaseEntry, reports: &[(PathBuf, Report)]) -> PooledPhase {
    let n = reports.len();
    let entries: Vec<&crate::report::PhaseEntry> = reports
        .iter()
        .filter_map(|(_, r)| r.phases.iter().find(|q| q.id == p0.id))
        .collect();
    let fractions: Vec<f64> = reports
        .iter()
        .map(|(_, r)| {
            r.phases
                .iter()
                .find(|q| q.id == p0.id)
                .map_or(0.0, |q| q.area_fraction)
        })
        .collect();
    let (mean, sd, half, t) = mean_ci(&fractions);
    let ci = half
        .is_finite()
        .then(|| [(mean - half).max(0.0), (mean + half).min(1.0)]);
    let weight: f64 = entries.iter().map(|q| q.composition_pixels as f64).sum();
    let mut composition_wt = BTreeMap::new();
    if weight > 0.0 {
        for e in p0.composition_wt.keys() {
            let v: f64 = entries
                .iter()
                .map(|q| {
                    q.composition_pixels as f64 * q.composition_wt.get(e).copied().unwrap_or(0.0)
                })
                .sum::<f64>()
                / weight;
            composition_wt.insert(e.clone(), v);
        }
    }
    let composition_wt_sd_between_fields = if n > 1 && weight > 0.0 {
        composition_wt
            .iter()
            .map(|(e, mean)| {
                let var = entries
                    .iter()
                    .map(|q| {
                        let v = q.composition_wt.get(e).copied().unwrap_or(0.0);
                        q.composition_pixels as f64 * (v - mean).powi(2)
                    })
                    .sum::<f64>()
                    / weight;
                (e.clone(), var.sqrt())
            })
            .collect()
    } else {
        BTreeMap::new()
    };
    let basis = &p0.composition_basis;
    let composition_basis = if entries.iter().all(|q| &q.composition_basis == basis) {
        basis.clone()
    } else {
        "mixed: the fields' compositions have different bases".into()
    };
    PooledPhase {
        id: p0.id,
        name: p0.name.clone(),
        fields: n,
        area_fraction_mean: mean,
        area_fraction_sd: sd,
        area_fraction_ci95: ci,
        t_quantile: t,
        relative_accuracy_pct: (half.is_finite() && mean > 0.0).then(|| 100.0 * half / mean),
        composition_wt,
        composition_wt_sd_between_fields,
        composition_basis,
        features: entries.iter().map(|q| q.features).sum(),
        pixels: entries.iter().map(|q| q.pixels).sum(),
    }
}

/// Every report.json below `root` (temporary and hidden folders skipped), sorted. A folder
/// reached twice (through a symbolic link) is read once.
fn find_reports(
    root: &Path,
    visited: &mut std::collections::BTreeSet<PathBuf>,
    found: &mut Vec<PathBuf>,
) -> Result<()> {
    let real = std::fs::canonicalize(root).unwrap_or_else(|_| root.to_path_buf());
    if !visited.insert(real) {
        return Ok(());
    }
    let entries = std::fs::read_dir(root).map_err(|e| {
        Error::input(
            root,
            format!("cannot be read: {e}"),
            "give the output folders of `modalmap apply`",
        )
    })?;
    let mut paths: Vec<PathBuf> = entries.flatten().map(|e| e.path()).collect();
    paths.sort();
    for p in paths {
        let hidden = p
            .file_name()
            .is_some_and(|n| n.to_string_lossy().starts_with('.'));
        if hidden {
            continue;
        }
        if p.is_dir() {
            find_reports(&p, visited, found)?;
        } else if p.file_name().is_some_and(|n| n == "report.json") {
            found.push(p);
        }
    }
    Ok(())
}

/// Pools every report.json found in or below `folders` (reports made with one model) and
/// writes summary.json, summary.csv (pooled, per phase), fields.csv (per field and phase),
/// summary-areas.svg, summary-areas.png and summary.html into `out` (atomically; an existing
/// `out` is replaced only with `force`).
pub fn merge_folders(folders: &[PathBuf], out: &Path, force: bool) -> Result<Summary> {
    let mut paths = Vec::new();
    let mut visited = std::collections::BTreeSet::new();
    for f in folders {
        if f.is_file() && f.file_name().is_some_and(|n| n == "report.json") {
            paths.push(f.clone());
        } else {
            find_reports(f, &mut visited, &mut paths)?;
        }
    }
    let mut seen = std::collections::BTreeSet::new();
    paths.retain(|p| seen.insert(std::fs::canonicalize(p).unwrap_or_else(|_| p.clone())));
    let reads: Vec<crate::guard::Input> = folders
        .iter()
        .chain(&paths)
        .map(|p| crate::guard::Input {
            what: "report",
            path: p,
        })
        .collect();
    crate::guard::check_no_overlap(&[out.to_path_buf()], &reads)?;
    let dir = crate::report::prepare_output(out, force)?;
    let reports = paths
        .iter()
        .map(|p| {
            let bytes = crate::guard::read_regular(p, "report", crate::guard::MAX_JSON_BYTES)?;
            let r: crate::report::Report = serde_json::from_slice(&bytes).map_err(|e| {
                Error::input(
                    p,
                    format!("is not a modalmap report of this version: {e}"),
                    "merge reports written by this version of `modalmap apply`",
                )
            })?;
            Ok((p.clone(), r))
        })
        .collect::<Result<Vec<_>>>()?;
    let summary = merge(&reports)?;
    let json = serde_json::to_string_pretty(&summary)
        .map_err(|e| Error::internal(format!("summary encoding failed: {e}")))?;
    dir.write("summary.json", json.as_bytes())?;
    dir.write("summary.csv", summary::summary_csv(&summary).as_bytes())?;
    dir.write("fields.csv", summary::fields_csv(&reports).as_bytes())?;
    let figure = summary::areas_svg(&summary);
    dir.write("summary-areas.svg", figure.as_bytes())?;
    dir.write("summary-areas.png", &summary::areas_png(&summary))?;
    let links = summary::report_links(&summary, out);
    dir.write(
        "summary.html",
        summary::summary_html(&summary, &figure, &links).as_bytes(),
    )?;
    dir.commit()?;
    Ok(summary)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn shards_are_disjoint_and_cover_everything() {
        let items: Vec<usize> = (0..11).collect();
        let mut all: Vec<usize> = (1..=4).flat_map(|i| shard(&items, i, 4)).collect();
        all.sort();
        assert_eq!(all, items);
        assert_eq!(shard(&items, 2, 4), vec![1, 5, 9]);
        assert_eq!(parse_shard("3/4"), Ok((3, 4)));
        assert!(parse_shard("0/4").is_err() && parse_shard("5/4").is_err());
        assert!(parse_shard("x").is_err());
    }
}
