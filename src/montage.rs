//! Fields too big to hold whole (stitched montages): labelled with a saved model strip by
//! strip, in bounded memory, with exactly the labels of the in-memory path.
//!
//! The maps are read a window of rows at a time (8/16-bit grayscale PNG maps, decoded row
//! by row). Two passes:
//! 1. the per-pixel total counts of the whole field (4 bytes a pixel), for the empty-pixel
//!    threshold and the share of empty pixels, which depend on the whole field;
//! 2. strips of rows, each with a halo of rows above and below: the strip and its halo are
//!    prepared (with the whole field's threshold and the dequantisation offsets of the
//!    pixels' places in the field) and labelled; only the strip's own rows are kept. Every
//!    step of the labelling looks only at nearby pixels, and a bounded number of times
//!    (ICM sweeps, unmixing passes), so a halo as wide as the farthest reach of all steps
//!    ([`halo_rows`]) gives each strip row the label it gets in the whole field.
//!
//! The per-phase sums (counts, interior sums for the compositions) are added strip by
//! strip; the label image of the whole field (2 bytes a pixel) is kept for the phase image
//! and the particle count. Memory: about 6 bytes a pixel of the whole field (labels, and
//! the totals of pass 1, freed before pass 2) plus a strip of ~[`STRIP_BYTES`].

use std::collections::VecDeque;
use std::fs::File;
use std::io::BufReader;
use std::path::{Path, PathBuf};

use crate::chem::ElementInfo;
use crate::cluster::Clusters;
use crate::error::{Error, Result};
use crate::io::Limits;
use crate::phases::{table_from_sums, ClearSums, PhaseSums, PhaseTable, MAX_CLEARANCE};
use crate::pipeline::ValidMapOptions;
use crate::prepare::{
    empty_share, median_total, prepare_window, Denoise, MinCounts, WindowContext,
};
use crate::refine::{Segmentation, UNMIX_PASSES};
use crate::stack::{ElementMap, FieldMetadata, MapStack};

/// Working memory aimed at for one strip with its halo, bytes.
pub const STRIP_BYTES: usize = 768 << 20;

/// Rows of one map, read forward (a request never starts above an earlier one).
pub trait RowSource {
    /// Rows `y0..y0 + n` as counts, row-major.
    fn rows(&mut self, y0: usize, n: usize) -> Result<Vec<f32>>;
}

/// A map held in memory.
struct MemoryRows {
    width: usize,
    data: Vec<f32>,
}

impl RowSource for MemoryRows {
    fn rows(&mut self, y0: usize, n: usize) -> Result<Vec<f32>> {
        Ok(self.data[y0 * self.width..(y0 + n) * self.width].to_vec())
    }
}

/// A grayscale PNG decoded row by row, keeping only the rows still to be asked for.
struct PngRows {
    path: PathBuf,
    reader: png::Reader<BufReader<File>>,
    width: usize,
    sixteen: bool,
    /// Rows decoded and kept, the first being row `first`.
    kept: VecDeque<Vec<f32>>,
    first: usize,
}

impl PngRows {
    fn open(path: &Path, limits: &Limits) -> Result<(PngRows, usize, usize)> {
        let file = crate::guard::open_regular(path, "element map")?;
        let bad = |p: String| {
            Error::input(
                path,
                p,
                "export maps as 8- or 16-bit grayscale, non-interlaced PNG",
            )
        };
        let png_limits = png::Limits {
            bytes: usize::try_from(limits.max_pixels.saturating_mul(8)).unwrap_or(usize::MAX),
        };
        let reader = png::Decoder::new_with_limits(BufReader::new(file), png_limits)
            .read_info()
            .map_err(|e| bad(format!("is not a readable PNG ({e})")))?;
        let info = reader.info();
        let (w, h) = (info.width as usize, info.height as usize);
        if info.color_type != png::ColorType::Grayscale {
            return Err(bad("is not a grayscale PNG".into()));
        }
        if info.interlaced {
            return Err(bad(
                "is interlaced, so it cannot be read a row at a time".into()
            ));
        }
        let sixteen = match info.bit_depth {
            png::BitDepth::Eight => false,
            png::BitDepth::Sixteen => true,
            d => return Err(bad(format!("is a {}-bit PNG", d as u8))),
        };
        if (w as u64).saturating_mul(h as u64) > limits.max_pixels {
            return Err(Error::input(
                path,
                format!(
                    "declares {w}×{h} pixels, above the limit of {}",
                    limits.max_pixels
                ),
                "raise --max-pixels if the montage is genuine",
            ));
        }
        Ok((
            PngRows {
                path: path.to_path_buf(),
                reader,
                width: w,
                sixteen,
                kept: VecDeque::new(),
                first: 0,
            },
            w,
            h,
        ))
    }

