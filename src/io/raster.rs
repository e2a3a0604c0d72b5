//! Single-channel raster images: PNG (8/16-bit) and TIFF (8/16/32-bit integer, 32/64-bit
//! float) decoded to `f32` counts under size limits, and the few encoders modalmap needs.
//!
//! Decoding checks the declared size against [`Limits`] *before* allocating, so a hostile
//! header that claims 60 000 × 60 000 pixels fails at once with the option that raises the
//! limit, instead of asking for gigabytes.

use std::io::{BufWriter, Cursor, Write};
use std::path::Path;

use crate::error::{Error, Result};

/// Decoding limits (style of image-rs `Limits`): checked before any large allocation.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Limits {
    /// Largest number of pixels accepted in one map or image.
    pub max_pixels: u64,
}

impl Limits {
    /// The default: 300 million pixels per map (a 17 000 × 17 000 montage), which at 4 bytes
    /// per value keeps one decoded map near 1.2 GB.
    pub const DEFAULT_MAX_PIXELS: u64 = 300_000_000;
}

impl Limits {
    /// Largest number of values (pixels × maps) of one field together, and of its maps
    /// and BSE image together: four maps at the per-map limit (4.8 GB as 32-bit values by
    /// default). Checked from the headers, before any map is decoded.
    pub fn max_field_values(&self) -> u64 {
        self.max_pixels.saturating_mul(4)
    }
}

impl Default for Limits {
    fn default() -> Self {
        Limits {
            max_pixels: Self::DEFAULT_MAX_PIXELS,
        }
    }
}

/// A decoded single-channel image.
#[derive(Debug, Clone, PartialEq)]
pub struct Raster {
    /// Width in pixels.
    pub width: usize,
    /// Height in pixels.
    pub height: usize,
    /// Values, row-major.
    pub data: Vec<f32>,
    /// What was decoded, for messages: e.g. `16-bit PNG`.
    pub format: String,
}

/// Image file formats modalmap reads.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum RasterFormat {
    /// Portable Network Graphics.
    Png,
    /// Tagged Image File Format.
    Tiff,
}

impl RasterFormat {
    /// The format implied by a file name's extension (case-insensitive).
    pub fn from_path(path: &Path) -> Option<RasterFormat> {
        let ext = path.extension()?.to_str()?.to_ascii_lowercase();
        match ext.as_str() {
            "png" => Some(RasterFormat::Png),
            "tif" | "tiff" => Some(RasterFormat::Tiff),
            _ => None,
        }
    }
}

const GRAY_FIX: &str = "element maps must be single-channel grayscale counts: re-export the \
     raw counts map (16-bit PNG or TIFF) rather than a coloured picture; converting a colour \
     picture to gray does not give back the counts";

fn check_size(path: &Path, width: u64, height: u64, limits: &Limits) -> Result<()> {
    if width == 0 || height == 0 {
        return Err(Error::input(
            path,
            format!("declares {width}×{height} pixels; an image needs at least one pixel"),
            "re-export the image",
        ));
    }
    let pixels = width.saturating_mul(height);
    if pixels > limits.max_pixels {
        return Err(Error::input(
            path,
            format!(
                "declares {width}×{height} = {pixels} pixels, above the limit of {} pixels",
                limits.max_pixels
            ),
            "if the image really is that large, raise the limit with --max-pixels \
             (memory needed: about 4 bytes per pixel per element)",
        ));
    }
    Ok(())
}

/// Reads a whole file, refusing anything but a regular file and files far larger than any
/// image within the limits.
fn read_bytes(path: &Path, limits: &Limits) -> Result<Vec<u8>> {
    // Uncompressed 64-bit samples plus generous room for headers.
    let max_bytes = limits.max_pixels.saturating_mul(8).saturating_add(1 << 20);
    crate::guard::read_regular(path, "image", max_bytes).map_err(|e| {
        if e.problem.starts_with("is larger than") {
            Error::input(
                path,
                "is larger than any image within the limits",
                "raise the limit with --max-pixels if the image really is that large",
            )
        } else {
            e
        }
    })
}

