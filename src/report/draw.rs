//! Drawing the phase map: a colour-blind-safe palette, anti-aliased text, legend and
//! scale bar.

use ab_glyph::{Font, FontRef, PxScale, ScaleFont};

/// DejaVu Sans, bundled unmodified (Bitstream Vera licence with DejaVu's public-domain
/// changes: data/fonts/LICENSE-DejaVu.txt): the text of every raster figure.
static FONT_FILE: &[u8] = include_bytes!("../../data/fonts/DejaVuSans.ttf");

fn font() -> &'static FontRef<'static> {
    static FONT: std::sync::OnceLock<FontRef<'static>> = std::sync::OnceLock::new();
    FONT.get_or_init(|| FontRef::try_from_slice(FONT_FILE).expect("the bundled font parses"))
}

/// The em size of text drawn at `scale`: 10 px per step, which makes capitals 7.3 px tall
/// per step, the height of the 8-pixel cells the layouts below are measured in.
fn em(scale: usize) -> PxScale {
    PxScale::from(10.0 * scale as f32)
}

/// The glyphs of `s` at `scale` with their pen positions from 0: characters the font
/// lacks become `?`; kerning applied.
fn layout(s: &str, scale: usize) -> (Vec<(ab_glyph::GlyphId, f32)>, f32) {
    layout_at(s, em(scale))
}

/// Width of `s` in the bundled font at an em size of `em_px` pixels (or SVG user units).
pub fn advance(s: &str, em_px: f32) -> f32 {
    layout_at(s, PxScale::from(em_px)).1
}

fn layout_at(s: &str, em: PxScale) -> (Vec<(ab_glyph::GlyphId, f32)>, f32) {
    let f = font().as_scaled(em);
    let mut out = Vec::with_capacity(s.len());
    let mut pen = 0.0;
    let mut prev = None;
    for ch in s.chars() {
        let mut id = f.glyph_id(ch);
        if id.0 == 0 {
            id = f.glyph_id('?');
        }
        if let Some(p) = prev {
            pen += f.kern(p, id);
        }
        out.push((id, pen));
        pen += f.h_advance(id);
        prev = Some(id);
    }
    (out, pen)
}

/// The text scale for a figure whose image is `mw` pixels wide: 2 (capitals 15 px tall)
/// up to 1500 px, then growing with the width (capitals about 1.4 % of it), so a legend
/// stays readable when a montage's figure is viewed whole.
pub fn text_scale(mw: usize) -> usize {
    if mw < 1500 {
        2
    } else {
        (mw / 500).max(3)
    }
}

/// Width in pixels of `s` drawn with [`Canvas::text`] at `scale`.
pub fn text_width(s: &str, scale: usize) -> usize {
    layout(s, scale).1.ceil() as usize
}

/// Okabe & Ito's colour-blind-safe set ("Color Universal Design", 2002) without its black,
/// followed by further distinct colours for fields with more phases. Black is kept for
/// unassigned pixels.
pub const PALETTE: [[u8; 3]; 14] = [
    [230, 159, 0],   // orange
    [86, 180, 233],  // sky blue
    [0, 158, 115],   // bluish green
    [240, 228, 66],  // yellow
    [0, 114, 178],   // blue
    [213, 94, 0],    // vermillion
    [204, 121, 167], // reddish purple
    [153, 153, 153], // grey
    [255, 255, 255], // white
    [120, 70, 20],   // brown
    [150, 220, 180], // pale green
    [110, 60, 150],  // violet
    [255, 200, 200], // pink
    [60, 60, 120],   // slate
];

/// Colour of unassigned pixels.
pub const UNASSIGNED: [u8; 3] = [0, 0, 0];

/// Colour of phase `id` (1-based).
pub fn colour(id: u16) -> [u8; 3] {
    if id == 0 {
        UNASSIGNED
    } else {
        PALETTE[(id as usize - 1) % PALETTE.len()]
    }
}

/// An RGB canvas.
pub struct Canvas {
    /// Width.
    pub width: usize,
    /// Height.
    pub height: usize,
    /// Interleaved RGB.
    pub rgb: Vec<u8>,
}

