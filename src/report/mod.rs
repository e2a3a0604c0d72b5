//! Report: what `map` writes and prints.
//!
//! Takes a [`MapResult`](crate::pipeline::MapResult) and the
//! [`LoadedField`](crate::io::LoadedField) it came from; builds the serialisable
//! [`Report`] (`report.json`, schema `modalmap.report/2`) and writes every output into a
//! temporary folder beside OUT that is renamed into place at the end, so OUT is never left
//! half-written.

pub mod draw;
pub mod html;
mod output;

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

pub use output::{prepare_output, write_file_atomically, OutputDir, Scratch};

use crate::error::{Error, Result};
use crate::map_options::MapOptions;

/// The report's schema name. Version 2 calls the count of separate regions `features`
/// (version 1: `particles`), the word every table and figure uses; reports of version 1
/// are still read.
pub const SCHEMA: &str = "modalmap.report/2";

/// The caution on compositions, by basis (`uncalibrated`, `k-factors`, `calibrated`).
pub fn composition_caution(basis: &str) -> String {
    let head = match basis {
        "calibrated" => "Compositions are k-factor ratios calibrated on phases of known composition (Cliff–Lorimer ratio method); they are semi-quantitative and hold best for phases whose matrix resembles the calibration phases.",
        "k-factors" => "Compositions are k-factor-weighted intensity ratios (Cliff–Lorimer ratio method) with the given factors; they are semi-quantitative.",
        _ => "Compositions are uncalibrated: every k-factor is 1, so they are shares of the net counts, not concentrations, and can be off by tens of per cent of the amount.",
    };
    format!("{head} Like every composition from element maps they are semi-quantitative: in bulk specimens the intensity also depends on the matrix (atomic number, absorption, fluorescence): accurate numbers need standards and ZAF or phi-rho-z matrix corrections (Goldstein et al., Scanning Electron Microscopy and X-Ray Microanalysis, 4th ed., 2018, ch. 19). Normalising to 100 % hides the analytical total, the main check on a missing element. The ± values are counting statistics only.")
}

/// The cautions every report carries besides the one on compositions.
pub const CAUTIONS: [&str; 3] = [
    "Area fractions are measured on this section; they estimate volume fractions only for an isotropic, uniform microstructure sampled over enough fields (ASTM E562, E1245). The interval reflects variation between tiles of this one field.",
    "Phases near the noise floor of the maps (few pixels or small differences in counts) can be missed, merged or invented; check them against the BSE image and other fields.",
    "Follow your laboratory's accredited procedures and the applicable standards for results that go into a materials report.",
];

/// One phase in `report.json`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PhaseEntry {
    /// Phase id (pixel value in labels.png; 1 = largest).
    pub id: u16,
    /// Name.
    pub name: String,
    /// Pixels.
    pub pixels: usize,
    /// Share of all field pixels, 0..1.
    pub area_fraction: f64,
    /// 95 % confidence interval from tile-to-tile variation.
    pub area_fraction_ci95: Option<[f64; 2]>,
    /// Mean raw counts per pixel.
    pub mean: BTreeMap<String, f64>,
    /// Standard deviation of raw counts per pixel.
    pub sd: BTreeMap<String, f64>,
    /// Composition, wt% (see the report's `composition` block for the method).
    pub composition_wt: BTreeMap<String, f64>,
    /// One standard deviation of `composition_wt` from counting statistics, wt%.
    pub composition_wt_sd: BTreeMap<String, f64>,
    /// Composition, at%.
    pub composition_at: BTreeMap<String, f64>,
    /// One standard deviation of `composition_at`, at%.
    pub composition_at_sd: BTreeMap<String, f64>,
    /// Elements not detected in the phase (net counts under Currie's critical level),
    /// with their detection limit, wt%: their `composition_wt` is 0 and they are left out
    /// of the normalisation.
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub not_detected: BTreeMap<String, f64>,
    /// `uncalibrated`, `k-factors` or `calibrated`.
    pub composition_basis: String,
    /// Pixels the composition was summed over (interior pixels).
    pub composition_pixels: usize,
    /// False when the phase has too few pixels clear of its neighbours, so its
    /// composition comes from all its pixels and is mixed with theirs.
    pub composition_from_interior: bool,
    /// True when the phase has no interior pixels and its composition was unmixed from its
    /// neighbours' counts (linear mixing with the beam's spread).
    #[serde(default)]
    pub composition_unmixed: bool,
    /// The closest reference phase and the match quality.
    #[serde(rename = "match", skip_serializing_if = "Option::is_none", default)]
    pub reference: Option<crate::library::Match>,
    /// Separate features (8-connected); `particles` in schema 1, still read.
    #[serde(alias = "particles")]
    pub features: usize,
    /// Mean equivalent-circle diameter, pixels.
    pub mean_ecd_px: f64,
    /// Mean equivalent-circle diameter, µm (when the pixel size is known).
    pub mean_ecd_um: Option<f64>,
    /// Largest feature, pixels.
    pub largest_px: usize,
    /// Mean posterior probability of the pixels' label.
    pub mean_confidence: f64,
    /// Mean BSE grey level on the phase's interior pixels (with a BSE image).
    #[serde(skip_serializing_if = "Option::is_none", default)]
    pub bse_mean: Option<f64>,
    /// Standard deviation of the BSE grey level.
    #[serde(skip_serializing_if = "Option::is_none", default)]
    pub bse_sd: Option<f64>,
    /// Backscatter coefficient predicted from the apparent composition.
    #[serde(skip_serializing_if = "Option::is_none", default)]
    pub eta_predicted: Option<f64>,
    /// Mass-fraction mean atomic number of the apparent composition.
    #[serde(skip_serializing_if = "Option::is_none", default)]
    pub mean_z: Option<f64>,
}

