//! HDF5 input in modalmap's own layout (documented in notebooks-free-docs/input-formats.md),
//! read with the pure-Rust `hdf5-pure` crate so that no system library is needed.
//!
//! Two layouts are accepted:
//! 1. a group `/maps` (or the root group) with one 2-D dataset (height × width) per element,
//!    named like map files (`Fe`, `Fe_Ka`, `Si-K`), optionally with a string attribute `line`;
//! 2. a 3-D dataset `/maps` (element × height × width) with a string-array attribute
//!    `elements` naming each plane (and optionally `lines`).
//!
//! Metadata are numeric attributes `pixel_size_um`, `beam_kv`, `live_time_s` on the root or on
//! `/maps` (the latter wins). A 2-D dataset `/bse` (or a dataset named `BSE…` beside the maps)
//! is the backscattered-electron image.

use std::collections::HashMap;
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::Path;

use hdf5_pure::{AttrValue, File};

use super::folder::is_bse_name;
use super::raster::Limits;
use super::{field_name, parse_map_name, BseSource, LoadedField, Skipped};
use crate::error::{Error, Result};
use crate::stack::{ElementMap, FieldMetadata, MapStack};

/// True if the file starts with the HDF5 signature (or has an HDF5 extension).
pub(crate) fn looks_like_hdf5(path: &Path) -> bool {
    let ext = path
        .extension()
        .and_then(|e| e.to_str())
        .map(|e| e.to_ascii_lowercase());
    if matches!(ext.as_deref(), Some("h5" | "hdf5" | "hdf" | "he5")) {
        return true;
    }
    let mut head = [0u8; 8];
    use std::io::Read;
    crate::guard::open_regular(path, "field")
        .ok()
        .is_some_and(|mut f| f.read_exact(&mut head).is_ok())
        && head == *b"\x89HDF\r\n\x1a\n"
}

const LAYOUT_FIX: &str = "write the maps as one 2-D dataset per element under /maps, or one \
     3-D dataset /maps with an `elements` attribute (see notebooks-free-docs/input-formats.md)";

fn bad(path: &Path, problem: String) -> Error {
    Error::input(path, problem, LAYOUT_FIX)
}

pub(super) fn load(path: &Path, limits: &Limits) -> Result<LoadedField> {
    crate::guard::open_regular(path, "HDF5 field")?;
    let open = || File::open(path);
    guarded(path, || load_inner(path, open, limits))
}

/// Loads an HDF5 field from bytes in memory; `path` names it in messages. (The fuzz
/// targets call this.)
pub fn load_bytes(path: &Path, bytes: Vec<u8>, limits: &Limits) -> Result<LoadedField> {
    let open = move || File::from_bytes(bytes);
    guarded(path, || load_inner(path, open, limits))
}

fn guarded(path: &Path, f: impl FnOnce() -> Result<LoadedField>) -> Result<LoadedField> {
    // The decoder is defensive, but a damaged file must never take the process down: a
    // panic inside it becomes an input error naming the file.
    match catch_unwind(AssertUnwindSafe(f)) {
        Ok(r) => r,
        Err(_) => Err(Error::input(
            path,
            "is a damaged HDF5 file (the decoder could not make sense of its structure)",
            "export the file again; check that the copy is complete",
        )),
    }
}

fn attr_f64(v: &AttrValue) -> Option<f64> {
    v.as_f64().or_else(|| v.as_i64().map(|x| x as f64))
}

