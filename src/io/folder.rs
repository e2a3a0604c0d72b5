//! A folder of per-element images (one PNG or TIFF per element) plus an optional
//! `field.toml` sidecar. Every file is either used or listed as skipped with its reason.

use std::path::{Path, PathBuf};

use rayon::prelude::*;

use super::raster::{read_raster, Limits, RasterFormat};
use super::sidecar::{FieldSidecar, SIDECAR_NAME};
use super::{field_name, parse_map_name, BseSource, LoadedField, Skipped};
use crate::error::{Error, Result};
use crate::stack::{ElementMap, FieldMetadata, MapStack};

/// True for names that mark a backscattered-electron image: the part before the first
/// separator is `BSE` in any letter case (`BSE.png`, `bse_2kx.tif`).
pub(crate) fn is_bse_name(name: &str) -> bool {
    let end = name.find(['_', '-', ' ', '.']).unwrap_or(name.len());
    name[..end].eq_ignore_ascii_case("bse")
}

/// The first file of a field the folder holds, if any: an element map or a `field.toml`
/// (so that no command writes into or replaces a user's field).
pub fn field_file_in(dir: &Path) -> Option<String> {
    let mut names: Vec<String> = std::fs::read_dir(dir)
        .ok()?
        .flatten()
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .collect();
    names.sort();
    names.into_iter().find(|name| {
        name == SIDECAR_NAME
            || (RasterFormat::from_path(Path::new(name)).is_some()
                && parse_map_name(name).is_some())
    })
}

/// What a maps folder holds, before any image is decoded.
pub(crate) struct Listing {
    /// Element maps: file, element, line from the name or the sidecar.
    pub map_files: Vec<(PathBuf, crate::chem::ElementInfo, Option<String>)>,
    /// BSE images.
    pub bse_files: Vec<PathBuf>,
    /// Files not used, with the reason.
    pub skipped: Vec<Skipped>,
    /// Metadata from the sidecar.
    pub metadata: FieldMetadata,
    /// Things to tell the user.
    pub warnings: Vec<String>,
}

pub(super) fn load(dir: &Path, limits: &Limits) -> Result<LoadedField> {
    let Listing {
        map_files,
        bse_files,
        skipped,
        metadata,
        warnings,
    } = list(dir)?;
    let sizes = map_files
        .iter()
        .map(|(path, _, _)| super::raster::probe_size(path, limits))
        .collect::<Result<Vec<_>>>()?;
    let total = sizes
        .iter()
        .fold(0u64, |a, &(w, h)| a.saturating_add(w.saturating_mul(h)));
    super::raster::check_field_budget(dir, sizes.len() as u64, total, limits)?;
    let rasters: Vec<_> = map_files
        .par_iter()
        .map(|(path, _, _)| read_raster(path, limits))
        .collect::<Result<Vec<_>>>()?;
    let (w, h) = (rasters[0].width, rasters[0].height);
    for (r, (path, _, _)) in rasters.iter().zip(&map_files) {
        if (r.width, r.height) != (w, h) {
            return Err(Error::input(
                path,
                format!(
                    "is {}×{} but {} is {w}×{h}",
                    r.width,
                    r.height,
                    file_name(&map_files[0].0)
                ),
                "all maps of a field must share one size: re-export them together, \
                 or bin the larger ones to the common size",
            ));
        }
    }
    let mut files = Vec::new();
    let maps: Vec<ElementMap> = rasters
        .into_iter()
        .zip(map_files)
        .map(|(r, (path, element, line))| {
            files.push(path.clone());
            ElementMap {
                element,
                line,
                counts: r.data,
                source: path.display().to_string(),
            }
        })
        .collect();
    let stack = MapStack::new(dir, w, h, maps, metadata)?;
    Ok(LoadedField {
        name: field_name(dir),
        input: dir.to_path_buf(),
        stack,
        skipped,
        bse: bse_files.into_iter().next().map(BseSource::File),
        files,
        warnings,
    })
}