pub use crate::phase_count::PhaseCountReport;

/// One input file and its SHA-256.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct InputFile {
    /// Path as given.
    pub path: String,
    /// SHA-256 of the bytes, hex.
    pub sha256: String,
}

/// Where the result came from.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Provenance {
    /// Always `modalmap`.
    pub tool: String,
    /// Tool version.
    pub version: String,
    /// The seed of every random choice.
    pub seed: u64,
    /// Input files and hashes.
    pub inputs: Vec<InputFile>,
}

/// Which saved model a report was made with.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelRef {
    /// Path of the model file as given.
    pub path: String,
    /// SHA-256 of the model file.
    pub sha256: String,
    /// Its schema.
    pub schema: String,
}

/// `report.json`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Report {
    /// Schema name and version.
    pub schema: String,
    /// Field name.
    pub field: String,
    /// Element symbols (by atomic number).
    pub elements: Vec<String>,
    /// X-ray line per element, where known.
    pub lines: BTreeMap<String, String>,
    /// Width of the label image.
    pub width: usize,
    /// Height of the label image.
    pub height: usize,
    /// Pixel size of the label image, µm.
    pub pixel_size_um: Option<f64>,
    /// Beam energy, kV.
    pub beam_kv: Option<f64>,
    /// The phases, by decreasing area.
    pub phases: Vec<PhaseEntry>,
    /// Share of pixels left unassigned (pores, holes, shadow, unlike any phase).
    pub unassigned_fraction: f64,
    /// Unassigned pixels by reason.
    pub unassigned: BTreeMap<String, usize>,
    /// How the phase count was reached.
    pub phase_count: PhaseCountReport,
    /// How the confidence intervals were computed.
    pub statistics: BTreeMap<String, serde_json::Value>,
    /// Options as applied.
    pub options: MapOptions,
    /// Version, seed, input hashes.
    pub provenance: Provenance,
    /// Limits of what the numbers mean.
    pub cautions: Vec<String>,
    /// Things found while loading and mapping.
    pub warnings: Vec<String>,
    /// The BSE cross-check, when a BSE image was used.
    #[serde(skip_serializing_if = "Option::is_none", default)]
    pub bse: Option<crate::bse::BseCheck>,
    /// How the compositions were obtained.
    pub composition: crate::characterise::CompositionReport,
    /// Beam-physics advice.
    pub advisor: crate::advisor::Advice,
    /// The saved model the field was labelled with (`apply`).
    #[serde(skip_serializing_if = "Option::is_none", default)]
    pub model: Option<ModelRef>,
    /// The X-ray yield across the field (absent in reports of older versions).
    #[serde(rename = "yield", skip_serializing_if = "Option::is_none", default)]
    pub xray_yield: Option<crate::xray_yield::YieldField>,
}

/// SHA-256 of `bytes` as lowercase hex (FIPS 180-4).
pub fn sha256_hex(bytes: &[u8]) -> String {
    Sha256::digest(bytes)
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect()
}

/// SHA-256 of a file's bytes.
pub fn hash_file(path: &std::path::Path) -> Result<String> {
    use sha2::Digest;
    let mut file = crate::guard::open_regular(path, "input file")?;
    let mut hasher = sha2::Sha256::new();
    let mut buf = vec![0u8; 1 << 20];
    loop {
        use std::io::Read;
        let n = file.read(&mut buf).map_err(|e| {
            Error::input(
                path,
                format!("cannot be read for hashing: {e}"),
                "check the file",
            )
        })?;
        if n == 0 {
            break;
        }
        hasher.update(&buf[..n]);
    }
    Ok(hasher
        .finalize()
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect())
}