/// Reads the metadata attributes; an attribute of a known name that is not a number is
/// refused (naming it), never ignored.
fn metadata_from(
    path: &Path,
    attrs: &HashMap<String, AttrValue>,
    into: &mut FieldMetadata,
) -> Result<()> {
    for (key, slot) in [
        ("pixel_size_um", &mut into.pixel_size_um),
        ("beam_kv", &mut into.beam_kv),
        ("live_time_s", &mut into.live_time_s),
        ("bse_pixel_size_um", &mut into.bse_pixel_size_um),
        ("tile_width_px", &mut into.tile_width_px),
        ("tile_height_px", &mut into.tile_height_px),
    ] {
        if let Some(a) = attrs.get(key) {
            let v = attr_f64(a).ok_or_else(|| {
                Error::input(
                    path,
                    format!("attribute `{key}` is not a number ({a:?})"),
                    format!(
                        "write `{key}` as a numeric scalar attribute, or leave it out if unknown"
                    ),
                )
            })?;
            *slot = Some(v);
        }
    }
    Ok(())
}

fn check_pixels(path: &Path, name: &str, shape: &[u64], limits: &Limits) -> Result<()> {
    let pixels = shape.iter().fold(1u64, |a, &b| a.saturating_mul(b));
    if shape.contains(&0) {
        return Err(bad(
            path,
            format!("dataset {name} is empty (shape {shape:?})"),
        ));
    }
    if shape.len() == 3 {
        super::raster::check_field_budget(path, shape[0], pixels, limits)?;
    }
    let per_map = if shape.len() == 3 {
        shape[1].saturating_mul(shape[2])
    } else {
        pixels
    };
    if per_map > limits.max_pixels {
        return Err(Error::input(
            path,
            format!(
                "dataset {name} declares shape {shape:?}, above the limit of {} pixels per map",
                limits.max_pixels
            ),
            "if the field really is that large, raise the limit with --max-pixels",
        ));
    }
    Ok(())
}

/// The dataset's shape, checked against the limits, and its chunk shape checked against
/// the dataset: a damaged or hostile file can declare chunks far larger than the data,
/// which a reader would allocate in full.
fn checked_shape(
    path: &Path,
    name: &str,
    ds: &hdf5_pure::Dataset,
    file_len: u64,
    limits: &Limits,
) -> Result<Vec<u64>> {
    let h5err = |e: hdf5_pure::Error| {
        Error::input(
            path,
            format!("dataset {name} cannot be read ({e})"),
            "the file is damaged; export it again",
        )
    };
    let shape = ds.shape().map_err(h5err)?;
    check_pixels(path, name, &shape, limits)?;
    let size = ds.element_size().map_err(h5err)?;
    if size == 0 || size > 8 {
        return Err(Error::input(
            path,
            format!("dataset {name} declares values of {size} bytes; maps hold integers or floats of 1 to 8 bytes"),
            "the file is damaged, or the dataset is not a map; export it again",
        ));
    }
    if let Some(chunk) = ds.chunk_shape().map_err(h5err)? {
        let elements = shape.iter().fold(1u64, |a, &b| a.saturating_mul(b));
        let chunk_elements = chunk.iter().fold(1u64, |a, &b| a.saturating_mul(b));
        if chunk.len() != shape.len() || chunk_elements > elements.max(1 << 16) {
            return Err(Error::input(
                path,
                format!("dataset {name} of shape {shape:?} declares chunks of {chunk:?}, larger than the data itself"),
                "the file is damaged or not written by an HDF5 library; export it again",
            ));
        }
        // Every stored chunk must lie inside the file, or a reader would size a buffer
        // for data that is not there.
        for c in ds.chunks().map_err(h5err)? {
            if c.address.saturating_add(c.storage_size) > file_len {
                return Err(Error::input(
                    path,
                    format!("dataset {name} has a chunk of {} bytes at offset {} beyond the end of the file ({file_len} bytes)", c.storage_size, c.address),
                    "the file is truncated or damaged; export it again",
                ));
            }
        }
    }
    Ok(shape)
}

fn short(path: &Path) -> Error {
    Error::input(
        path,
        "holds a dataset with fewer values than its shape declares",
        "the file is damaged or truncated; export it again",
    )
}

