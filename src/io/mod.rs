//! Loading a field from disk: a folder of per-element images, or an HDF5 file.
//!
//! Takes a path and decoding [`Limits`]; returns a [`LoadedField`]: the checked
//! [`MapStack`], what was skipped and why, where a BSE image was found, and warnings.
//! Only this module and the writers touch the disk.

pub mod folder;
pub mod hdf5;
pub mod raster;
pub mod rows;
mod sidecar;

use std::path::{Path, PathBuf};

pub use raster::{read_raster, Limits, Raster};
pub use sidecar::{FieldSidecar, SIDECAR_NAME};

use crate::chem::{element, ElementInfo};
use crate::error::{Error, Result};
use crate::stack::MapStack;

/// A file or dataset that was looked at and not used as an element map.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Skipped {
    /// File name (or dataset path inside an HDF5 file).
    pub name: String,
    /// Why it was not used.
    pub reason: String,
}

/// A warning for every file or dataset of the field that was not used (but the BSE
/// images, which the BSE check uses), so that nothing is dropped without a word.
pub(crate) fn dropped_inputs(skipped: &[Skipped]) -> Vec<String> {
    skipped
        .iter()
        .filter(|s| !folder::is_bse_name(&s.name))
        .map(|s| format!("{} was not used: {}", s.name, s.reason))
        .collect()
}

/// Where a backscattered-electron image was found beside the maps.
#[derive(Debug, Clone, PartialEq)]
pub enum BseSource {
    /// An image file in the maps folder.
    File(PathBuf),
    /// A 2-D dataset inside the HDF5 input.
    Hdf5 {
        /// The HDF5 file.
        file: PathBuf,
        /// The dataset path inside it.
        dataset: String,
    },
}

/// A field as loaded: the stack plus everything a user should be told about the loading.
#[derive(Debug, Clone)]
pub struct LoadedField {
    /// Field name: the folder's or file's stem.
    pub name: String,
    /// The input path as given.
    pub input: PathBuf,
    /// The element maps.
    pub stack: MapStack,
    /// Files or datasets that were not used, with the reason.
    pub skipped: Vec<Skipped>,
    /// A BSE image found beside the maps, if any.
    pub bse: Option<BseSource>,
    /// Every file whose bytes went into the stack (for provenance hashes).
    pub files: Vec<PathBuf>,
    /// Things the user should know that do not stop the run.
    pub warnings: Vec<String>,
}

/// Loads a field from a folder of maps or an HDF5 file.
pub fn load_field(input: &Path, limits: &Limits) -> Result<LoadedField> {
    let meta = std::fs::metadata(input).map_err(|e| {
        Error::input(
            input,
            format!("cannot be opened: {e}"),
            "give a folder of element maps or an HDF5 file (.h5)",
        )
    })?;
    let mut field = if meta.is_dir() {
        folder::load(input, limits)?
    } else if hdf5::looks_like_hdf5(input) {
        hdf5::load(input, limits)?
    } else if raster::RasterFormat::from_path(input).is_some() {
        return Err(Error::input(
            input,
            "is a single image, but a field is a set of element maps",
            "give the folder that holds all the maps of the field",
        ));
    } else {
        return Err(Error::input(
            input,
            "is neither a folder nor an HDF5 file",
            "give a folder of element maps (PNG/TIFF) or an HDF5 file in modalmap's layout \
             (see notebooks-free-docs/input-formats.md)",
        ));
    };
    for m in field.stack.maps() {
        if m.counts.iter().all(|&v| v == 0.0) {
            field.warnings.push(format!(
                "the {} map ({}) is zero everywhere: it carries no information; \
                 check the export or leave it out",
                m.element.symbol, m.source
            ));
        }
    }
    Ok(field)
}

/// Loads a BSE image from a file or from a dataset of the HDF5 input.
pub fn load_bse(source: &BseSource, limits: &Limits) -> Result<crate::bse::BseImage> {
    match source {
        BseSource::File(path) => {
            let r = read_raster(path, limits)?;
            let saturation = if r.format.starts_with("8-bit") && !r.format.contains("float") {
                Some(255.0)
            } else if r.format.starts_with("16-bit") && !r.format.contains("float") {
                Some(65535.0)
            } else {
                None
            };
            Ok(crate::bse::BseImage {
                width: r.width,
                height: r.height,
                data: r.data,
                saturation,
                source: path.display().to_string(),
            })
        }
        BseSource::Hdf5 { file, dataset } => hdf5::load_bse(file, dataset, limits),
    }
}

/// The field name used for output folders: the folder's name or the file's stem.
pub fn field_name(input: &Path) -> String {
    let p = if input.is_dir() {
        input.file_name()
    } else {
        input.file_stem()
    };
    p.map(|s| s.to_string_lossy().into_owned())
        .filter(|s| !s.is_empty() && s != "." && s != "..")
        .unwrap_or_else(|| "field".to_string())
}