/// Width and height declared by a PNG or TIFF file's header, read without decoding the
/// image (for the field's memory budget), checked against the per-map limit.
pub fn probe_size(path: &Path, limits: &Limits) -> Result<(u64, u64)> {
    let format = RasterFormat::from_path(path).ok_or_else(|| {
        Error::input(
            path,
            "is not a PNG or TIFF file (by its extension)",
            "give maps as .png, .tif or .tiff",
        )
    })?;
    let file = std::io::BufReader::new(crate::guard::open_regular(path, "image")?);
    let (w, h) = match format {
        RasterFormat::Png => {
            let mut dec = png::Decoder::new(file);
            let info = dec
                .read_header_info()
                .map_err(|e| corrupt(path, "PNG", e))?;
            (info.width, info.height)
        }
        RasterFormat::Tiff => tiff::decoder::Decoder::new(file)
            .and_then(|mut d| d.dimensions())
            .map_err(|e| corrupt(path, "TIFF", e))?,
    };
    check_size(path, u64::from(w), u64::from(h), limits)?;
    Ok((u64::from(w), u64::from(h)))
}

/// Refuses a field whose `maps` maps together hold more values (`total`, from their
/// declared sizes) than `limits` allow.
pub fn check_field_budget(field: &Path, maps: u64, total: u64, limits: &Limits) -> Result<()> {
    if total > limits.max_field_values() {
        return Err(Error::input(
            field,
            format!(
                "holds {} values in its {} maps (about {} GB in memory), above the limit of {} values for one field",
                total,
                maps,
                total.saturating_mul(4).div_ceil(1_000_000_000),
                limits.max_field_values()
            ),
            "bin the maps on export, label the field strip by strip with `modalmap apply --stream`, \
             or raise --max-pixels (the limit is four times it) if the machine has the memory",
        ));
    }
    Ok(())
}

/// Decodes a PNG or TIFF file to one channel of `f32`.
pub fn read_raster(path: &Path, limits: &Limits) -> Result<Raster> {
    let format = RasterFormat::from_path(path).ok_or_else(|| {
        Error::input(
            path,
            "is not a PNG or TIFF file (by its extension)",
            "give maps as .png, .tif or .tiff",
        )
    })?;
    let bytes = read_bytes(path, limits)?;
    match format {
        RasterFormat::Png => decode_png(path, &bytes, limits),
        RasterFormat::Tiff => decode_tiff(path, &bytes, limits),
    }
}

/// Decodes image bytes already in memory; `path` names them in messages. (The fuzz
/// targets call this.)
pub fn decode_raster(
    path: &Path,
    format: RasterFormat,
    bytes: &[u8],
    limits: &Limits,
) -> Result<Raster> {
    match format {
        RasterFormat::Png => decode_png(path, bytes, limits),
        RasterFormat::Tiff => decode_tiff(path, bytes, limits),
    }
}

pub(crate) fn corrupt(path: &Path, what: &str, err: impl std::fmt::Display) -> Error {
    Error::input(
        path,
        format!("is not a readable {what} ({err})"),
        "the file is damaged, truncated or not really this format; export it again",
    )
}

/// The PNG decoder's memory limit for images within `limits`.
pub(crate) fn png_limits(limits: &Limits) -> png::Limits {
    png::Limits {
        bytes: usize::try_from(limits.max_pixels.saturating_mul(8)).unwrap_or(usize::MAX),
    }
}