impl Canvas {
    /// A canvas filled with one colour.
    pub fn new(width: usize, height: usize, fill: [u8; 3]) -> Canvas {
        Canvas {
            width,
            height,
            rgb: fill
                .iter()
                .copied()
                .cycle()
                .take(width * height * 3)
                .collect(),
        }
    }

    /// Sets a pixel (ignored outside).
    pub fn put(&mut self, x: usize, y: usize, c: [u8; 3]) {
        if x < self.width && y < self.height {
            let i = 3 * (y * self.width + x);
            self.rgb[i..i + 3].copy_from_slice(&c);
        }
    }

    /// Fills a rectangle.
    pub fn rect(&mut self, x: usize, y: usize, w: usize, h: usize, c: [u8; 3]) {
        for yy in y..y + h {
            for xx in x..x + w {
                self.put(xx, yy, c);
            }
        }
    }

    /// Blends colour `c` into pixel (x, y) with opacity `a` (0 to 1; ignored outside).
    fn blend(&mut self, x: i64, y: i64, c: [u8; 3], a: f32) {
        if x < 0 || y < 0 || x as usize >= self.width || y as usize >= self.height {
            return;
        }
        let i = 3 * (y as usize * self.width + x as usize);
        let a = a.clamp(0.0, 1.0);
        for (dst, &src) in self.rgb[i..i + 3].iter_mut().zip(&c) {
            *dst = (f32::from(*dst) * (1.0 - a) + f32::from(src) * a).round() as u8;
        }
    }

    /// Draws `s` anti-aliased in the bundled font at `scale` (capitals 7.3 px tall per
    /// step), its capitals' top near `y` and its baseline at `y + 8 × scale`; returns the
    /// width used. Characters the font lacks are drawn as `?`.
    pub fn text(&mut self, x: usize, y: usize, s: &str, scale: usize, c: [u8; 3]) -> usize {
        let width = self.text_at(x as f32, (y + 8 * scale) as f32, s, em(scale).y, c);
        width.ceil() as usize
    }

    /// Draws `s` anti-aliased in the bundled font at an em size of `em_px` pixels, starting
    /// at `x` on the baseline `baseline`; returns the width used.
    pub fn text_at(&mut self, x: f32, baseline: f32, s: &str, em_px: f32, c: [u8; 3]) -> f32 {
        let scale = PxScale::from(em_px);
        let (glyphs, width) = layout_at(s, scale);
        for (id, pen) in glyphs {
            let g = id.with_scale_and_position(scale, ab_glyph::point(x + pen, baseline));
            if let Some(outline) = font().outline_glyph(g) {
                let b = outline.px_bounds();
                let (x0, y0) = (b.min.x as i64, b.min.y as i64);
                outline.draw(|gx, gy, cover| {
                    self.blend(x0 + i64::from(gx), y0 + i64::from(gy), c, cover)
                });
            }
        }
        width
    }

    /// A filled disc of radius `r` around (cx, cy) in colour `c` at opacity `alpha`, its
    /// edge anti-aliased by the covered share of each pixel (4 × 4 samples).
    pub fn disc(&mut self, (cx, cy): (f64, f64), r: f64, c: [u8; 3], alpha: f32) {
        let (x0, x1) = ((cx - r).floor() as i64, (cx + r).ceil() as i64);
        let (y0, y1) = ((cy - r).floor() as i64, (cy + r).ceil() as i64);
        for y in y0..=y1 {
            for x in x0..=x1 {
                let inside = (0..16)
                    .filter(|s| {
                        let sx = x as f64 + (f64::from(s % 4) + 0.5) / 4.0 - cx;
                        let sy = y as f64 + (f64::from(s / 4) + 0.5) / 4.0 - cy;
                        sx * sx + sy * sy <= r * r
                    })
                    .count();
                if inside > 0 {
                    self.blend(x, y, c, alpha * inside as f32 / 16.0);
                }
            }
        }
    }
}

/// A round scale-bar length (1, 2 or 5 × 10ⁿ µm) close to a fifth of the field width.
pub fn scale_bar_um(field_width_um: f64) -> f64 {
    let target = field_width_um / 5.0;
    let p = 10f64.powf(target.log10().floor());
    [5.0, 2.0, 1.0]
        .into_iter()
        .map(|m| m * p)
        .find(|&v| v <= target)
        .unwrap_or(p)
}

