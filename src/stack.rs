//! `MapStack`: one field's element maps, checked once at construction.
//!
//! Every later stage trusts what this type promises: at least one map, all maps the same
//! non-zero size, each element once, every count finite and non-negative, planes ordered by
//! atomic number. Loaders build it; nothing downstream re-checks.

use std::path::Path;

use crate::chem::ElementInfo;
use crate::error::{Error, Result};

/// Acquisition metadata of a field; any of it may be unknown.
#[derive(Debug, Clone, Default, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct FieldMetadata {
    /// Pixel size in micrometres (square pixels).
    pub pixel_size_um: Option<f64>,
    /// Beam energy in kV.
    pub beam_kv: Option<f64>,
    /// Live time of the acquisition in seconds.
    pub live_time_s: Option<f64>,
    /// Pixel size of the field's BSE image in micrometres, if it differs from the maps'.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub bse_pixel_size_um: Option<f64>,
    /// Width of each acquisition tile of a montage, map pixels (tiles from the top-left
    /// corner): the X-ray yield may step between tiles.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub tile_width_px: Option<f64>,
    /// Height of each acquisition tile of a montage, map pixels.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub tile_height_px: Option<f64>,
}

/// The physically possible range of each metadata value, with its unit: an SEM beam from
/// 0.1 to 400 kV (low-voltage imaging to the highest-voltage electron microscopes), pixels
/// from 0.1 nm to 1 cm, live times from 1 ms to 10⁷ s (common practice, no source).
/// Montage tiles from 8 to 10⁶ pixels on a side, whole numbers.
pub const METADATA_RANGES: [(&str, f64, f64, &str); 6] = [
    ("pixel_size_um", 1e-4, 1e4, "µm"),
    ("beam_kv", 0.1, 400.0, "kV"),
    ("live_time_s", 1e-3, 1e7, "s"),
    ("bse_pixel_size_um", 1e-4, 1e4, "µm"),
    ("tile_width_px", 8.0, 1e6, "px"),
    ("tile_height_px", 8.0, 1e6, "px"),
];

/// Checks one metadata value against [`METADATA_RANGES`]; the message names the range.
pub fn check_metadata_value(key: &str, v: f64) -> std::result::Result<(), String> {
    let Some(&(_, lo, hi, unit)) = METADATA_RANGES.iter().find(|r| r.0 == key) else {
        return Ok(());
    };
    if unit == "px" && v.fract() != 0.0 {
        Err(format!("{v} {unit} is not a whole number of pixels"))
    } else if v.is_finite() && (lo..=hi).contains(&v) {
        Ok(())
    } else {
        Err(format!(
            "{v} {unit} is outside the possible range {lo} to {hi} {unit}"
        ))
    }
}

impl FieldMetadata {
    /// Checks that every value given lies in its physical range ([`METADATA_RANGES`]);
    /// `path` is the file the values came from (field.toml or the HDF5 input).
    pub fn check(&self, path: &Path) -> Result<()> {
        for (key, v) in [
            ("pixel_size_um", self.pixel_size_um),
            ("beam_kv", self.beam_kv),
            ("live_time_s", self.live_time_s),
            ("bse_pixel_size_um", self.bse_pixel_size_um),
            ("tile_width_px", self.tile_width_px),
            ("tile_height_px", self.tile_height_px),
        ] {
            if let Some(v) = v {
                check_metadata_value(key, v).map_err(|p| {
                    Error::input(
                        path,
                        format!("{key} = {p}"),
                        format!("set {key} to the real value, or leave it out if unknown"),
                    )
                })?;
            }
        }
        Ok(())
    }
}

/// One element's intensity map.
#[derive(Debug, Clone, PartialEq)]
pub struct ElementMap {
    /// The element.
    pub element: ElementInfo,
    /// The X-ray line the map was built from (e.g. `K`, `L`, `Ka`), if known.
    pub line: Option<String>,
    /// Counts per pixel, row-major, `width × height` values.
    pub counts: Vec<f32>,
    /// Where the map came from: a file path, or `file.h5:/dataset`.
    pub source: String,
}

/// A field: element maps of one size plus metadata.
#[derive(Debug, Clone, PartialEq)]
pub struct MapStack {
    width: usize,
    height: usize,
    maps: Vec<ElementMap>,
    metadata: FieldMetadata,
}

/// Most element maps a field may hold: the clustering kernels keep a pixel's features in
/// fixed-size arrays of this length (`cluster::lanes::MAX_DIMS`), far more than the
/// elements an EDS field maps.
pub const MAX_MAPS: usize = 64;