/// The element and X-ray line a map's name stands for.
///
/// The element is the name up to the first `_`, `-`, space or `.`, matched case-sensitively
/// (`Se` is selenium; `SE`, `BSE` and `bse` are not elements). A line designation may
/// follow the separator (`Fe_Ka.tif`, `Si-K.png`, `Sn La.tif`).
pub fn parse_map_name(name: &str) -> Option<(ElementInfo, Option<String>)> {
    let is_sep = |c: char| matches!(c, '_' | '-' | ' ' | '.');
    let end = name.find(is_sep).unwrap_or(name.len());
    let e = element(&name[..end])?;
    let rest = &name[end..];
    let line = rest
        .strip_prefix(is_sep)
        .map(|r| r.split(is_sep).next().unwrap_or(""))
        .filter(|t| looks_like_line(t))
        .map(str::to_string);
    Some((e, line))
}

/// A name with look-alike letters (Cyrillic, Greek, full-width) replaced by the Latin
/// letters they resemble, and the first such letter, if the name holds any.
pub fn latin_lookalike(name: &str) -> Option<(String, char)> {
    const PAIRS: &[(char, char)] = &[
        ('А', 'A'),
        ('В', 'B'),
        ('С', 'C'),
        ('Е', 'E'),
        ('Н', 'H'),
        ('І', 'I'),
        ('Ј', 'J'),
        ('К', 'K'),
        ('М', 'M'),
        ('О', 'O'),
        ('Р', 'P'),
        ('Ѕ', 'S'),
        ('Т', 'T'),
        ('Х', 'X'),
        ('а', 'a'),
        ('с', 'c'),
        ('е', 'e'),
        ('і', 'i'),
        ('ј', 'j'),
        ('о', 'o'),
        ('р', 'p'),
        ('ѕ', 's'),
        ('х', 'x'),
        ('у', 'y'),
        ('Α', 'A'),
        ('Β', 'B'),
        ('Ε', 'E'),
        ('Ζ', 'Z'),
        ('Η', 'H'),
        ('Ι', 'I'),
        ('Κ', 'K'),
        ('Μ', 'M'),
        ('Ν', 'N'),
        ('Ο', 'O'),
        ('Ρ', 'P'),
        ('Τ', 'T'),
        ('Υ', 'Y'),
        ('Χ', 'X'),
        ('ο', 'o'),
        ('ν', 'v'),
    ];
    let mut first = None;
    let latin: String = name
        .chars()
        .map(|c| {
            let l = PAIRS
                .iter()
                .find(|(a, _)| *a == c)
                .map(|(_, b)| *b)
                .or_else(|| {
                    // Full-width forms U+FF01..U+FF5E are ASCII shifted by 0xFEE0.
                    (('\u{FF01}'..='\u{FF5E}').contains(&c))
                        .then(|| char::from_u32(c as u32 - 0xFEE0))
                        .flatten()
                });
            if let Some(l) = l {
                first.get_or_insert(c);
                l
            } else {
                c
            }
        })
        .collect();
    first.map(|c| (latin, c))
}

/// Why a file name is not a map name, with the element meant when the name uses a
/// look-alike letter.
pub fn not_a_map_reason(name: &str) -> String {
    if let Some((latin, c)) = latin_lookalike(name) {
        if let Some((e, _)) = parse_map_name(&latin) {
            return format!(
                "not an element symbol; did you mean {}? (the name holds '{c}', U+{:04X}, which looks like a Latin letter but is not one; rename the file)",
                e.symbol, c as u32
            );
        }
    }
    "name does not start with an element symbol (symbols are case-sensitive: `Se` is \
     selenium, `SE` is not an element)"
        .to_string()
}

/// `K`, `Ka`, `Ka1`, `Kb`, `L`, `La`, `La1`, `Lb1`, `M`, `Ma`, ... (α/β spelled as a/b).
fn looks_like_line(t: &str) -> bool {
    let mut c = t.chars();
    matches!(c.next(), Some('K' | 'L' | 'M'))
        && t.len() <= 4
        && c.all(|x| matches!(x, 'a' | 'b' | 'g' | 'l' | 'n' | '1'..='9' | 'α' | 'β'))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn map_names() {
        let sym = |n: &str| parse_map_name(n).map(|(e, l)| (e.symbol, l));
        assert_eq!(sym("Fe.png"), Some(("Fe", None)));
        assert_eq!(sym("Fe_Ka.tif"), Some(("Fe", Some("Ka".into()))));
        assert_eq!(sym("Si-K.png"), Some(("Si", Some("K".into()))));
        assert_eq!(sym("Sn La.tif"), Some(("Sn", Some("La".into()))));
        assert_eq!(sym("Se.png"), Some(("Se", None)));
        assert_eq!(sym("O_map_3.png"), Some(("O", None)));
        assert_eq!(sym("SE.png"), None);
        assert_eq!(sym("BSE.png"), None);
        assert_eq!(sym("bse_1.tif"), None);
        assert_eq!(sym("Image1.png"), None);
        assert_eq!(sym("fe.png"), None);
    }

    #[test]
    fn look_alike_letters_are_named_with_the_element_meant() {
        // Cyrillic small ie (U+0435) in place of the Latin e.
        let r = not_a_map_reason("F\u{0435}.png");
        assert!(
            r.contains("did you mean Fe?") && r.contains("U+0435"),
            "{r}"
        );
        // Greek capital omicron (U+039F) for O; full-width S (U+FF33) for S.
        assert!(not_a_map_reason("\u{039F}_Ka.png").contains("did you mean O?"));
        assert!(not_a_map_reason("\u{FF33}i.tif").contains("did you mean Si?"));
        assert!(!not_a_map_reason("Image1.png").contains("did you mean"));
    }
}