/// Each file with its SHA-256, hashed in parallel.
pub fn hash_files(files: &[std::path::PathBuf]) -> Result<Vec<InputFile>> {
    use rayon::prelude::*;
    files
        .par_iter()
        .map(|p| {
            Ok(InputFile {
                path: p.display().to_string(),
                sha256: hash_file(p)?,
            })
        })
        .collect()
}

/// What a labelled field hands to the report: its table and labels, how the phase count
/// was reached, and the field's metadata and lines.
#[derive(Debug, Clone, Copy)]
pub struct Labelled<'a> {
    /// Per-phase statistics.
    pub table: &'a crate::phases::PhaseTable,
    /// The labels.
    pub segmentation: &'a crate::refine::Segmentation,
    /// How the phase count was reached.
    pub decision: &'a crate::phase_count::Decision,
    /// Empty-pixel threshold used.
    pub min_counts_used: f64,
    /// The X-ray yield across the field.
    pub xray_yield: &'a crate::xray_yield::YieldField,
    /// The field's metadata.
    pub metadata: &'a crate::stack::FieldMetadata,
    /// Mapped elements with the line named with each map.
    pub lines: &'a [(crate::chem::ElementInfo, Option<String>)],
    /// The counts on the label grid, when the field was held whole (for the element maps
    /// and the count plots).
    pub counts: Option<&'a crate::stack::MapStack>,
}

/// What the stages after labelling found, for the report.
#[derive(Debug, Clone, Copy)]
pub struct Findings<'a> {
    /// The BSE cross-check, when a BSE image was used.
    pub bse: Option<&'a crate::bse::BseCheck>,
    /// How the compositions were obtained.
    pub composition: &'a crate::characterise::CompositionReport,
    /// Beam-physics advice.
    pub advisor: &'a crate::advisor::Advice,
    /// The saved model, with `apply`.
    pub model: Option<&'a ModelRef>,
}

/// Builds the report of a mapped field.
pub fn build(
    field_name: &str,
    files: &[std::path::PathBuf],
    result: &Labelled,
    options: &MapOptions,
    mut warnings: Vec<String>,
    findings: Findings,
) -> Result<Report> {
    let Findings {
        bse,
        composition,
        advisor,
        model,
    } = findings;
    let t = &result.table;
    let md = result.metadata;
    let phases = t
        .phases
        .iter()
        .map(|p| phase_entry(t, p, md, &composition.basis, bse))
        .collect();
    warnings.extend(too_small_for_tiles(result));
    if let Some(b) = bse {
        warnings.extend(b.warnings.iter().cloned());
    }
    warnings.extend(result_warnings(result));
    let inputs = hash_files(files)?;
    let mut unassigned = BTreeMap::new();
    unassigned.insert("empty".into(), result.segmentation.empty_pixels);
    unassigned.insert(
        "unlike_any_phase".into(),
        result.segmentation.outlier_pixels,
    );
    Ok(Report {
        schema: SCHEMA.into(),
        field: field_name.to_string(),
        elements: t.elements.clone(),
        lines: result
            .lines
            .iter()
            .filter_map(|(e, l)| l.clone().map(|l| (e.symbol.to_string(), l)))
            .collect(),
        width: result.segmentation.width,
        height: result.segmentation.height,
        pixel_size_um: md.pixel_size_um,
        beam_kv: md.beam_kv,
        phases,
        unassigned_fraction: t.unassigned_fraction,
        unassigned,
        phase_count: result.decision.report(t.phases.len()),
        statistics: statistics(result),
        options: *options,
        provenance: Provenance {
            tool: "modalmap".into(),
            version: env!("CARGO_PKG_VERSION").into(),
            seed: options.cluster.seed,
            inputs,
        },
        cautions: std::iter::once(composition_caution(&composition.basis))
            .chain(CAUTIONS.iter().map(|s| s.to_string()))
            .collect(),
        warnings,
        bse: bse.cloned(),
        composition: composition.clone(),
        advisor: advisor.clone(),
        model: model.cloned(),
        xray_yield: Some(result.xray_yield.clone()),
    })
}