    fn decode_next(&mut self) -> Result<Vec<f32>> {
        let w = self.width;
        let sixteen = self.sixteen;
        let row = self
            .reader
            .next_row()
            .map_err(|e| {
                Error::input(
                    &self.path,
                    format!("is damaged ({e})"),
                    "export the map again",
                )
            })?
            .ok_or_else(|| Error::input(&self.path, "ends early", "export the map again"))?;
        let data = row.data();
        Ok(if sixteen {
            data[..2 * w]
                .chunks_exact(2)
                .map(|b| f32::from(u16::from_be_bytes([b[0], b[1]])))
                .collect()
        } else {
            data[..w].iter().map(|&v| f32::from(v)).collect()
        })
    }
}

impl RowSource for PngRows {
    fn rows(&mut self, y0: usize, n: usize) -> Result<Vec<f32>> {
        if y0 < self.first {
            return Err(Error::internal(format!(
                "{}: rows {y0}.. asked for after row {} (the reader only goes forward)",
                self.path.display(),
                self.first
            )));
        }
        while self.first < y0 && !self.kept.is_empty() {
            self.kept.pop_front();
            self.first += 1;
        }
        if self.kept.is_empty() {
            // Skip rows nobody asks for.
            while self.first < y0 {
                self.decode_next()?;
                self.first += 1;
            }
        }
        while self.first + self.kept.len() < y0 + n {
            let r = self.decode_next()?;
            self.kept.push_back(r);
        }
        let mut out = Vec::with_capacity(n * self.width);
        for r in self.kept.iter().take(y0 + n - self.first) {
            out.extend_from_slice(r);
        }
        Ok(out)
    }
}

/// A map in an HDF5 file, read by row windows (only the chunks a window touches).
struct Hdf5Rows {
    path: PathBuf,
    file: std::rc::Rc<hdf5_pure::File>,
    group: Option<String>,
    name: String,
}

impl RowSource for Hdf5Rows {
    fn rows(&mut self, y0: usize, n: usize) -> Result<Vec<f32>> {
        crate::io::hdf5::read_rows(
            &self.path,
            &self.file,
            self.group.as_deref(),
            &self.name,
            y0,
            n,
        )
    }
}

/// A field opened for reading by rows.
pub struct StreamedField {
    /// Field name.
    pub name: String,
    /// Input path.
    pub input: PathBuf,
    /// Width, pixels.
    pub width: usize,
    /// Height, pixels.
    pub height: usize,
    /// Mapped elements with the line of each map, by atomic number.
    pub lines: Vec<(ElementInfo, Option<String>)>,
    /// Metadata.
    pub metadata: FieldMetadata,
    /// Files read (for provenance).
    pub files: Vec<PathBuf>,
    /// Things to tell the user.
    pub warnings: Vec<String>,
    /// A BSE image was found with the maps.
    pub has_bse: bool,
    sources: Vec<Box<dyn RowSource>>,
}

impl StreamedField {
    /// A field held in memory, read by rows (for tests, and to check the strips against
    /// the in-memory path).
    pub fn from_stack(stack: MapStack, name: &str) -> StreamedField {
        let (w, h) = (stack.width(), stack.height());
        let metadata = stack.metadata().clone();
        let lines = stack
            .maps()
            .iter()
            .map(|m| (m.element, m.line.clone()))
            .collect();
        let sources = stack
            .maps()
            .iter()
            .map(|m| {
                Box::new(MemoryRows {
                    width: w,
                    data: m.counts.clone(),
                }) as Box<dyn RowSource>
            })
            .collect();
        StreamedField {
            name: name.to_string(),
            input: PathBuf::from(name),
            width: w,
            height: h,
            lines,
            metadata,
            files: Vec::new(),
            warnings: Vec::new(),
            has_bse: false,
            sources,
        }
    }