fn load_inner(
    path: &Path,
    open: impl FnOnce() -> std::result::Result<File, hdf5_pure::Error>,
    limits: &Limits,
) -> Result<LoadedField> {
    let h5err = |e: hdf5_pure::Error| unreadable(path, e);
    let file = open().map_err(h5err)?;
    let root = file.root();
    let mut metadata = FieldMetadata::default();
    metadata_from(path, &root.attrs().map_err(h5err)?, &mut metadata)?;
    let root_datasets = root.datasets().map_err(h5err)?;
    let mut found = Found {
        path,
        maps: Vec::new(),
        dims: None,
        skipped: Vec::new(),
        bse: None,
    };
    if root_datasets.iter().any(|d| d == "maps") {
        read_stack_layout(&file, limits, &mut metadata, &mut found)?;
    } else {
        let group = if root.groups().map_err(h5err)?.iter().any(|g| g == "maps") {
            let g = file.group("maps").map_err(h5err)?;
            metadata_from(path, &g.attrs().map_err(h5err)?, &mut metadata)?;
            Some(g)
        } else {
            None
        };
        let prefix = if group.is_some() { "maps/" } else { "" };
        read_group_layout(&file, group.unwrap_or(root), prefix, limits, &mut found)?;
    }
    let Found {
        maps,
        dims,
        mut skipped,
        mut bse,
        ..
    } = found;
    if bse.is_none() && root_datasets.iter().any(|d| d == "bse") {
        bse = Some("bse".to_string());
    }
    for d in &root_datasets {
        let used = d == "maps" || d == "bse" || maps.iter().any(|m| m.source == source_of(path, d));
        if !used && skipped.iter().all(|s| s.name != *d) {
            skipped.push(Skipped {
                name: d.clone(),
                reason: "dataset outside the maps layout".into(),
            });
        }
    }
    metadata.check(path)?;
    let Some((w, h, _)) = dims else {
        return Err(bad(
            path,
            "contains no element maps (maps reached through soft or external links are not read)"
                .into(),
        ));
    };
    let stack = MapStack::new(path, w, h, maps, metadata)?;
    Ok(LoadedField {
        name: field_name(path),
        input: path.to_path_buf(),
        stack,
        skipped,
        bse: bse.map(|dataset| BseSource::Hdf5 {
            file: path.to_path_buf(),
            dataset,
        }),
        files: vec![path.to_path_buf()],
        warnings: Vec::new(),
    })
}

/// `file.h5:/name` for messages and map sources.
fn source_of(path: &Path, name: &str) -> String {
    format!("{}:/{}", path.display(), name.trim_start_matches('/'))
}

/// What the reading of a layout found.
struct Found<'a> {
    path: &'a Path,
    maps: Vec<ElementMap>,
    /// Width, height and name of the first map: every other must match.
    dims: Option<(usize, usize, String)>,
    skipped: Vec<Skipped>,
    /// The BSE dataset, if one was found with the maps.
    bse: Option<String>,
}

impl Found<'_> {
    /// Adds the map of dataset `name` (`h × w` counts), refusing one of another size.
    fn push(
        &mut self,
        name: &str,
        (h, w): (usize, usize),
        counts: Vec<f32>,
        (element, line): (crate::chem::ElementInfo, Option<String>),
    ) -> Result<()> {
        if let Some((w0, h0, first)) = &self.dims {
            if (*w0, *h0) != (w, h) {
                return Err(Error::input(
                    self.path,
                    format!("dataset {name} is {w}×{h} but {first} is {w0}×{h0}"),
                    "all maps of a field must share one size; re-export them together",
                ));
            }
        } else {
            self.dims = Some((w, h, name.to_string()));
        }
        self.maps.push(ElementMap {
            element,
            line,
            counts,
            source: source_of(self.path, name),
        });
        Ok(())
    }
}