/// The report's entry for phase `p` of table `t`, with its BSE statistics when there was a
/// BSE check.
fn phase_entry(
    t: &crate::phases::PhaseTable,
    p: &crate::phases::Phase,
    md: &crate::stack::FieldMetadata,
    basis: &str,
    bse: Option<&crate::bse::BseCheck>,
) -> PhaseEntry {
    let map = |v: &[f64]| -> BTreeMap<String, f64> {
        t.elements.iter().cloned().zip(v.iter().copied()).collect()
    };
    let cmap = |v: &[f64]| -> BTreeMap<String, f64> {
        t.composition_elements
            .iter()
            .cloned()
            .zip(v.iter().copied())
            .collect()
    };
    let q = bse.and_then(|b| b.phases.iter().find(|q| q.id == p.id));
    PhaseEntry {
        id: p.id,
        name: p.name.clone(),
        pixels: p.pixels,
        area_fraction: p.area_fraction,
        area_fraction_ci95: p.area_fraction_ci95,
        mean: map(&p.mean),
        sd: map(&p.sd),
        composition_wt: cmap(&p.composition.wt),
        composition_wt_sd: cmap(&p.composition.wt_sd),
        composition_at: cmap(&p.composition.at),
        composition_at_sd: cmap(&p.composition.at_sd),
        not_detected: t
            .composition_elements
            .iter()
            .zip(&p.composition.limit_wt)
            .filter_map(|(e, l)| l.map(|l| (e.clone(), l)))
            .collect(),
        composition_basis: basis.to_string(),
        composition_pixels: p.composition_pixels,
        composition_from_interior: p.composition_from_interior,
        composition_unmixed: p.composition_unmixed,
        reference: p.reference.clone(),
        features: p.features,
        mean_ecd_px: p.mean_ecd_px,
        mean_ecd_um: md.pixel_size_um.map(|s| s * p.mean_ecd_px),
        largest_px: p.largest_px,
        mean_confidence: p.mean_confidence,
        bse_mean: q.map(|q| q.bse_mean).filter(|v| v.is_finite()),
        bse_sd: q.map(|q| q.bse_sd).filter(|v| v.is_finite()),
        eta_predicted: q.map(|q| q.eta_predicted),
        mean_z: q.map(|q| q.mean_z),
    }
}

/// A warning when the field is too small to cut into tiles, so its areas carry no interval.
fn too_small_for_tiles(result: &Labelled) -> Option<String> {
    let t = result.table;
    (t.tiles[0] * t.tiles[1] < 2).then(|| format!(
        "the field ({} × {} pixels) is too small to cut into tiles of at least 10 × 10 pixels, so the area fractions carry no interval; map a larger field, or several fields and pool them with merge",
        result.segmentation.width, result.segmentation.height
    ))
}

/// What the user should know about the labelling: a phase count held at the largest
/// tried, an uneven X-ray yield, fewer phases than asked for, phases near the noise floor.
fn result_warnings(result: &Labelled) -> Vec<String> {
    let t = result.table;
    let mut warnings = Vec::new();
    warnings.extend(result.decision.held_at_largest(t.phases.len()));
    let y = result.xray_yield;
    if y.uneven() {
        warnings.push(format!(
            "the X-ray yield varies across the field from {:.2} to {:.2} of its mean (more than ±{:.0} %), as from the detector's take-off angle, shadowing or a tilted specimen: a smooth factor fitted with the phases was divided out of every count before the last labelling and the compositions (see the yield map); check the specimen's flatness and the working distance, and prefer a higher magnification or a montage for quantitative work",
            y.min,
            y.max,
            100.0 * crate::xray_yield::WARN_ABOVE
        ));
    }
    warnings.extend(result.decision.short_of_asked(t.phases.len()));
    for p in &t.phases {
        if p.area_fraction < 0.005 && p.pixels < 200 {
            warnings.push(format!(
                "phase {} ({}) covers {:.2} % of the field in {} pixels: near the noise floor, confirm it on the BSE image",
                p.id,
                p.name,
                100.0 * p.area_fraction,
                p.pixels
            ));
        }
    }
    warnings
}

/// How the area intervals were made, and the counts behind the labelling.
fn statistics(result: &Labelled) -> BTreeMap<String, serde_json::Value> {
    let t = result.table;
    let mut statistics = BTreeMap::new();
    statistics.insert("tiles".into(), serde_json::json!(t.tiles));
    statistics.insert("t_quantile".into(), serde_json::json!(t.t_quantile));
    statistics.insert(
        "method".into(),
        serde_json::json!(format!(
            "95 % interval = p ± t·s/√n over {} × {} equal tiles of the field (Student t, n − 1 degrees of freedom; ASTM E562/E1245 field statistics applied to sub-fields)",
            t.tiles[0], t.tiles[1]
        )),
    );
    statistics.insert(
        "min_counts_used".into(),
        serde_json::json!(result.min_counts_used),
    );
    statistics.insert(
        "fitted_pixels".into(),
        serde_json::json!(result.decision.fitted_pixels),
    );
    statistics
}

/// A CSV field, quoted when it holds a comma or a quote (RFC 4180).
pub fn csv_field(v: &str) -> String {
    if v.contains([',', '"']) {
        format!("\"{}\"", v.replace('"', "\"\""))
    } else {
        v.to_string()
    }
}