    /// Opens a folder of PNG maps, or an HDF5 file with one 2-D dataset per element, for
    /// reading by rows.
    pub fn open(input: &Path, limits: &Limits) -> Result<StreamedField> {
        if input.is_file() && crate::io::hdf5::looks_like_hdf5(input) {
            return Self::open_hdf5(input, limits);
        }
        if !input.is_dir() {
            return Err(Error::input(
                input,
                "cannot be streamed: a montage is read a strip at a time from a folder of PNG maps or an HDF5 file",
                "give the montage as a folder of 8/16-bit grayscale PNG maps or an HDF5 file with one 2-D dataset per element, or leave out --stream to load it whole",
            ));
        }
        let listing = crate::io::folder::list(input)?;
        let mut maps: Vec<(ElementInfo, Option<String>, PathBuf)> = listing
            .map_files
            .into_iter()
            .map(|(p, e, l)| (e, l, p))
            .collect();
        maps.sort_by_key(|m| m.0.z);
        let mut sources: Vec<Box<dyn RowSource>> = Vec::new();
        let mut size: Option<(usize, usize, PathBuf)> = None;
        for (_, _, path) in &maps {
            let is_png = path
                .extension()
                .is_some_and(|x| x.eq_ignore_ascii_case("png"));
            if !is_png {
                return Err(Error::input(
                    path,
                    "is not a PNG: streamed montages are read from PNG maps",
                    "convert the maps to 16-bit grayscale PNG, or leave out --stream to load the field whole",
                ));
            }
            let (src, w, h) = PngRows::open(path, limits)?;
            match &size {
                Some((w0, h0, first)) if (*w0, *h0) != (w, h) => {
                    return Err(Error::input(
                        path,
                        format!("is {w}×{h} but {} is {w0}×{h0}", first.display()),
                        "all maps of a field must share one size",
                    ))
                }
                None => size = Some((w, h, path.clone())),
                _ => {}
            }
            sources.push(Box::new(src));
        }
        let (width, height, _) = size.expect("a listing has at least one map");
        Ok(StreamedField {
            name: crate::io::field_name(input),
            input: input.to_path_buf(),
            width,
            height,
            lines: maps.iter().map(|m| (m.0, m.1.clone())).collect(),
            metadata: listing.metadata,
            files: maps.iter().map(|m| m.2.clone()).collect(),
            warnings: listing
                .warnings
                .into_iter()
                .chain(crate::run::dropped_inputs(&listing.skipped))
                .collect(),
            has_bse: !listing.bse_files.is_empty(),
            sources,
        })
    }

    fn open_hdf5(input: &Path, limits: &Limits) -> Result<StreamedField> {
        let l = crate::io::hdf5::list_rows(input, limits)?;
        let file = std::rc::Rc::new(l.file);
        let mut maps = l.maps;
        maps.sort_by_key(|m| m.1.z);
        let sources = maps
            .iter()
            .map(|(name, _, _)| {
                Box::new(Hdf5Rows {
                    path: input.to_path_buf(),
                    file: file.clone(),
                    group: l.group.clone(),
                    name: name.clone(),
                }) as Box<dyn RowSource>
            })
            .collect();
        Ok(StreamedField {
            name: crate::io::field_name(input),
            input: input.to_path_buf(),
            width: l.width,
            height: l.height,
            lines: maps.iter().map(|m| (m.1, m.2.clone())).collect(),
            metadata: l.metadata,
            files: vec![input.to_path_buf()],
            warnings: Vec::new(),
            has_bse: l.has_bse,
            sources,
        })
    }