/// Layout 2: one 3-D dataset `/maps` (element × height × width) with an `elements`
/// attribute naming its planes (and optionally `lines`).
fn read_stack_layout(
    file: &File,
    limits: &Limits,
    metadata: &mut FieldMetadata,
    found: &mut Found,
) -> Result<()> {
    let path = found.path;
    let h5err = |e: hdf5_pure::Error| unreadable(path, e);
    let ds = file.dataset("maps").map_err(h5err)?;
    let shape = checked_shape(path, "/maps", &ds, file.file_size(), limits)?;
    if shape.len() != 3 {
        return Err(bad(
            path,
            format!("dataset /maps has {} dimensions; a 3-D stack (element × height × width) was expected", shape.len()),
        ));
    }
    let attrs = ds.attrs().map_err(h5err)?;
    metadata_from(path, &attrs, metadata)?;
    let names: Vec<String> = attrs
        .get("elements")
        .and_then(|a| a.as_strings())
        .map(<[String]>::to_vec)
        .ok_or_else(|| {
            bad(
                path,
                "dataset /maps has no string-array attribute `elements` naming its planes".into(),
            )
        })?;
    let lines: Vec<String> = attrs
        .get("lines")
        .and_then(|a| a.as_strings())
        .map(<[String]>::to_vec)
        .unwrap_or_default();
    let (n, h, w) = (shape[0] as usize, shape[1] as usize, shape[2] as usize);
    if names.len() != n && names.len() == w {
        return Err(Error::input(
            path,
            format!(
                "dataset /maps is {n} × {h} × {w} with {} element names: it looks stored as height × width × element, but modalmap reads element × height × width",
                names.len()
            ),
            "write the planes first, e.g. in Python with h5py and numpy: f['maps'] = np.moveaxis(a, -1, 0) (keep the `elements` attribute)",
        ));
    }
    if names.len() != n {
        return Err(bad(
            path,
            format!(
                "attribute `elements` names {} planes but /maps has {n}",
                names.len()
            ),
        ));
    }
    let data = ds.read_f32().map_err(h5err)?;
    if data.len() != n * h * w {
        return Err(short(path));
    }
    for (i, name) in names.iter().enumerate() {
        let plane = data[i * h * w..(i + 1) * h * w].to_vec();
        let Some((e, line)) = parse_map_name(name) else {
            return Err(bad(
                path,
                format!("attribute `elements` entry {i} is `{name}`, not an element symbol (symbols are case-sensitive)"),
            ));
        };
        let line = lines.get(i).filter(|l| !l.is_empty()).cloned().or(line);
        found.push(&format!("maps[{i}] ({name})"), (h, w), plane, (e, line))?;
    }
    Ok(())
}

/// Layout 1: a group (`/maps`, or the root) of 2-D datasets named by element; a `BSE…`
/// dataset is the BSE image, other names are skipped with the reason.
fn read_group_layout(
    file: &File,
    group: hdf5_pure::Group,
    prefix: &str,
    limits: &Limits,
    found: &mut Found,
) -> Result<()> {
    let path = found.path;
    let h5err = |e: hdf5_pure::Error| unreadable(path, e);
    let mut names = group.datasets().map_err(h5err)?;
    names.sort();
    let (mut total, mut maps_seen) = (0u64, 0u64);
    for name in names {
        let full = format!("{prefix}{name}");
        if is_bse_name(&name) {
            found.bse = Some(full.clone());
            found.skipped.push(Skipped {
                name: full,
                reason: "backscattered-electron image, not an element map".into(),
            });
            continue;
        }
        let Some((element, line)) = parse_map_name(&name) else {
            found.skipped.push(Skipped {
                name: full,
                reason: super::not_a_map_reason(&name),
            });
            continue;
        };
        let ds = group.dataset(&name).map_err(h5err)?;
        let ((h, w), line) = map_dataset(path, &format!("/{full}"), &ds, file, limits, line)?;
        total = total.saturating_add((w * h) as u64);
        maps_seen += 1;
        super::raster::check_field_budget(path, maps_seen, total, limits)?;
        let data = ds.read_f32().map_err(h5err)?;
        if data.len() != h * w {
            return Err(short(path));
        }
        found.push(&format!("/{full}"), (h, w), data, (element, line))?;
    }
    Ok(())
}