/// `phases.csv`: one row per phase, areas in % of the field, and a last row (id 0) for the
/// unassigned pixels.
pub fn phases_csv(r: &Report) -> String {
    let mut s = String::from("id,name,pixels,area_pct,area_pct_ci95_low,area_pct_ci95_high,features,mean_ecd_px,mean_ecd_um,mean_confidence");
    for e in &r.elements {
        s.push_str(&format!(",mean_{e}"));
    }
    for e in &r.elements {
        s.push_str(&format!(",sd_{e}"));
    }
    let ce = &r.composition.elements;
    for prefix in ["wt", "wt_sd", "at", "at_sd"] {
        for e in ce {
            s.push_str(&format!(",{prefix}_{e}"));
        }
    }
    s.push_str(",not_detected,composition_basis,match,match_quality\n");
    for p in &r.phases {
        let name = csv_field(&p.name);
        let [lo, hi] = p
            .area_fraction_ci95
            .map_or([String::new(), String::new()], |c| {
                c.map(|v| format!("{:.4}", 100.0 * v))
            });
        s.push_str(&format!(
            "{},{},{},{:.4},{lo},{hi},{},{:.3},{},{:.4}",
            p.id,
            name,
            p.pixels,
            100.0 * p.area_fraction,
            p.features,
            p.mean_ecd_px,
            p.mean_ecd_um.map_or(String::new(), |u| format!("{u:.4}")),
            p.mean_confidence
        ));
        for m in [&p.mean, &p.sd] {
            for e in &r.elements {
                s.push_str(&format!(",{:.4}", m[e]));
            }
        }
        for m in [
            &p.composition_wt,
            &p.composition_wt_sd,
            &p.composition_at,
            &p.composition_at_sd,
        ] {
            for e in ce {
                s.push_str(&format!(",{:.3}", m[e]));
            }
        }
        let (matched, quality) = match &p.reference {
            Some(m) => (
                csv_field(m.reference.as_deref().unwrap_or("no match")),
                format!("{:.3}", m.quality),
            ),
            None => (String::new(), String::new()),
        };
        s.push_str(&format!(
            ",{},{},{matched},{quality}\n",
            not_detected_text(p, ";"),
            p.composition_basis
        ));
    }
    // The unassigned pixels, so that the area column adds up to 100 %.
    let unassigned: usize = r.unassigned.values().sum();
    // Four cells given, the rest of the header's columns left empty.
    let columns = s.lines().next().map_or(0, |h| h.split(',').count());
    s.push_str(&format!(
        "0,unassigned,{unassigned},{:.4}{}\n",
        100.0 * r.unassigned_fraction,
        ",".repeat(columns - 4)
    ));
    s
}

/// A value (wt%) with its 1σ for tables, with as many decimals as the σ needs to show
/// (a σ that would round to 0.0 gets a second decimal, or "<0.01"); a single element
/// normalised to 100 % has no σ, and says so.
pub fn value_pm(value: f64, sd: f64, pm: &str) -> String {
    if sd == 0.0 && value > 99.95 {
        format!("{value:.1} (100 % by normalisation, no σ)")
    } else if sd < 0.005 {
        format!("{value:.2}{pm}<0.01")
    } else if sd < 0.05 {
        format!("{value:.2}{pm}{sd:.2}")
    } else {
        format!("{value:.1}{pm}{sd:.1}")
    }
}

/// A 95 % interval in % for tables, or "none (field too small)".
pub fn ci_text(ci: Option<[f64; 2]>, dash: &str) -> String {
    match ci {
        Some([lo, hi]) => format!("{:.2}{dash}{:.2}", 100.0 * lo, 100.0 * hi),
        None => "none (small field)".into(),
    }
}

/// The elements not detected in a phase with their limits, e.g. `C <0.31; O <0.22` (wt%).
pub fn not_detected_text(p: &PhaseEntry, sep: &str) -> String {
    p.not_detected
        .iter()
        .map(|(e, l)| format!("{e} <{l:.2}"))
        .collect::<Vec<_>>()
        .join(&format!("{sep} "))
}