impl MapStack {
    /// Multiplies every count of pixel i, in every map, by `factor[i]` (one factor per
    /// pixel, row-major).
    pub fn scale_pixels(&mut self, factor: &[f32]) {
        assert_eq!(
            factor.len(),
            self.width * self.height,
            "one factor per pixel"
        );
        for m in &mut self.maps {
            for (c, f) in m.counts.iter_mut().zip(factor) {
                *c *= f;
            }
        }
    }

    /// The counts of every map, to change in place (the maps' order and size stay).
    pub fn counts_mut(&mut self) -> impl Iterator<Item = &mut [f32]> {
        self.maps.iter_mut().map(|m| m.counts.as_mut_slice())
    }

    /// Checks the invariants and orders the maps by atomic number.
    ///
    /// `origin` is the input path used in error messages.
    pub fn new(
        origin: &Path,
        width: usize,
        height: usize,
        mut maps: Vec<ElementMap>,
        metadata: FieldMetadata,
    ) -> Result<MapStack> {
        if maps.is_empty() {
            return Err(Error::input(
                origin,
                "contains no element maps",
                "name each map after its element (e.g. Fe.png, Fe_Ka.tif, Si-K.png); \
                 see `modalmap inspect --help` for the naming rule",
            ));
        }
        if maps.len() > MAX_MAPS {
            return Err(Error::input(
                origin,
                format!(
                    "holds {} element maps; modalmap takes at most {MAX_MAPS}",
                    maps.len()
                ),
                "leave out the maps of elements absent from the sample (a map of noise \
                 adds nothing to the phases)",
            ));
        }
        if width == 0 || height == 0 {
            return Err(Error::input(
                origin,
                format!("the maps are {width}×{height} pixels; a map needs at least one pixel"),
                "re-export the maps",
            ));
        }
        maps.sort_by_key(|m| m.element.z);
        for pair in maps.windows(2) {
            if pair[0].element.z == pair[1].element.z {
                return Err(Error::input(
                    origin,
                    format!(
                        "element {} appears twice: {} and {}",
                        pair[0].element.symbol, pair[0].source, pair[1].source
                    ),
                    "keep one map per element and move or rename the other",
                ));
            }
        }
        // Whether every value is finite and ≥ 0: a branch-free pass that vectorises, in
        // parallel over the maps; the place of a bad value is looked for only on failure.
        let clean: Vec<bool> = {
            use rayon::prelude::*;
            maps.par_iter()
                .map(|m| {
                    m.counts.chunks(4096).all(|c| {
                        c.iter()
                            .fold(true, |ok, v| ok & v.is_finite() & (*v >= 0.0))
                    })
                })
                .collect()
        };
        for (m, &clean) in maps.iter().zip(&clean) {
            if m.counts.len() != width * height {
                return Err(Error::input(
                    Path::new(&m.source),
                    format!(
                        "holds {} values but the field is {width}×{height} = {} pixels",
                        m.counts.len(),
                        width * height
                    ),
                    "all maps of a field must share one size; re-export them together",
                ));
            }
            if clean {
                continue;
            }
            if let Some(i) = m.counts.iter().position(|v| !v.is_finite() || *v < 0.0) {
                let v = m.counts[i];
                let what = if v.is_nan() {
                    "NaN".to_string()
                } else if v.is_infinite() {
                    "an infinite value".to_string()
                } else {
                    format!("a negative value ({v})")
                };
                return Err(Error::input(
                    Path::new(&m.source),
                    format!(
                        "has {what} at pixel (x={}, y={}); counts must be finite and ≥ 0",
                        i % width,
                        i / width
                    ),
                    "export raw counts, not background-subtracted or processed intensities \
                     (replace NaN/negative pixels with 0 if they mark missing data)",
                ));
            }
        }
        Ok(MapStack {
            width,
            height,
            maps,
            metadata,
        })
    }

    /// Width in pixels.
    pub fn width(&self) -> usize {
        self.width
    }

    /// Height in pixels.
    pub fn height(&self) -> usize {
        self.height
    }

    /// Number of pixels.
    pub fn pixels(&self) -> usize {
        self.width * self.height
    }

    /// The element maps, ordered by atomic number.
    pub fn maps(&self) -> &[ElementMap] {
        &self.maps
    }

