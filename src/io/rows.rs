//! Fields read a window of rows at a time (stitched montages too big to hold whole): a
//! folder of 8/16-bit grayscale PNG maps decoded row by row, or an HDF5 file read by row
//! windows, behind one [`RowSource`] per map. The montage labelling
//! ([`crate::montage`]) reads strips from a [`StreamedField`].

use std::collections::VecDeque;
use std::fs::File;
use std::io::BufReader;
use std::path::{Path, PathBuf};

use crate::chem::ElementInfo;
use crate::error::{Error, Result};
use crate::io::raster::{check_png_header, corrupt, png_limits};
use crate::io::Limits;
use crate::stack::{ElementMap, FieldMetadata, MapStack};

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
        let reader = png::Decoder::new_with_limits(BufReader::new(file), png_limits(limits))
            .read_info()
            .map_err(|e| corrupt(path, "PNG", e))?;
        let info = reader.info();
        let (w, h) = (info.width as usize, info.height as usize);
        let sixteen = check_png_header(path, info, limits)? == 16;
        if info.interlaced {
            return Err(Error::input(
                path,
                "is an interlaced PNG, so it cannot be read a row at a time",
                "export the maps as non-interlaced PNG",
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
                .chain(crate::io::dropped_inputs(&listing.skipped))
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
    pub fn read(&mut self, r0: usize, r1: usize) -> Result<MapStack> {
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
    pub fn rewind(&mut self) -> Result<()> {
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::io::raster::{read_raster, write_png_rgb, write_png_u16, write_png_u8};

    /// Rows read in windows (out of order, overlapping, as the strips with their halos
    /// read them) are the rows of the whole-image decoder.
    #[test]
    fn png_row_windows_match_the_whole_image_decoder() {
        let dir = tempfile::tempdir().unwrap();
        let (w, h) = (7, 11);
        let u16s: Vec<u16> = (0..w * h).map(|i| (i * 611 % 65_521) as u16).collect();
        let u8s: Vec<u8> = (0..w * h).map(|i| (i * 37 % 251) as u8).collect();
        let p16 = dir.path().join("a16.png");
        let p8 = dir.path().join("a8.png");
        write_png_u16(&p16, w, h, &u16s).unwrap();
        write_png_u8(&p8, w, h, &u8s).unwrap();
        for p in [&p16, &p8] {
            let whole = read_raster(p, &Limits::default()).unwrap().data;
            let (mut rows, rw, rh) = PngRows::open(p, &Limits::default()).unwrap();
            assert_eq!((rw, rh), (w, h));
            for (y0, n) in [(0, 3), (2, 4), (5, 6), (5, 1), (9, 2)] {
                let got = rows.rows(y0, n).unwrap();
                assert_eq!(
                    got,
                    whole[y0 * w..(y0 + n) * w],
                    "{} rows {y0}+{n}",
                    p.display()
                );
            }
        }
    }

    /// The row reader refuses what the whole-image decoder refuses, with the same words.
    #[test]
    fn png_rows_refuse_what_the_whole_decoder_refuses() {
        let dir = tempfile::tempdir().unwrap();
        let rgb = dir.path().join("rgb.png");
        write_png_rgb(&rgb, 2, 2, &[0; 12]).unwrap();
        let big = dir.path().join("big.png");
        write_png_u8(&big, 100, 100, &vec![1; 10_000]).unwrap();
        for (p, limits) in [
            (&rgb, Limits::default()),
            (&big, Limits { max_pixels: 9_999 }),
        ] {
            let whole = read_raster(p, &limits).unwrap_err();
            let Err(rows) = PngRows::open(p, &limits) else {
                panic!("{} was read by rows", p.display());
            };
            assert_eq!(rows.to_string(), whole.to_string());
        }
    }
}