/// The label of a scale bar `len_um` µm long: in µm from 1 µm up, else in nm.
pub fn scale_bar_label(len_um: f64) -> String {
    if len_um >= 1.0 {
        format!("{len_um} µm")
    } else {
        format!("{} nm", len_um * 1000.0)
    }
}

/// A legend entry.
pub struct LegendEntry {
    /// Phase id (0 = unassigned).
    pub id: u16,
    /// Text beside the swatch.
    pub text: String,
}

/// Renders labels (0 = unassigned) as a colour image with a legend on the right and, when
/// the pixel size is known, a scale bar. Small fields are enlarged by pixel replication so
/// the text stays readable.
pub fn phase_map(
    labels: &[u16],
    w: usize,
    h: usize,
    legend: &[LegendEntry],
    pixel_size_um: Option<f64>,
    title: &str,
) -> Canvas {
    framed(&|i| colour(labels[i]), w, h, legend, pixel_size_um, title)
}

/// Any RGB image (`pixel(i)` for pixel i, row-major) framed like the phase map: title,
/// legend on the right, scale bar when the pixel size is known, small fields enlarged.
pub fn framed(
    pixel: &dyn Fn(usize) -> [u8; 3],
    w: usize,
    h: usize,
    legend: &[LegendEntry],
    pixel_size_um: Option<f64>,
    title: &str,
) -> Canvas {
    let zoom = (600 / w.max(h)).clamp(1, 8);
    let (mw, mh) = (w * zoom, h * zoom);
    let ts = text_scale(mw);
    let line_h = 12 * ts;
    let legend_w = 16 * ts
        + legend
            .iter()
            .map(|e| text_width(&e.text, ts))
            .max()
            .unwrap_or(80 * ts)
        + 8 * ts;
    let header = line_h + 4 * ts;
    let width = mw + legend_w + 8 * ts;
    let height = (mh + header).max(header + legend.len() * line_h + 8 * ts);
    let bg = [255, 255, 255];
    let ink = [0, 0, 0];
    let mut c = Canvas::new(width, height, bg);
    c.text(4 * ts, 2 * ts, title, ts, ink);
    for y in 0..h {
        for x in 0..w {
            c.rect(x * zoom, header + y * zoom, zoom, zoom, pixel(y * w + x));
        }
    }
    let lx = mw + 6 * ts;
    for (i, e) in legend.iter().enumerate() {
        let y = header + i * line_h;
        c.rect(lx - 1, y - 1, 8 * ts + 2, 8 * ts + 2, ink);
        c.rect(lx, y, 8 * ts, 8 * ts, colour(e.id));
        c.text(lx + 12 * ts, y, &e.text, ts, ink);
    }
    if let Some(px) = pixel_size_um {
        scale_bar(&mut c, px, w, zoom, ts, header + mh);
    }
    c
}

/// Draws a scale bar in the lower left of an image of `w` pixels of `px` µm drawn at
/// `zoom` whose bottom edge is at `bottom`.
fn scale_bar(c: &mut Canvas, px: f64, w: usize, zoom: usize, ts: usize, bottom: usize) {
    let len_um = scale_bar_um(w as f64 * px);
    let len = ((len_um / px) * zoom as f64).round() as usize;
    let label = scale_bar_label(len_um);
    let bar_h = 3 * ts;
    let tw = text_width(&label, ts);
    let (bx, by) = (4 * ts, bottom - bar_h - 14 * ts);
    c.rect(
        bx - ts,
        by - ts,
        len.max(tw) + 2 * ts,
        bar_h + 12 * ts,
        [255; 3],
    );
    c.rect(bx, by, len, bar_h, [0; 3]);
    c.text(bx, by + bar_h + 2 * ts, &label, ts, [0; 3]);
}