    /// The element symbols, in order.
    pub fn symbols(&self) -> Vec<&'static str> {
        self.lines.iter().map(|l| l.0.symbol).collect()
    }

    /// Rows `r0..r1` of every map as a stack.
    fn read(&mut self, r0: usize, r1: usize) -> Result<MapStack> {
        let w = self.width;
        let mut maps = Vec::with_capacity(self.sources.len());
        for (src, (e, l)) in self.sources.iter_mut().zip(&self.lines) {
            maps.push(ElementMap {
                element: *e,
                line: l.clone(),
                counts: src.rows(r0, r1 - r0)?,
                source: format!("rows {r0}..{r1}"),
            });
        }
        MapStack::new(&self.input, w, r1 - r0, maps, self.metadata.clone())
    }
}

/// Rows of halo above and below a strip, on the labelling grid, for these options: the
/// reach of the denoising filter, the 3 × 3 start, 4 pixels per ICM sweep (the four colour
/// classes can pass a change on by up to a pixel each), 4 per unmixing pass, the
/// minimum-feature rule, the widest composition clearance, and a margin of 2.
pub fn halo_rows(opts: &ValidMapOptions) -> usize {
    let o = opts.options();
    let denoise = match o.prepare.denoise {
        Denoise::None => 0,
        Denoise::Median { radius } => radius,
        Denoise::Gaussian { sigma } => (4.0 * sigma).ceil() as usize + 1,
    };
    denoise
        + 1
        + 4 * o.refine.max_sweeps
        + 4 * UNMIX_PASSES
        + o.refine.min_feature_px
        + MAX_CLEARANCE
        + 2
}

/// Strip height (rows of the labelling grid) that keeps a strip with its halo near
/// [`STRIP_BYTES`]: 8 bytes per value of the strip (counts and features, both `f32`) plus
/// 40 per pixel (labelling state), as measured (122 bytes a pixel with 10 maps).
pub fn strip_rows(width: usize, elements: usize, halo: usize) -> usize {
    let per_row = width.max(1) * (8 * elements + 40);
    (STRIP_BYTES / per_row).saturating_sub(2 * halo).max(64)
}

/// A streamed field, labelled.
pub struct Streamed {
    /// Phase statistics (ids in the model's order).
    pub table: PhaseTable,
    /// Labels of the whole field (renumbered to phase ids); no posteriors are kept.
    pub segmentation: Segmentation,
    /// Interior sums for the compositions.
    pub clear: ClearSums,
    /// Empty-pixel threshold used.
    pub min_counts_used: f64,
    /// Strips labelled.
    pub strips: usize,
    /// Halo rows used.
    pub halo: usize,
}