/// The short human summary printed by `map`.
pub fn summary(r: &Report) -> String {
    let mut s = format!(
        "field {}: {} × {} pixels, {} phases\n\n",
        r.field,
        r.width,
        r.height,
        r.phases.len()
    );
    s.push_str(&format!(
        "  {:>3}  {:<20} {:>8} {:>13} {:>9}  composition wt% ± 1σ ({}), match quality\n",
        "id", "phase", "area %", "95 % CI", "features", r.composition.basis
    ));
    for p in &r.phases {
        let mut comp: Vec<String> = r
            .composition
            .elements
            .iter()
            .filter(|e| p.composition_wt[*e] >= 1.0)
            .map(|e| {
                format!(
                    "{e} {}",
                    value_pm(p.composition_wt[e], p.composition_wt_sd[e], "±")
                )
            })
            .collect();
        if !p.not_detected.is_empty() {
            comp.push(format!("not detected: {}", not_detected_text(p, ",")));
        }
        if let Some(m) = &p.reference {
            comp.push(match &m.reference {
                Some(_) => format!("[{:.2}]", m.quality),
                None => format!("[no match; closest {} {:.3}]", m.closest, m.quality),
            });
        }
        s.push_str(&format!(
            "  {:>3}  {:<20} {:>8.2} {:>13} {:>9}  {}\n",
            p.id,
            p.name,
            100.0 * p.area_fraction,
            ci_text(p.area_fraction_ci95, "–"),
            p.features,
            comp.join(", ")
        ));
    }
    s.push_str(&format!(
        "       {:<16} {:>8.2}\n",
        "unassigned",
        100.0 * r.unassigned_fraction
    ));
    if r.phase_count.mode == "auto" {
        if let Some(k) = r.phase_count.bic_minimum {
            let (with, then) = match r.phase_count.counted_with {
                Some(m) => (
                    format!(" of the {}", m.describe()),
                    format!(
                        "; {} then fitted from its phases",
                        r.options.cluster.method.describe()
                    ),
                ),
                None => (String::new(), String::new()),
            };
            s.push_str(&format!(
                "\n  phase count: BIC{with} lowest at {k}; {} component(s) merged or dissolved as boundary mixtures or duplicates{then}\n",
                r.phase_count.simplifications.len()
            ));
        }
    }
    if let Some(y) = r.xray_yield.as_ref().filter(|y| y.applied) {
        s.push_str(&format!(
            "\n  X-ray yield: {:.3} ± {:.3} to {:.3} ± {:.3} of the mean across the field; divided out of the counts\n",
            y.min,
            y.min * y.min_max_log_se[0],
            y.max,
            y.max * y.min_max_log_se[1]
        ));
    }
    if let Some(b) = &r.bse {
        s.push_str(&format!(
            "\n  BSE check ({}): shift {:+.2}, {:+.2} map px{}, scale {:.2}",
            b.source,
            b.shift_px[0],
            b.shift_px[1],
            if b.registration.trusted {
                ""
            } else {
                " (registration not trusted)"
            },
            b.scale
        ));
        if let Some(rho) = b.spearman {
            s.push_str(&format!("; rank correlation with predicted η {rho:+.2}"));
        }
        if let Some(f) = b.fit {
            s.push_str(&format!("; linear fit R² {:.2}", f.r2));
        }
        s.push('\n');
        if b.flags.is_empty() {
            s.push_str(
                "    BSE brightness order agrees with the predicted backscatter coefficients\n",
            );
        }
        for f in &b.flags {
            s.push_str(&format!("    ! {}\n", f.message));
        }
    }
    s.push_str(&format!("\n  composition: {}\n", r.composition.method));
    for n in &r.composition.notes {
        s.push_str(&format!("    - {n}\n"));
    }
    if !r.advisor.messages.is_empty() {
        s.push_str("\n  beam-physics advice:\n");
        for m in &r.advisor.messages {
            s.push_str(&format!("    - {m}\n"));
        }
    }
    if !r.warnings.is_empty() {
        s.push_str("\n  warnings:\n");
        for w in &r.warnings {
            s.push_str(&format!("    - {w}\n"));
        }
    }
    s.push_str("\n  cautions:\n");
    for c in &r.cautions {
        s.push_str(&format!("    - {c}\n"));
    }
    s
}