/// Checks a PNG map's header before any pixel is decoded: the declared size against the
/// limits, grayscale without alpha, 8 or 16 bits. Returns the bit depth. Shared by the
/// whole-image decoder and the row reader of [`crate::io::rows`].
pub(crate) fn check_png_header(path: &Path, info: &png::Info<'_>, limits: &Limits) -> Result<u8> {
    check_size(path, u64::from(info.width), u64::from(info.height), limits)?;
    match info.color_type {
        png::ColorType::Grayscale => {}
        png::ColorType::GrayscaleAlpha => {
            return Err(Error::input(
                path,
                "is a grayscale PNG with an alpha channel",
                GRAY_FIX,
            ))
        }
        png::ColorType::Rgb | png::ColorType::Rgba => {
            return Err(Error::input(path, "is an RGB colour PNG", GRAY_FIX))
        }
        png::ColorType::Indexed => {
            return Err(Error::input(
                path,
                "is a palette (indexed-colour) PNG",
                GRAY_FIX,
            ))
        }
    }
    let bits = match info.bit_depth {
        png::BitDepth::Eight => 8,
        png::BitDepth::Sixteen => 16,
        other => {
            return Err(Error::input(
                path,
                format!("is a {}-bit grayscale PNG", other as u8),
                "export maps as 8- or 16-bit grayscale",
            ))
        }
    };
    Ok(bits)
}

fn decode_png(path: &Path, bytes: &[u8], limits: &Limits) -> Result<Raster> {
    let decoder = png::Decoder::new_with_limits(Cursor::new(bytes), png_limits(limits));
    let mut reader = decoder.read_info().map_err(|e| corrupt(path, "PNG", e))?;
    let bits = check_png_header(path, reader.info(), limits)?;
    let size = reader
        .output_buffer_size()
        .ok_or_else(|| corrupt(path, "PNG", "image too large for this platform"))?;
    let mut buf = vec![0u8; size];
    let out = reader
        .next_frame(&mut buf)
        .map_err(|e| corrupt(path, "PNG", e))?;
    let (w, h) = (out.width as usize, out.height as usize);
    let mut data = Vec::with_capacity(w * h);
    for row in buf.chunks_exact(out.line_size).take(h) {
        if bits == 8 {
            data.extend(row[..w].iter().map(|&v| f32::from(v)));
        } else {
            data.extend(
                row[..2 * w]
                    .chunks_exact(2)
                    .map(|b| f32::from(u16::from_be_bytes([b[0], b[1]]))),
            );
        }
    }
    Ok(Raster {
        width: w,
        height: h,
        data,
        format: format!("{bits}-bit PNG"),
    })
}

fn decode_tiff(path: &Path, bytes: &[u8], limits: &Limits) -> Result<Raster> {
    use tiff::decoder::{Decoder, DecodingResult};
    use tiff::ColorType;
    let mut tl = tiff::decoder::Limits::default();
    tl.decoding_buffer_size =
        usize::try_from(limits.max_pixels.saturating_mul(8)).unwrap_or(usize::MAX);
    tl.intermediate_buffer_size = tl.decoding_buffer_size;
    let mut dec = Decoder::new(Cursor::new(bytes))
        .map_err(|e| corrupt(path, "TIFF", e))?
        .with_limits(tl);
    let (w, h) = dec.dimensions().map_err(|e| corrupt(path, "TIFF", e))?;
    check_size(path, u64::from(w), u64::from(h), limits)?;
    let color = dec.colortype().map_err(|e| corrupt(path, "TIFF", e))?;
    let bits = match color {
        ColorType::Gray(b) => b,
        ColorType::RGB(_) | ColorType::RGBA(_) => {
            return Err(Error::input(path, "is an RGB colour TIFF", GRAY_FIX))
        }
        ColorType::Palette(_) => {
            return Err(Error::input(
                path,
                "is a palette (indexed-colour) TIFF",
                GRAY_FIX,
            ))
        }
        ColorType::GrayA(_) => {
            return Err(Error::input(
                path,
                "is a grayscale TIFF with an alpha channel",
                GRAY_FIX,
            ))
        }
        other => {
            return Err(Error::input(
                path,
                format!("has a colour layout modalmap cannot use ({other:?})"),
                GRAY_FIX,
            ))
        }
    };
    let result = dec.read_image().map_err(|e| corrupt(path, "TIFF", e))?;
    let (data, kind): (Vec<f32>, &str) = match result {
        DecodingResult::U8(v) => (v.into_iter().map(f32::from).collect(), "integer"),
        DecodingResult::U16(v) => (v.into_iter().map(f32::from).collect(), "integer"),
        DecodingResult::U32(v) => (v.into_iter().map(|x| x as f32).collect(), "integer"),
        DecodingResult::U64(v) => (v.into_iter().map(|x| x as f32).collect(), "integer"),
        DecodingResult::I8(v) => (v.into_iter().map(f32::from).collect(), "signed integer"),
        DecodingResult::I16(v) => (v.into_iter().map(f32::from).collect(), "signed integer"),
        DecodingResult::I32(v) => (v.into_iter().map(|x| x as f32).collect(), "signed integer"),
        DecodingResult::I64(v) => (v.into_iter().map(|x| x as f32).collect(), "signed integer"),
        DecodingResult::F32(v) => (v, "float"),
        DecodingResult::F64(v) => (v.into_iter().map(|x| x as f32).collect(), "float"),
        DecodingResult::F16(v) => (v.into_iter().map(f32::from).collect(), "float"),
    };
    let (w, h) = (w as usize, h as usize);
    if data.len() < w * h {
        return Err(corrupt(path, "TIFF", "fewer samples than pixels"));
    }
    let mut data = data;
    data.truncate(w * h);
    Ok(Raster {
        width: w,
        height: h,
        data,
        format: format!("{bits}-bit {kind} TIFF"),
    })
}

