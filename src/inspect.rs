//! `inspect`: what is in a field before anything is computed from it.
//!
//! Takes a [`LoadedField`]; returns per-element count statistics, metadata, what was
//! skipped, and warnings with their reasoning (low counts are judged by Poisson statistics:
//! a pixel with N counts has a standard deviation of √N, a relative error of 1/√N).

use serde::Serialize;

use crate::io::{BseSource, LoadedField, Skipped};
use crate::stack::FieldMetadata;

/// Statistics of one element map.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ElementSummary {
    /// Element symbol.
    pub element: String,
    /// X-ray line, if known.
    pub line: Option<String>,
    /// Where the map came from.
    pub source: String,
    /// Sum of counts over the field.
    pub total: f64,
    /// Mean counts per pixel.
    pub mean: f64,
    /// Largest count in a pixel.
    pub max: f64,
    /// 99th percentile of the counts: the level where the element is most concentrated,
    /// even when it sits in a minor phase.
    pub p99: f64,
    /// Fraction of pixels with zero counts.
    pub zero_fraction: f64,
}

/// Everything `inspect` reports.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Inspection {
    /// Field name.
    pub field: String,
    /// Input path.
    pub input: String,
    /// Width in pixels.
    pub width: usize,
    /// Height in pixels.
    pub height: usize,
    /// Per-element statistics, by atomic number.
    pub elements: Vec<ElementSummary>,
    /// Mean of the summed counts of all maps per pixel.
    pub mean_total_counts: f64,
    /// Fraction of pixels with no counts in any map (holes, pores, shadow).
    pub empty_fraction: f64,
    /// Acquisition metadata.
    pub metadata: FieldMetadata,
    /// A BSE image found with the maps.
    pub bse: Option<String>,
    /// What was not used.
    pub skipped: Vec<Skipped>,
    /// Things worth knowing before mapping.
    pub warnings: Vec<String>,
}

/// Counts per pixel (99th percentile) below which an element's signal is called low
/// (common practice, no source: at 5 counts the Poisson relative error is 45 %).
pub const LOW_COUNTS: f64 = 5.0;