/// Writes every output of `map` into `out` (a prepared temporary folder).
pub fn write_outputs(
    dir: &OutputDir,
    r: &Report,
    result: &Labelled,
    bse: Option<&crate::bse::BseCheck>,
) -> Result<()> {
    let seg = &result.segmentation;
    let t = crate::profile::stage("  write: labels, images, json, csv");
    let (labels_name, labels) = label_image(r, seg)?;
    dir.write(labels_name, &labels)?;
    let legend = legend(r);
    let phase_map = phase_map_png(r, seg, &legend);
    dir.write("phase-map.png", &phase_map)?;
    dir.write("phase-map.svg", phase_map_svg(r, seg, &legend).as_bytes())?;
    let bse_pngs = bse.map(|b| bse_figures(r, seg, &legend, b));
    if let Some((registered, overlay)) = &bse_pngs {
        dir.write("bse-registered.png", registered)?;
        dir.write("overlay.png", overlay)?;
    }
    let json = serde_json::to_string_pretty(r)
        .map_err(|e| Error::internal(format!("report encoding failed: {e}")))?;
    dir.write("report.json", json.as_bytes())?;
    dir.write("phases.csv", phases_csv(r).as_bytes())?;
    drop(t);

    let t = crate::profile::stage("  write: element maps, pair plots");
    let (element_maps, scatters) = match result.counts {
        Some(counts) => {
            let maps = element_figures(r, counts, (seg.width, seg.height))?;
            for m in &maps {
                dir.write(&m.file, &m.png)?;
            }
            let scatters = pair_plots(r, counts, &maps, &seg.labels);
            (maps.into_iter().map(|m| m.figure).collect(), scatters)
        }
        None => (Vec::new(), Vec::new()),
    };
    let mut figures = vec![html::Figure {
        png: phase_map,
        alt: format!(
            "Phase map of {} with {} phases; legend lists each phase's id, name and area",
            r.field,
            r.phases.len()
        ),
        caption: "Phases (ids as in the table; black: unassigned pixels).".into(),
    }];
    if let Some((registered, overlay)) = bse_pngs {
        figures.push(html::Figure {
            png: registered,
            alt: "BSE image registered onto the map grid".into(),
            caption: "BSE image, registered and resampled onto the map grid.".into(),
        });
        figures.push(html::Figure {
            png: overlay,
            alt: "BSE image with the phase boundaries drawn in the phases' colours".into(),
            caption: "Phase boundaries on the BSE image.".into(),
        });
    }
    drop(t);
    let _t = crate::profile::stage("  write: report.html");
    let left_out = if result.counts.is_none() {
        vec!["Element maps and the count plots of element pairs: the field was labelled strip by strip (a montage too big to hold whole), and they need the whole field's counts in memory; map a smaller field, or a part of this one, to see them.".to_string()]
    } else {
        Vec::new()
    };
    let page = html::page(
        r,
        &html::Extras {
            figures,
            element_maps,
            scatters,
            left_out,
        },
    );
    dir.write("report.html", page.as_bytes())
}

/// The label image: labels.png (8-bit) up to 255 phases, else labels.tif (16-bit).
fn label_image(r: &Report, seg: &crate::refine::Segmentation) -> Result<(&'static str, Vec<u8>)> {
    let (w, h) = (seg.width, seg.height);
    if r.phases.len() <= 255 {
        let v: Vec<u8> = seg.labels.iter().map(|&l| l as u8).collect();
        Ok(("labels.png", crate::io::raster::encode_png_u8(w, h, &v)))
    } else {
        Ok((
            "labels.tif",
            crate::io::raster::encode_tiff_u16(w, h, &seg.labels)?,
        ))
    }
}

/// The legend of the phase images: each phase's id, name and area, then the unassigned
/// pixels.
fn legend(r: &Report) -> Vec<draw::LegendEntry> {
    let mut legend: Vec<draw::LegendEntry> = r
        .phases
        .iter()
        .map(|p| draw::LegendEntry {
            id: p.id,
            text: format!("{} {}  {:.1} %", p.id, p.name, 100.0 * p.area_fraction),
        })
        .collect();
    legend.push(draw::LegendEntry {
        id: 0,
        text: format!("unassigned  {:.1} %", 100.0 * r.unassigned_fraction),
    });
    legend
}

/// phase-map.png: the labels in the phases' colours with the legend and scale bar.
fn phase_map_png(
    r: &Report,
    seg: &crate::refine::Segmentation,
    legend: &[draw::LegendEntry],
) -> Vec<u8> {
    let canvas = draw::phase_map(
        &seg.labels,
        seg.width,
        seg.height,
        legend,
        r.pixel_size_um,
        &format!("{}: phase map", r.field),
    );
    crate::io::raster::encode_png_rgb(canvas.width, canvas.height, &canvas.rgb)
}

/// phase-map.svg: the labels in the phases' colours (embedded at full resolution) with a
/// vector legend and scale bar.
fn phase_map_svg(
    r: &Report,
    seg: &crate::refine::Segmentation,
    legend: &[draw::LegendEntry],
) -> String {
    let (w, h) = (seg.width, seg.height);
    let rgb: Vec<u8> = seg.labels.iter().flat_map(|&l| draw::colour(l)).collect();
    let png = crate::io::raster::encode_png_rgb(w, h, &rgb);
    let entries: Vec<(u16, String)> = legend.iter().map(|e| (e.id, e.text.clone())).collect();
    html::phase_map_svg(
        &format!("{}: phase map", r.field),
        (&png, w, h),
        &entries,
        r.pixel_size_um,
    )
}