fn create(path: &Path) -> Result<BufWriter<std::fs::File>> {
    let f = std::fs::File::create(path).map_err(|e| {
        Error::output(
            path,
            format!("cannot be created: {e}"),
            "check that the folder exists and is writable",
        )
    })?;
    Ok(BufWriter::new(f))
}

fn write_err(path: &Path, e: impl std::fmt::Display) -> Error {
    Error::output(
        path,
        format!("could not be written: {e}"),
        "check free disk space and permissions",
    )
}

/// Writes a 16-bit grayscale PNG.
pub fn write_png_u16(path: &Path, width: usize, height: usize, data: &[u16]) -> Result<()> {
    let bytes: Vec<u8> = data.iter().flat_map(|v| v.to_be_bytes()).collect();
    write_png(
        path,
        width,
        height,
        png::BitDepth::Sixteen,
        png::ColorType::Grayscale,
        &bytes,
    )
}

/// Writes an 8-bit grayscale PNG.
pub fn write_png_u8(path: &Path, width: usize, height: usize, data: &[u8]) -> Result<()> {
    write_png(
        path,
        width,
        height,
        png::BitDepth::Eight,
        png::ColorType::Grayscale,
        data,
    )
}

/// Writes an 8-bit RGB PNG (interleaved RGB bytes).
pub fn write_png_rgb(path: &Path, width: usize, height: usize, rgb: &[u8]) -> Result<()> {
    write_png(
        path,
        width,
        height,
        png::BitDepth::Eight,
        png::ColorType::Rgb,
        rgb,
    )
}

/// A 16-bit grayscale PNG in memory.
pub fn encode_png_u16(width: usize, height: usize, data: &[u16]) -> Vec<u8> {
    let bytes: Vec<u8> = data.iter().flat_map(|v| v.to_be_bytes()).collect();
    encode_gray(width, height, png::BitDepth::Sixteen, &bytes)
}

/// An 8-bit grayscale PNG in memory (for images embedded in a page).
pub fn encode_png_u8(width: usize, height: usize, data: &[u8]) -> Vec<u8> {
    encode_gray(width, height, png::BitDepth::Eight, data)
}

/// An 8-bit RGB PNG in memory (interleaved RGB bytes).
pub fn encode_png_rgb(width: usize, height: usize, rgb: &[u8]) -> Vec<u8> {
    encode_png(
        width,
        height,
        png::BitDepth::Eight,
        png::ColorType::Rgb,
        rgb,
    )
}