    /// The element symbols, ordered by atomic number.
    pub fn symbols(&self) -> Vec<&'static str> {
        self.maps.iter().map(|m| m.element.symbol).collect()
    }

    /// The map of one element.
    pub fn map(&self, symbol: &str) -> Option<&ElementMap> {
        self.maps.iter().find(|m| m.element.symbol == symbol)
    }

    /// Acquisition metadata.
    pub fn metadata(&self) -> &FieldMetadata {
        &self.metadata
    }

    /// The montage's tile size in this grid's pixels (width, height), when the metadata
    /// give it; one side given means tiles of that side in both directions.
    pub fn tile_px(&self) -> Option<(f64, f64)> {
        let m = &self.metadata;
        match (m.tile_width_px, m.tile_height_px) {
            (None, None) => None,
            (w, h) => Some((w.or(h)?, h.or(w)?)),
        }
    }

    /// Replaces metadata values with those given (command-line overrides).
    pub fn override_metadata(&mut self, m: &FieldMetadata) {
        self.metadata.override_with(m);
    }
}

impl FieldMetadata {
    /// Replaces values with those given in `m` (command-line overrides).
    pub fn override_with(&mut self, m: &FieldMetadata) {
        if m.pixel_size_um.is_some() {
            self.pixel_size_um = m.pixel_size_um;
        }
        if m.beam_kv.is_some() {
            self.beam_kv = m.beam_kv;
        }
        if m.live_time_s.is_some() {
            self.live_time_s = m.live_time_s;
        }
        if m.bse_pixel_size_um.is_some() {
            self.bse_pixel_size_um = m.bse_pixel_size_um;
        }
        if m.tile_width_px.is_some() {
            self.tile_width_px = m.tile_width_px;
        }
        if m.tile_height_px.is_some() {
            self.tile_height_px = m.tile_height_px;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::chem::element;

    /// Montage tile sizes: whole pixels from 8 to 10⁶; one side alone means square tiles.
    #[test]
    fn tile_sizes_are_whole_pixels_in_range() {
        assert!(check_metadata_value("tile_width_px", 512.0).is_ok());
        let half = check_metadata_value("tile_height_px", 100.5).unwrap_err();
        assert!(half.contains("whole number"), "{half}");
        let small = check_metadata_value("tile_width_px", 4.0).unwrap_err();
        assert!(small.contains("8 to 1000000 px"), "{small}");
        let md = FieldMetadata {
            tile_width_px: Some(64.0),
            ..Default::default()
        };
        let stack = MapStack::new(
            Path::new("t"),
            128,
            96,
            vec![map("Fe", vec![1.0; 128 * 96])],
            md,
        )
        .unwrap();
        assert_eq!(stack.tile_px(), Some((64.0, 64.0)));
    }

    fn map(sym: &str, counts: Vec<f32>) -> ElementMap {
        ElementMap {
            element: element(sym).unwrap(),
            line: None,
            counts,
            source: format!("{sym}.png"),
        }
    }

    fn stack(maps: Vec<ElementMap>, w: usize, h: usize) -> Result<MapStack> {
        MapStack::new(Path::new("field"), w, h, maps, FieldMetadata::default())
    }

    #[test]
    fn orders_by_atomic_number() {
        let s = stack(vec![map("Sn", vec![1.0; 4]), map("Cu", vec![2.0; 4])], 2, 2).unwrap();
        assert_eq!(s.symbols(), vec!["Cu", "Sn"]);
        assert_eq!(s.pixels(), 4);
    }

    #[test]
    fn rejects_broken_stacks() {
        let e = stack(vec![], 2, 2).unwrap_err();
        assert!(e.problem.contains("no element maps"));
        let e = stack(vec![map("Fe", vec![1.0; 4]), map("Fe", vec![1.0; 4])], 2, 2).unwrap_err();
        assert!(e.problem.contains("appears twice"), "{e}");
        let e = stack(vec![map("Fe", vec![1.0; 3])], 2, 2).unwrap_err();
        assert!(e.problem.contains("share one size") || e.fix.contains("share one size"));
        let e = stack(vec![map("Fe", vec![1.0, f32::NAN, 1.0, 1.0])], 2, 2).unwrap_err();
        assert!(e.problem.contains("NaN at pixel (x=1, y=0)"), "{e}");
        let e = stack(vec![map("Fe", vec![1.0, 1.0, 1.0, -2.0])], 2, 2).unwrap_err();
        assert!(e.problem.contains("negative value (-2)"), "{e}");
        let e = stack(vec![map("Fe", vec![f32::INFINITY; 4])], 2, 2).unwrap_err();
        assert!(e.problem.contains("infinite"), "{e}");
        let e = stack(vec![map("Fe", vec![])], 0, 2).unwrap_err();
        assert!(e.problem.contains("0×2"), "{e}");
    }
}
