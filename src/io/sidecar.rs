//! The optional metadata file beside a folder of maps (`field.toml`, our own format):
//!
//! ```toml
//! pixel_size_um = 0.25   # square pixels
//! beam_kv = 20.0
//! live_time_s = 600.0
//! bse_pixel_size_um = 0.1   # only when the BSE image's pixels differ from the maps'
//! [lines]                # X-ray line each map was built from
//! Cu = "Ka"
//! Sn = "La"
//! ```
//! Unknown keys are refused, so a typo does not silently drop a value.

use std::collections::BTreeMap;
use std::path::Path;

use crate::error::{Error, Result};
use crate::stack::FieldMetadata;

/// The sidecar's file name inside a maps folder.
pub const SIDECAR_NAME: &str = "field.toml";

/// The sidecar's contents.
#[derive(Debug, Clone, Default, PartialEq, serde::Deserialize, serde::Serialize)]
#[serde(deny_unknown_fields)]
pub struct FieldSidecar {
    /// Pixel size, µm.
    pub pixel_size_um: Option<f64>,
    /// Beam energy, kV.
    pub beam_kv: Option<f64>,
    /// Live time, s.
    pub live_time_s: Option<f64>,
    /// Pixel size of the BSE image, µm (when it is not the maps').
    pub bse_pixel_size_um: Option<f64>,
    /// Width of each acquisition tile of a montage, map pixels.
    pub tile_width_px: Option<f64>,
    /// Height of each acquisition tile of a montage, map pixels.
    pub tile_height_px: Option<f64>,
    /// X-ray line per element symbol.
    #[serde(default)]
    pub lines: BTreeMap<String, String>,
}

impl FieldSidecar {
    /// Reads and checks a sidecar file.
    pub fn read(path: &Path) -> Result<FieldSidecar> {
        let text =
            crate::guard::read_text(path, "field metadata file", crate::guard::MAX_TEXT_BYTES)?;
        Self::parse(path, &text)
    }

    /// Parses and checks sidecar text; `path` names it in messages.
    pub fn parse(path: &Path, text: &str) -> Result<FieldSidecar> {
        let s: FieldSidecar = toml::from_str(text).map_err(|e| {
            Error::input(
                path,
                format!("is not valid field metadata: {}", e.message()),
                "allowed keys: pixel_size_um, beam_kv, live_time_s, bse_pixel_size_um, tile_width_px, \
                 tile_height_px and a [lines] table \
                 (see notebooks-free-docs/input-formats.md)",
            )
        })?;
        s.metadata_checked(path)?;
        for sym in s.lines.keys() {
            if crate::chem::element(sym).is_none() {
                return Err(Error::input(
                    path,
                    format!("[lines] names `{sym}`, which is not an element symbol"),
                    "use case-sensitive element symbols such as Fe, Si, Sn",
                ));
            }
        }
        Ok(s)
    }

    /// The metadata, each value checked to be positive and finite.
    pub fn metadata_checked(&self, path: &Path) -> Result<FieldMetadata> {
        let m = FieldMetadata {
            pixel_size_um: self.pixel_size_um,
            beam_kv: self.beam_kv,
            live_time_s: self.live_time_s,
            bse_pixel_size_um: self.bse_pixel_size_um,
            tile_width_px: self.tile_width_px,
            tile_height_px: self.tile_height_px,
        };
        m.check(path)?;
        Ok(m)
    }
}