fn encode_gray(width: usize, height: usize, depth: png::BitDepth, bytes: &[u8]) -> Vec<u8> {
    encode_png(width, height, depth, png::ColorType::Grayscale, bytes)
}

fn encode_png(
    width: usize,
    height: usize,
    depth: png::BitDepth,
    color: png::ColorType,
    bytes: &[u8],
) -> Vec<u8> {
    let mut out = Vec::new();
    {
        let mut enc = png::Encoder::new(&mut out, width as u32, height as u32);
        enc.set_color(color);
        enc.set_depth(depth);
        enc.set_compression(png::Compression::Fast);
        // Writing into memory cannot fail for a buffer of the right size.
        if let Ok(mut w) = enc.write_header() {
            let _ = w.write_image_data(bytes);
        }
    }
    out
}

fn write_png(
    path: &Path,
    width: usize,
    height: usize,
    depth: png::BitDepth,
    color: png::ColorType,
    bytes: &[u8],
) -> Result<()> {
    let mut w = create(path)?;
    {
        let mut enc = png::Encoder::new(&mut w, width as u32, height as u32);
        enc.set_color(color);
        enc.set_depth(depth);
        enc.set_compression(png::Compression::Fast);
        let mut writer = enc.write_header().map_err(|e| write_err(path, e))?;
        writer
            .write_image_data(bytes)
            .map_err(|e| write_err(path, e))?;
        writer.finish().map_err(|e| write_err(path, e))?;
    }
    w.flush().map_err(|e| write_err(path, e))
}