/// The element maps of an HDF5 field in the group-of-2-D-datasets layout, opened for
/// reading a window of rows at a time (a montage): nothing is decoded yet.
pub(crate) struct RowListing {
    /// The file, opened for streaming reads.
    pub file: File,
    /// `maps/` or empty: where the datasets are.
    pub group: Option<String>,
    /// Dataset name, element, line.
    pub maps: Vec<(String, crate::chem::ElementInfo, Option<String>)>,
    /// Width.
    pub width: usize,
    /// Height.
    pub height: usize,
    /// Metadata from the attributes.
    pub metadata: FieldMetadata,
    /// A BSE dataset is present.
    pub has_bse: bool,
}

/// An element map's dataset: its size (height, width), checked to be 2-D and within the
/// limits, and its X-ray line (the `line` attribute, else the one from its name).
fn map_dataset(
    path: &Path,
    name: &str,
    ds: &hdf5_pure::Dataset,
    file: &File,
    limits: &Limits,
    line_from_name: Option<String>,
) -> Result<((usize, usize), Option<String>)> {
    let shape = checked_shape(path, name, ds, file.file_size(), limits)?;
    if shape.len() != 2 {
        return Err(bad(
            path,
            format!(
                "dataset {name} has shape {shape:?}; an element map must be 2-D (height × width)"
            ),
        ));
    }
    let line = ds
        .attrs()
        .map_err(|e| unreadable(path, e))?
        .get("line")
        .and_then(|a| a.as_str().map(str::to_string))
        .or(line_from_name);
    Ok(((shape[0] as usize, shape[1] as usize), line))
}

/// The error for a file the HDF5 reader refuses.
fn unreadable(path: &Path, e: hdf5_pure::Error) -> Error {
    // A soft or external link's entry has no object address (HDF5's "undefined address",
    // all bits set); the reader stops on it as if the file were cut short.
    if e.to_string().contains(&u64::MAX.to_string()) {
        return Error::input(
            path,
            "holds an HDF5 soft or external link where modalmap looks for maps (or an entry \
             with no address): this reader follows neither kind of link",
            LINK_FIX,
        );
    }
    Error::input(
        path,
        format!("is not a readable HDF5 file ({e})"),
        "the file is damaged, truncated or not HDF5; export it again",
    )
}

const LINK_FIX: &str = "store each map as a dataset in the file itself (with h5py, \
     f['maps/Fe'] = f['raw/Fe'][()] copies a linked dataset), then try again";