/// One element's counts as a grey image (black 0 to white at the 99.5th percentile), with
/// a title, a grey ramp labelled with the count range, and a scale bar.
pub fn element_map(
    counts: &[f32],
    w: usize,
    h: usize,
    title: &str,
    pixel_size_um: Option<f64>,
) -> Canvas {
    let top = nth_finite(counts, |n| (n - 1) - n / 200)
        .unwrap_or(1.0)
        .max(1.0);
    let zoom = (600 / w.max(h)).clamp(1, 8);
    let (mw, mh) = (w * zoom, h * zoom);
    let ts = text_scale(mw);
    let header = 16 * ts;
    let label = format!("{top:.0}");
    let ramp_w = 18 * ts + text_width(&label, ts).max(16 * ts);
    let mut c = Canvas::new(mw + ramp_w + 8 * ts, mh + header, [255; 3]);
    c.text(4 * ts, 2 * ts, title, ts, [0; 3]);
    for y in 0..h {
        for x in 0..w {
            let v = (255.0 * (counts[y * w + x] / top).clamp(0.0, 1.0)).round() as u8;
            c.rect(x * zoom, header + y * zoom, zoom, zoom, [v; 3]);
        }
    }
    // The ramp, white at the top.
    let (rx, ry, rh) = (mw + 4 * ts, header, mh.min(256 * ts));
    for i in 0..rh {
        let v = (255.0 * (1.0 - i as f64 / rh as f64)).round() as u8;
        c.rect(rx, ry + i, 6 * ts, 1, [v; 3]);
    }
    c.text(rx + 8 * ts, ry, &label, ts, [0; 3]);
    c.text(rx + 8 * ts, ry + rh - 8 * ts, "0", ts, [0; 3]);
    if let Some(px) = pixel_size_um {
        scale_bar(&mut c, px, w, zoom, ts, header + mh);
    }
    c
}

/// The value a sort of the finite values of `v` would put at index `at(n)` (n ≥ 1 of
/// them), found in linear time; `None` when no value is finite.
pub fn nth_finite(v: &[f32], at: impl Fn(usize) -> usize) -> Option<f32> {
    let mut finite: Vec<f32> = v.iter().copied().filter(|x| x.is_finite()).collect();
    if finite.is_empty() {
        return None;
    }
    let i = at(finite.len()).min(finite.len() - 1);
    Some(*finite.select_nth_unstable_by(i, f32::total_cmp).1)
}

/// A grey canvas (every pixel R = G = B) as 8-bit grey levels.
pub fn luma(c: &Canvas) -> Vec<u8> {
    c.rgb.chunks_exact(3).map(|p| p[0]).collect()
}

/// `counts` shrunk by averaging f × f blocks, f the smallest factor that brings the long
/// side to at most `max` pixels: (width, height, f, means).
pub fn shrink(counts: &[f32], w: usize, h: usize, max: usize) -> (usize, usize, usize, Vec<f32>) {
    let f = w.max(h).div_ceil(max.max(1)).max(1);
    if f == 1 {
        return (w, h, 1, counts.to_vec());
    }
    let (tw, th) = (w.div_ceil(f), h.div_ceil(f));
    let mut out = vec![0f32; tw * th];
    for ty in 0..th {
        for tx in 0..tw {
            let (mut s, mut n) = (0.0f64, 0usize);
            for y in ty * f..((ty + 1) * f).min(h) {
                for x in tx * f..((tx + 1) * f).min(w) {
                    s += f64::from(counts[y * w + x]);
                    n += 1;
                }
            }
            out[ty * tw + tx] = (s / n.max(1) as f64) as f32;
        }
    }
    (tw, th, f, out)
}

/// A thumbnail of `counts` (long side at most `max`) as grey levels, black at 0 and white
/// at `top`.
pub fn grey_thumbnail(
    counts: &[f32],
    w: usize,
    h: usize,
    top: f32,
    max: usize,
) -> (usize, usize, Vec<u8>) {
    let (tw, th, _, m) = shrink(counts, w, h, max);
    let g = m
        .iter()
        .map(|&v| (255.0 * (v / top.max(1.0)).clamp(0.0, 1.0)).round() as u8)
        .collect();
    (tw, th, g)
}

/// Grey levels scaled to 8 bits between the 0.5th and 99.5th percentiles of the finite
/// values; NaN (no data) is drawn black.
pub fn to_grey(v: &[f32]) -> Vec<u8> {
    let (Some(lo), Some(hi)) = (
        nth_finite(v, |n| n / 200),
        nth_finite(v, |n| (n - 1) - n / 200),
    ) else {
        return vec![0; v.len()];
    };
    let span = (hi - lo).max(1e-6);
    v.iter()
        .map(|&x| {
            if x.is_finite() {
                (255.0 * ((x - lo) / span).clamp(0.0, 1.0)).round() as u8
            } else {
                0
            }
        })
        .collect()
}