/// Labels a field strip by strip with a saved model's clusters (see the module docs).
/// `strip` overrides the strip height (rows of the labelling grid); `progress` hears
/// (strips done, strips in all).
pub fn label_streamed(
    field: &mut StreamedField,
    opts: &ValidMapOptions,
    clusters: &Clusters,
    order: &[usize],
    strip: Option<usize>,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<Streamed> {
    let p = *opts.options();
    let bin = p.prepare.bin;
    let (gw, gh) = (field.width / bin, field.height / bin);
    if gw == 0 || gh == 0 {
        return Err(Error::input(
            &field.input,
            format!("is smaller than one {bin}×{bin} bin"),
            "bin less",
        ));
    }
    let d = field.lines.len();
    let k = clusters.k();
    let halo = halo_rows(opts);
    let rows = strip.unwrap_or_else(|| strip_rows(gw, d, halo)).max(1);
    let n_strips = gh.div_ceil(rows);
    let transform = opts.transform();

    // Pass 1: per-pixel totals on the labelling grid, for the threshold and empty share.
    let mut totals = vec![0f32; gw * gh];
    for s in 0..n_strips {
        let (c0, c1) = (s * rows, ((s + 1) * rows).min(gh));
        let stack = crate::prepare::bin_stack(field.read(c0 * bin, c1 * bin)?, bin)?;
        for m in stack.maps() {
            for (t, &c) in totals[c0 * gw..c1 * gw].iter_mut().zip(&m.counts) {
                *t += c;
            }
        }
    }
    let min_counts_used = match p.prepare.min_counts {
        MinCounts::Relative { fraction } => fraction * median_total(&totals),
        MinCounts::Absolute { counts } => counts,
    };
    let empty = totals
        .iter()
        .filter(|&&t| !(f64::from(t) >= min_counts_used && t > 0.0))
        .count();
    let empty_fraction = empty_share(empty, gw * gh);
    drop(totals);
    // The sources read forward only: open them again for the second pass.
    field.rewind()?;

    // Pass 2: strips with their halo.
    let mut labels = vec![0u16; gw * gh];
    let mut sums = PhaseSums::new(k, d);
    let mut clear = ClearSums::new(k, d);
    let (mut empty_pixels, mut outlier_pixels) = (0usize, 0usize);
    for s in 0..n_strips {
        let (c0, c1) = (s * rows, ((s + 1) * rows).min(gh));
        // The view starts on an even row: the labelling updates pixels in four colour
        // classes by the parity of their row and column, which must be the field's.
        let (v0, v1) = (c0.saturating_sub(halo) & !1, (c1 + halo).min(gh));
        let view = field.read(v0 * bin, v1 * bin)?;
        let f = prepare_window(
            view,
            &transform,
            Some(&WindowContext {
                first_pixel: v0 * gw,
                min_counts_used,
                empty_fraction,
            }),
        )?;
        let seg = crate::refine::refine(&f, clusters, &opts.refine());
        let core = (c0 - v0) * gw..(c1 - v0) * gw;
        labels[c0 * gw..c1 * gw].copy_from_slice(&seg.labels[core.clone()]);
        let planes: Vec<&[f32]> = f
            .counts
            .maps()
            .iter()
            .map(|m| &m.counts[core.clone()])
            .collect();
        sums.add(&PhaseSums::accumulate(
            &seg.labels[core.clone()],
            &seg.confidence[core.clone()],
            &planes,
            k,
        ));
        let view_planes: Vec<&[f32]> = f
            .counts
            .maps()
            .iter()
            .map(|m| m.counts.as_slice())
            .collect();
        clear.add(&ClearSums::over_rows(
            &seg.labels,
            gw,
            v1 - v0,
            &view_planes,
            k,
            (c0 - v0)..(c1 - v0),
        ));
        for i in core {
            if seg.labels[i] == 0 {
                if seg.outliers[i] {
                    outlier_pixels += 1;
                } else {
                    empty_pixels += 1;
                }
            }
        }
        progress(s + 1, n_strips);
    }
    let mut segmentation = Segmentation {
        width: gw,
        height: gh,
        labels,
        confidence: Vec::new(),
        empty_pixels,
        outlier_pixels,
        outliers: Vec::new(),
        sweep_changes: Vec::new(),
        small_feature_pixels: 0,
        unmixed_pixels: 0,
        smoothed_labels: Vec::new(),
    };
    let infos: Vec<ElementInfo> = field.lines.iter().map(|l| l.0).collect();
    let table = table_from_sums(sums, &mut segmentation, &infos, Some(order));
    Ok(Streamed {
        table,
        segmentation,
        clear,
        min_counts_used,
        strips: n_strips,
        halo,
    })
}

impl StreamedField {
    /// The whole field again, binned onto the labelling grid, when its values fit within
    /// `max_values` (`None` when they do not): for the steps that need every pixel's counts
    /// at once after the labelling (unmixing thin phases).
    pub fn read_whole(&mut self, bin: usize, max_values: u64) -> Result<Option<MapStack>> {
        let rows = self.height / bin * bin;
        if (self.width as u64) * (rows as u64) * (self.lines.len() as u64) > max_values {
            return Ok(None);
        }
        self.rewind()?;
        let stack = crate::prepare::bin_stack(self.read(0, rows)?, bin)?;
        self.rewind()?;
        Ok(Some(stack))
    }

    /// Starts every map again from its first row.
    fn rewind(&mut self) -> Result<()> {
        let png = self
            .files
            .first()
            .is_some_and(|p| p.extension().is_some_and(|x| x.eq_ignore_ascii_case("png")));
        if !png {
            return Ok(()); // in memory or HDF5: reads are random access
        }
        let limits = Limits {
            max_pixels: u64::MAX,
        };
        let mut sources: Vec<Box<dyn RowSource>> = Vec::new();
        for p in &self.files {
            sources.push(Box::new(PngRows::open(p, &limits)?.0));
        }
        self.sources = sources;
        Ok(())
    }
}