/// Sample types the TIFF writer accepts.
pub enum TiffData<'a> {
    /// 8-bit unsigned.
    U8(&'a [u8]),
    /// 16-bit unsigned.
    U16(&'a [u16]),
    /// 32-bit unsigned.
    U32(&'a [u32]),
    /// 32-bit float.
    F32(&'a [f32]),
}

/// A single-channel 16-bit TIFF in memory.
pub fn encode_tiff_u16(width: usize, height: usize, data: &[u16]) -> Result<Vec<u8>> {
    use tiff::encoder::{colortype, TiffEncoder};
    let mut out = std::io::Cursor::new(Vec::new());
    TiffEncoder::new(&mut out)
        .and_then(|mut enc| enc.write_image::<colortype::Gray16>(width as u32, height as u32, data))
        .map_err(|e| Error::internal(format!("TIFF encoding failed: {e}")))?;
    Ok(out.into_inner())
}

/// Writes a single-channel TIFF.
pub fn write_tiff(path: &Path, width: usize, height: usize, data: TiffData<'_>) -> Result<()> {
    use tiff::encoder::{colortype, TiffEncoder};
    let mut w = create(path)?;
    {
        let mut enc = TiffEncoder::new(&mut w).map_err(|e| write_err(path, e))?;
        let (w32, h32) = (width as u32, height as u32);
        match data {
            TiffData::U8(d) => enc.write_image::<colortype::Gray8>(w32, h32, d),
            TiffData::U16(d) => enc.write_image::<colortype::Gray16>(w32, h32, d),
            TiffData::U32(d) => enc.write_image::<colortype::Gray32>(w32, h32, d),
            TiffData::F32(d) => enc.write_image::<colortype::Gray32Float>(w32, h32, d),
        }
        .map_err(|e| write_err(path, e))?;
    }
    w.flush().map_err(|e| write_err(path, e))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The in-memory encoders give the bytes the file writers write, so a page that
    /// embeds a figure holds the same image as the file beside it.
    #[test]
    fn encoders_give_the_bytes_the_writers_write() {
        let dir = tempfile::tempdir().unwrap();
        let (w, h) = (7, 5);
        let rgb: Vec<u8> = (0..w * h * 3).map(|i| (i * 37 % 256) as u8).collect();
        let grey: Vec<u8> = (0..w * h).map(|i| (i * 11 % 256) as u8).collect();
        let wide: Vec<u16> = (0..w * h).map(|i| (i * 3001) as u16).collect();
        write_png_rgb(&dir.path().join("c.png"), w, h, &rgb).unwrap();
        write_png_u8(&dir.path().join("g.png"), w, h, &grey).unwrap();
        write_tiff(&dir.path().join("t.tif"), w, h, TiffData::U16(&wide)).unwrap();
        let read = |n: &str| std::fs::read(dir.path().join(n)).unwrap();
        assert_eq!(encode_png_rgb(w, h, &rgb), read("c.png"));
        assert_eq!(encode_png_u8(w, h, &grey), read("g.png"));
        assert_eq!(encode_tiff_u16(w, h, &wide).unwrap(), read("t.tif"));
    }

    #[test]
    fn png_and_tiff_round_trip_every_depth() {
        let dir = tempfile::tempdir().unwrap();
        let (w, h) = (5, 3);
        let v16: Vec<u16> = (0..15).map(|i| i * 4000 + 7).collect();
        let v8: Vec<u8> = (0..15).map(|i| (i * 17) as u8).collect();
        let v32: Vec<u32> = (0..15).map(|i| i * 100_000 + 3).collect();
        let vf: Vec<f32> = (0..15).map(|i| i as f32 * 0.25).collect();
        let want16: Vec<f32> = v16.iter().map(|&v| f32::from(v)).collect();
        let want8: Vec<f32> = v8.iter().map(|&v| f32::from(v)).collect();
        let want32: Vec<f32> = v32.iter().map(|&v| v as f32).collect();

        type Writer<'a> = Box<dyn Fn(&Path) + 'a>;
        let cases: Vec<(&str, Writer, &Vec<f32>, &str)> = vec![
            (
                "a.png",
                Box::new(|p: &Path| write_png_u16(p, w, h, &v16).unwrap()),
                &want16,
                "16-bit PNG",
            ),
            (
                "b.png",
                Box::new(|p: &Path| write_png_u8(p, w, h, &v8).unwrap()),
                &want8,
                "8-bit PNG",
            ),
            (
                "c.tif",
                Box::new(|p: &Path| write_tiff(p, w, h, TiffData::U8(&v8)).unwrap()),
                &want8,
                "8-bit integer TIFF",
            ),
            (
                "d.tiff",
                Box::new(|p: &Path| write_tiff(p, w, h, TiffData::U16(&v16)).unwrap()),
                &want16,
                "16-bit integer TIFF",
            ),
            (
                "e.tif",
                Box::new(|p: &Path| write_tiff(p, w, h, TiffData::U32(&v32)).unwrap()),
                &want32,
                "32-bit integer TIFF",
            ),
            (
                "f.TIF",
                Box::new(|p: &Path| write_tiff(p, w, h, TiffData::F32(&vf)).unwrap()),
                &vf,
                "32-bit float TIFF",
            ),
        ];
        for (name, write, want, format) in cases {
            let p = dir.path().join(name);
            write(&p);
            let r = read_raster(&p, &Limits::default()).unwrap();
            assert_eq!((r.width, r.height), (w, h), "{name}");
            assert_eq!(&r.data, want, "{name}");
            assert_eq!(r.format, format, "{name}");
        }
    }

    #[test]
    fn limits_are_checked_before_decoding() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("big.png");
        write_png_u8(&p, 100, 100, &vec![1; 10_000]).unwrap();
        let e = read_raster(&p, &Limits { max_pixels: 9_999 }).unwrap_err();
        assert!(e.problem.contains("above the limit"), "{e}");
        assert!(e.fix.contains("--max-pixels"), "{e}");
    }

    #[test]
    fn colour_images_are_refused_with_advice() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("rgb.png");
        write_png_rgb(&p, 2, 2, &[0; 12]).unwrap();
        let e = read_raster(&p, &Limits::default()).unwrap_err();
        assert!(e.problem.contains("RGB colour PNG"), "{e}");
        assert!(e.fix.contains("grayscale"), "{e}");
    }
}