/// The grey image with the phase boundaries drawn in the phases' colours: a pixel is on a
/// boundary when a 4-neighbour has another label.
pub fn overlay(grey: &[u8], labels: &[u16], w: usize, h: usize) -> Vec<u8> {
    let mut rgb = Vec::with_capacity(w * h * 3);
    for y in 0..h {
        for x in 0..w {
            let i = y * w + x;
            let l = labels[i];
            let edge = [
                (x > 0).then(|| i - 1),
                (x + 1 < w).then(|| i + 1),
                (y > 0).then(|| i - w),
                (y + 1 < h).then(|| i + w),
            ]
            .into_iter()
            .flatten()
            .any(|j| labels[j] != l);
            if edge && l != 0 {
                rgb.extend_from_slice(&colour(l));
            } else {
                rgb.extend_from_slice(&[grey[i]; 3]);
            }
        }
    }
    rgb
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn text_grows_with_the_figure() {
        assert_eq!(text_scale(600), 2);
        assert_eq!(text_scale(1499), 2);
        assert_eq!(text_scale(2048), 4);
        assert_eq!(text_scale(20_000), 40);
        // The same share of the width on a field and on a montage ten times wider.
        let share = |mw: usize| text_width("quartz", text_scale(mw)) as f64 / mw as f64;
        assert!((share(20_000) / share(2048) - 1.0).abs() < 0.05);
    }

    #[test]
    fn scale_bar_is_round() {
        assert_eq!(scale_bar_um(76.8), 10.0);
        assert_eq!(scale_bar_um(300.0), 50.0);
        assert_eq!(scale_bar_um(0.9), 0.1);
        assert_eq!(scale_bar_um(12.0), 2.0);
        assert_eq!(scale_bar_label(10.0), "10 µm");
        assert_eq!(scale_bar_label(0.1), "100 nm");
    }

    #[test]
    fn palette_colours_are_distinct_and_never_black() {
        for (i, a) in PALETTE.iter().enumerate() {
            assert_ne!(*a, UNASSIGNED);
            for b in &PALETTE[i + 1..] {
                assert_ne!(a, b);
            }
        }
        // Okabe & Ito's orange and sky blue, as published.
        assert_eq!(colour(1), [230, 159, 0]);
        assert_eq!(colour(2), [86, 180, 233]);
    }

    #[test]
    fn text_is_anti_aliased_proportional_and_has_the_symbols_it_needs() {
        let mut c = Canvas::new(60, 12, [255; 3]);
        let w = c.text(0, 0, "Fe µm", 1, [0; 3]);
        assert_eq!(w, text_width("Fe µm", 1));
        // Ink, and grey edge pixels between ink and paper.
        assert!(c.rgb.iter().any(|&v| v < 60), "no ink");
        assert!(
            c.rgb.iter().any(|&v| (60..200).contains(&v)),
            "not anti-aliased"
        );
        // Nothing below the line box's descent (12 px at scale 1) or right of the width.
        for y in 0..12 {
            for x in w + 1..60 {
                assert_eq!(c.rgb[3 * (y * 60 + x)], 255, "ink at ({x}, {y})");
            }
        }
        // A proportional face: narrow letters take less room; sizes scale.
        assert!(text_width("iiii", 2) * 2 < text_width("MMMM", 2));
        let (one, two) = (text_width("Cu6Sn5", 1), text_width("Cu6Sn5", 2));
        assert!((2 * one).abs_diff(two) <= 2, "{one} {two}");
        // µ, en dash and Greek letters have glyphs of their own, unlike a missing one.
        let draw = |s: &str| {
            let mut c = Canvas::new(20, 12, [255; 3]);
            c.text(0, 0, s, 1, [0; 3]);
            c.rgb
        };
        for ch in ["µ", "–", "η", "θ", "σ"] {
            assert_ne!(draw(ch), draw("?"), "{ch}");
        }
        assert_eq!(draw("\u{e000}"), draw("?"));
    }
}