/// Summarises a loaded field.
pub fn inspect(field: &LoadedField) -> Inspection {
    let stack = &field.stack;
    let n = stack.pixels() as f64;
    let mut totals = vec![0.0f64; stack.pixels()];
    let elements: Vec<ElementSummary> = stack
        .maps()
        .iter()
        .map(|m| {
            let mut total = 0.0f64;
            let mut max = 0.0f32;
            let mut zeros = 0usize;
            for (t, &v) in totals.iter_mut().zip(&m.counts) {
                total += f64::from(v);
                *t += f64::from(v);
                max = max.max(v);
                zeros += usize::from(v == 0.0);
            }
            let mut sorted = m.counts.clone();
            sorted.sort_unstable_by(f32::total_cmp);
            let p99 = f64::from(sorted[(sorted.len() - 1) * 99 / 100]);
            ElementSummary {
                element: m.element.symbol.to_string(),
                line: m.line.clone(),
                source: m.source.clone(),
                total,
                mean: total / n,
                max: f64::from(max),
                p99,
                zero_fraction: zeros as f64 / n,
            }
        })
        .collect();
    let mean_total_counts = totals.iter().sum::<f64>() / n;
    let empty_fraction = totals.iter().filter(|&&t| t == 0.0).count() as f64 / n;

    let mut warnings = field.warnings.clone();
    for e in &elements {
        if e.max > 0.0 && e.p99 < LOW_COUNTS {
            warnings.push(format!(
                "{} reaches only {:.0} counts per pixel even where it is most concentrated \
                 (99th percentile): Poisson noise is √N = {:.1} counts, {:.0} % of that \
                 signal, so phases that differ only in {} will be hard to separate pixel by \
                 pixel; binning 2×2 (--bin 2) gives 4× the counts and halves the relative \
                 noise, at half the spatial resolution",
                e.element,
                e.p99,
                e.p99.sqrt(),
                100.0 / e.p99.max(1.0).sqrt(),
                e.element
            ));
        }
    }
    if mean_total_counts < 20.0 {
        warnings.push(format!(
            "all maps together average {mean_total_counts:.1} counts per pixel; below about 20 \
             the classification of single pixels becomes unreliable (common practice, no \
             source): bin the maps or acquire for longer"
        ));
    }
    if empty_fraction > 0.001 {
        warnings.push(format!(
            "{:.2} % of pixels have no counts in any map (pores, holes, shadowing or the \
             edge of the specimen); they will be left unassigned, not made a phase",
            100.0 * empty_fraction
        ));
    }
    let md = stack.metadata();
    if md.pixel_size_um.is_none() {
        warnings.push(
            "pixel size unknown: sizes will be in pixels and no scale bar drawn \
             (set pixel_size_um in field.toml, or --pixel-size)"
                .into(),
        );
    }
    if md.beam_kv.is_none() {
        warnings.push(
            "beam energy unknown: spatial-resolution advice needs it \
             (set beam_kv in field.toml, or --kv)"
                .into(),
        );
    }
    if stack.maps().len() == 1 {
        warnings.push(
            "only one element map: phases can only be told apart by that one element's level"
                .into(),
        );
    }
    Inspection {
        field: field.name.clone(),
        input: field.input.display().to_string(),
        width: stack.width(),
        height: stack.height(),
        elements,
        mean_total_counts,
        empty_fraction,
        metadata: md.clone(),
        bse: field.bse.as_ref().map(|b| match b {
            BseSource::File(p) => p.display().to_string(),
            BseSource::Hdf5 { file, dataset } => format!("{}:/{}", file.display(), dataset),
        }),
        skipped: field.skipped.clone(),
        warnings,
    }
}

impl std::fmt::Display for Inspection {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        writeln!(f, "field {} ({})", self.field, self.input)?;
        writeln!(
            f,
            "  {} × {} pixels, {} element maps",
            self.width,
            self.height,
            self.elements.len()
        )?;
        let md = &self.metadata;
        let opt =
            |v: Option<f64>, unit: &str| v.map_or("unknown".to_string(), |v| format!("{v} {unit}"));
        writeln!(
            f,
            "  pixel size {}, beam {}, live time {}",
            opt(md.pixel_size_um, "µm"),
            opt(md.beam_kv, "kV"),
            opt(md.live_time_s, "s")
        )?;
        writeln!(f)?;
        writeln!(
            f,
            "  {:<4} {:<5} {:>14} {:>10} {:>8} {:>8} {:>8}",
            "el", "line", "total counts", "mean/px", "p99", "max", "zero %"
        )?;
        for e in &self.elements {
            writeln!(
                f,
                "  {:<4} {:<5} {:>14.0} {:>10.2} {:>8.0} {:>8.0} {:>8.2}",
                e.element,
                e.line.as_deref().unwrap_or("-"),
                e.total,
                e.mean,
                e.p99,
                e.max,
                100.0 * e.zero_fraction
            )?;
        }
        writeln!(
            f,
            "  all maps: {:.1} counts per pixel on average; {:.2} % of pixels empty",
            self.mean_total_counts,
            100.0 * self.empty_fraction
        )?;
        if let Some(b) = &self.bse {
            writeln!(f, "\n  BSE image: {b}")?;
        }
        if !self.skipped.is_empty() {
            writeln!(f, "\n  skipped:")?;
            for s in &self.skipped {
                writeln!(f, "    {}: {}", s.name, s.reason)?;
            }
        }
        if !self.warnings.is_empty() {
            writeln!(f, "\n  warnings:")?;
            for w in &self.warnings {
                writeln!(f, "    - {w}")?;
            }
        }
        Ok(())
    }
}