/// Lists a maps folder: which files are maps of which element, the BSE images, the
/// sidecar's metadata; refuses an empty folder and duplicate elements.
pub(crate) fn list(dir: &Path) -> Result<Listing> {
    let entries = std::fs::read_dir(dir).map_err(|e| {
        Error::input(
            dir,
            format!("cannot be listed: {e}"),
            "check the folder's permissions",
        )
    })?;
    let mut names: Vec<(String, PathBuf)> = Vec::new();
    for entry in entries {
        let entry = entry
            .map_err(|e| Error::input(dir, format!("cannot be listed: {e}"), "check the folder"))?;
        let name = entry.file_name().to_string_lossy().into_owned();
        names.push((name, entry.path()));
    }
    names.sort();

    let mut skipped = Vec::new();
    let mut bse_files = Vec::new();
    let mut map_files: Vec<(PathBuf, crate::chem::ElementInfo, Option<String>)> = Vec::new();
    let mut sidecar = FieldSidecar::default();
    let mut warnings = Vec::new();
    let skip = |skipped: &mut Vec<Skipped>, name: &str, reason: &str| {
        skipped.push(Skipped {
            name: name.to_string(),
            reason: reason.to_string(),
        })
    };
    for (name, path) in &names {
        if name.starts_with('.') {
            continue; // hidden files (.DS_Store and the like) are not the user's data
        }
        if path.is_dir() {
            skip(&mut skipped, name, "a folder (sub-folders are not read)");
            continue;
        }
        if name == SIDECAR_NAME {
            sidecar = FieldSidecar::read(path)?;
            continue;
        }
        if RasterFormat::from_path(path).is_none() {
            skip(&mut skipped, name, "not a PNG or TIFF image");
            continue;
        }
        if is_bse_name(name) {
            bse_files.push(path.clone());
            skip(
                &mut skipped,
                name,
                "backscattered-electron image, not an element map (used by --bse)",
            );
            continue;
        }
        match parse_map_name(name) {
            Some((e, line)) => map_files.push((path.clone(), e, line)),
            None => skip(&mut skipped, name, &super::not_a_map_reason(name)),
        }
    }
    if map_files.is_empty() {
        let fix = if names.is_empty() {
            "the folder is empty: export one grayscale image per element into it".to_string()
        } else {
            format!(
                "name each map after its element, e.g. Fe.png or Fe_Ka.tif (found: {})",
                names
                    .iter()
                    .take(6)
                    .map(|(n, _)| n.as_str())
                    .collect::<Vec<_>>()
                    .join(", ")
            )
        };
        return Err(Error::input(dir, "contains no element maps", fix));
    }
    // Refuse duplicates before decoding anything: the message names both files.
    for (i, (pa, ea, _)) in map_files.iter().enumerate() {
        if let Some((pb, _, _)) = map_files[i + 1..].iter().find(|(_, eb, _)| eb.z == ea.z) {
            return Err(Error::input(
                dir,
                format!(
                    "holds two maps of {}: {} and {}",
                    ea.symbol,
                    file_name(pa),
                    file_name(pb)
                ),
                "keep one map per element in the folder; move the other elsewhere",
            ));
        }
    }

    let metadata: FieldMetadata = sidecar.metadata_checked(&dir.join(SIDECAR_NAME))?;
    if bse_files.len() > 1 {
        warnings.push(format!(
            "{} BSE images in the folder; using {} (name one with --bse to choose)",
            bse_files.len(),
            file_name(&bse_files[0])
        ));
    }
    for (_, element, line) in &mut map_files {
        if let Some(l) = sidecar.lines.get(element.symbol) {
            *line = Some(l.clone());
        }
    }
    Ok(Listing {
        map_files,
        bse_files,
        skipped,
        metadata,
        warnings,
    })
}

fn file_name(p: &Path) -> String {
    p.file_name()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| p.display().to_string())
}