/// Lists an HDF5 field for reading by rows (see [`RowListing`]).
pub(crate) fn list_rows(path: &Path, limits: &Limits) -> Result<RowListing> {
    let h5err = |e: hdf5_pure::Error| unreadable(path, e);
    crate::guard::open_regular(path, "HDF5 field")?;
    let file = File::open_streaming(path).map_err(h5err)?;
    let root = file.root();
    let mut metadata = FieldMetadata::default();
    metadata_from(path, &root.attrs().map_err(h5err)?, &mut metadata)?;
    let root_datasets = root.datasets().map_err(h5err)?;
    if root_datasets.iter().any(|d| d == "maps") {
        return Err(Error::input(
            path,
            "holds its maps as one 3-D dataset, which cannot be read a strip of rows at a time",
            "store one 2-D dataset per element (in a group `maps` or at the root) to stream a montage, or leave out --stream",
        ));
    }
    let in_group = root.groups().map_err(h5err)?.iter().any(|g| g == "maps");
    let group = if in_group {
        let g = file.group("maps").map_err(h5err)?;
        metadata_from(path, &g.attrs().map_err(h5err)?, &mut metadata)?;
        g
    } else {
        root
    };
    let mut names = group.datasets().map_err(h5err)?;
    names.sort();
    let mut maps = Vec::new();
    let mut size: Option<(usize, usize)> = None;
    let mut has_bse = !in_group && root_datasets.iter().any(|d| d == "bse");
    for name in names {
        if is_bse_name(&name) {
            has_bse = true;
            continue;
        }
        let Some((element, line)) = parse_map_name(&name) else {
            continue;
        };
        let ds = group.dataset(&name).map_err(h5err)?;
        let ((h, w), line) = map_dataset(path, &name, &ds, &file, limits, line)?;
        match size {
            Some((w0, h0)) if (w0, h0) != (w, h) => {
                return Err(Error::input(
                    path,
                    format!("dataset {name} is {w}×{h} but the others are {w0}×{h0}"),
                    "all maps of a field must share one size; re-export them together",
                ))
            }
            _ => size = Some((w, h)),
        }
        maps.push((name, element, line));
    }
    metadata.check(path)?;
    let Some((width, height)) = size else {
        return Err(bad(
            path,
            "contains no element maps (maps reached through soft or external links are not read)"
                .into(),
        ));
    };
    Ok(RowListing {
        file,
        group: in_group.then(|| "maps".to_string()),
        maps,
        width,
        height,
        metadata,
        has_bse,
    })
}

/// Rows `y0..y0 + n` of one dataset of a listing, as `f32`.
pub(crate) fn read_rows(
    path: &Path,
    file: &File,
    group: Option<&str>,
    name: &str,
    y0: usize,
    n: usize,
) -> Result<Vec<f32>> {
    let err = |e: hdf5_pure::Error| {
        Error::input(
            path,
            format!("dataset {name} cannot be read ({e})"),
            "the file is damaged; export it again",
        )
    };
    let ds = match group {
        Some(g) => file.group(g).map_err(err)?.dataset(name).map_err(err)?,
        None => file.root().dataset(name).map_err(err)?,
    };
    ds.read_f32_rows(y0 as u64, n as u64).map_err(err)
}

/// Reads a 2-D BSE dataset (any numeric type) from an HDF5 file.
pub(super) fn load_bse(
    path: &Path,
    dataset: &str,
    limits: &Limits,
) -> Result<crate::bse::BseImage> {
    let inner = || -> Result<crate::bse::BseImage> {
        let h5err = |e: hdf5_pure::Error| {
            Error::input(
                path,
                format!("BSE dataset /{dataset} cannot be read ({e})"),
                "export the file again",
            )
        };
        crate::guard::open_regular(path, "HDF5 field")?;
        let file = File::open(path).map_err(h5err)?;
        let ds = file.dataset(dataset).map_err(h5err)?;
        let shape = checked_shape(path, dataset, &ds, file.file_size(), limits)?;
        if shape.len() != 2 {
            return Err(bad(
                path,
                format!("BSE dataset /{dataset} has shape {shape:?}; a 2-D image was expected"),
            ));
        }
        let saturation = match ds.dtype().map_err(h5err)? {
            hdf5_pure::DType::U8 => Some(255.0),
            hdf5_pure::DType::U16 => Some(65535.0),
            _ => None,
        };
        let data = ds.read_f32().map_err(h5err)?;
        let (h, w) = (shape[0] as usize, shape[1] as usize);
        if data.len() != w * h {
            return Err(short(path));
        }
        Ok(crate::bse::BseImage {
            width: w,
            height: h,
            data,
            saturation,
            source: format!("{}:/{}", path.display(), dataset),
        })
    };
    match catch_unwind(AssertUnwindSafe(inner)) {
        Ok(r) => r,
        Err(_) => Err(Error::input(
            path,
            "is a damaged HDF5 file (the decoder could not read the BSE dataset)",
            "export the file again",
        )),
    }
}