/// bse-registered.png (the BSE image on the map grid) and overlay.png (the phase
/// boundaries on it, framed with the legend of the phases).
fn bse_figures(
    r: &Report,
    seg: &crate::refine::Segmentation,
    legend: &[draw::LegendEntry],
    b: &crate::bse::BseCheck,
) -> (Vec<u8>, Vec<u8>) {
    let (w, h) = (seg.width, seg.height);
    let grey = draw::to_grey(&b.registered);
    let overlay = draw::overlay(&grey, &seg.labels, w, h);
    let canvas = draw::framed(
        &|i| [overlay[3 * i], overlay[3 * i + 1], overlay[3 * i + 2]],
        w,
        h,
        &legend[..legend.len() - 1],
        r.pixel_size_um,
        &format!("{}: phase boundaries on BSE", r.field),
    );
    (
        crate::io::raster::encode_png_u8(w, h, &grey),
        crate::io::raster::encode_png_rgb(canvas.width, canvas.height, &canvas.rgb),
    )
}

/// One element's map: its file (element-El.png), the small copy for the page, and its
/// 99.5th percentile (white in its map, the end of its axis in the pair plots).
struct ElementFigure {
    symbol: String,
    file: String,
    png: Vec<u8>,
    figure: html::Figure,
    top: f32,
}

/// Each element's map as a grey PNG with title, ramp and scale bar (at most 1024 pixels on
/// the long side: a figure, not the data), in parallel over the elements.
fn element_figures(
    r: &Report,
    counts: &crate::stack::MapStack,
    (w, h): (usize, usize),
) -> Result<Vec<ElementFigure>> {
    use rayon::prelude::*;
    Ok(counts
        .maps()
        .par_iter()
        .map(|m| {
            let line = m.line.clone().unwrap_or_default();
            let title = format!("{} {} counts per pixel", m.element.symbol, line);
            let (fw, fh, f, small) = draw::shrink(&m.counts, w, h, 1024);
            let canvas = draw::element_map(
                &small,
                fw,
                fh,
                title.trim(),
                r.pixel_size_um.map(|p| p * f as f64),
            );
            let file = format!("element-{}.png", m.element.symbol);
            let png =
                crate::io::raster::encode_png_u8(canvas.width, canvas.height, &draw::luma(&canvas));
            let lo = m.counts.iter().copied().fold(f32::INFINITY, f32::min);
            let hi = m.counts.iter().copied().fold(f32::NEG_INFINITY, f32::max);
            let top = draw::nth_finite(&m.counts, |n| (n - 1) - n / 200).unwrap_or(1.0);
            let (tw, th, thumb) = draw::grey_thumbnail(&m.counts, w, h, top, 320);
            let figure = html::Figure {
                png: crate::io::raster::encode_png_u8(tw, th, &thumb),
                alt: format!(
                    "{} map: grey level proportional to counts per pixel",
                    m.element.symbol
                ),
                caption: format!(
                    "{} {line}: counts per pixel {lo:.0} to {hi:.0} (white at {top:.0}; full size in {file})",
                    m.element.symbol
                ),
            };
            ElementFigure {
                symbol: m.element.symbol.to_string(),
                file,
                png,
                figure,
                top,
            }
        })
        .collect())
}

/// The density plots of the informative element pairs, each axis up to its element's
/// 99.5th percentile.
fn pair_plots(
    r: &Report,
    counts: &crate::stack::MapStack,
    maps: &[ElementFigure],
    labels: &[u16],
) -> Vec<String> {
    use rayon::prelude::*;
    let top = |e: &str| maps.iter().find(|m| m.symbol == e).map(|m| m.top);
    let pairs: Vec<_> = html::informative_pairs(r)
        .into_iter()
        .filter_map(|(ex, ey)| {
            let (a, b) = (counts.map(&ex)?, counts.map(&ey)?);
            let tops = (top(&ex)?, top(&ey)?);
            Some((ex, ey, a, b, tops))
        })
        .collect();
    pairs
        .par_iter()
        .map(|(ex, ey, a, b, tops)| {
            html::density_scatter(
                (ex, ey),
                (&a.counts, &b.counts),
                *tops,
                labels,
                r.phases.len(),
            )
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// No σ is printed as "0.0" unless it is one at that precision.
    #[test]
    fn a_sigma_never_rounds_to_zero_unseen() {
        assert_eq!(value_pm(62.04, 0.73, " ± "), "62.0 ± 0.7");
        assert_eq!(value_pm(62.04, 0.05, " ± "), "62.0 ± 0.1");
        assert_eq!(value_pm(62.04, 0.049, "±"), "62.04±0.05");
        assert_eq!(value_pm(62.04, 0.012, "±"), "62.04±0.01");
        assert_eq!(value_pm(62.04, 0.004, "±"), "62.04±<0.01");
        assert_eq!(value_pm(0.3, 0.0, "±"), "0.30±<0.01");
        assert!(value_pm(100.0, 0.0, "±").contains("by normalisation"));
    }
}
