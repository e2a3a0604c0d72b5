//! `report.html`: one self-contained page (images as data URIs, styles inline, plots as
//! inline SVG, no script, no network) with everything a materials report needs from a
//! field.
//!
//! The plots are drawn by a small SVG writer here rather than a plotting crate: the browser
//! lays out the text, so no font files or font metrics are needed (a plotting library's SVG
//! backend still needs a font backend to measure text), and every element carries a
//! `<title>` for screen readers. Colours are the phase map's colour-blind-safe palette, and
//! every coloured mark also carries its phase id as text.

use std::fmt::Write as _;

use super::draw::colour;
use super::Report;

/// Escapes text for HTML and SVG.
pub fn esc(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

fn rgb(c: [u8; 3]) -> String {
    format!("#{:02x}{:02x}{:02x}", c[0], c[1], c[2])
}

/// Base64 of `bytes` (RFC 4648, standard alphabet, padded), for data URIs.
pub fn base64(bytes: &[u8]) -> String {
    use base64::Engine as _;
    base64::engine::general_purpose::STANDARD.encode(bytes)
}

/// A small SVG canvas in user units.
struct Svg {
    w: f64,
    h: f64,
    body: String,
}

impl Svg {
    fn new(w: f64, h: f64) -> Svg {
        Svg {
            w,
            h,
            body: String::new(),
        }
    }

    fn rect(&mut self, x: f64, y: f64, w: f64, h: f64, fill: &str, extra: &str) {
        let _ = write!(
            self.body,
            r#"<rect x="{x:.2}" y="{y:.2}" width="{:.2}" height="{:.2}" fill="{fill}" {extra}/>"#,
            w.max(0.0),
            h.max(0.0)
        );
    }

    fn line(&mut self, x1: f64, y1: f64, x2: f64, y2: f64, stroke: &str, width: f64) {
        let _ = write!(
            self.body,
            r#"<line x1="{x1:.2}" y1="{y1:.2}" x2="{x2:.2}" y2="{y2:.2}" stroke="{stroke}" stroke-width="{width}"/>"#
        );
    }

    /// A PNG drawn into (x, y, w, h), its pixels kept sharp when enlarged.
    fn png(&mut self, x: f64, y: f64, w: f64, h: f64, png: &[u8]) {
        let _ = write!(
            self.body,
            r#"<image x="{x:.2}" y="{y:.2}" width="{w:.2}" height="{h:.2}" preserveAspectRatio="none" style="image-rendering:pixelated" href="data:image/png;base64,{}"/>"#,
            base64(png)
        );
    }

    fn text(&mut self, x: f64, y: f64, s: &str, anchor: &str, size: f64) {
        let _ = write!(
            self.body,
            r#"<text x="{x:.2}" y="{y:.2}" text-anchor="{anchor}" font-size="{size}">{}</text>"#,
            esc(s)
        );
    }

    fn finish(self, title: &str, desc: &str) -> String {
        format!(
            r#"<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {w} {h}" width="{w}" height="{h}" role="img" aria-labelledby="t d" font-family="sans-serif"><title>{t}</title><desc>{d}</desc>{b}</svg>"#,
            w = self.w,
            h = self.h,
            t = esc(title),
            d = esc(desc),
            b = self.body
        )
    }
}

/// Width in user units the phase map's image is shown at (it scales with the drawing).
const MAP_SVG_WIDTH: f64 = 800.0;

/// phase-map.svg: the phase image (`png`, `w × h` pixels, embedded as it is) with a vector
/// title, legend (`legend`: colour id and text) and scale bar, so the text stays sharp at
/// any size and can be edited in a drawing program. Text is set in the bundled font's
/// family (DejaVu Sans, sans-serif otherwise) and measured with its metrics.
pub fn phase_map_svg(
    title: &str,
    (png, w, h): (&[u8], usize, usize),
    legend: &[(u16, String)],
    pixel_size_um: Option<f64>,
) -> String {
    const SIZE: f64 = 14.0;
    let zoom = MAP_SVG_WIDTH / w.max(1) as f64;
    let (dw, dh) = (MAP_SVG_WIDTH, h as f64 * zoom);
    let top = 32.0;
    let lx = dw + 16.0;
    let text_w = legend
        .iter()
        .map(|(_, t)| f64::from(super::draw::advance(t, SIZE as f32)))
        .fold(0.0, f64::max);
    let width = (lx + 22.0 + text_w + 12.0).ceil();
    let height = (top + dh)
        .max(top + 22.0 * legend.len() as f64 + 8.0)
        .ceil();
    let mut svg = Svg::new(width, height);
    svg.rect(0.0, 0.0, width, height, "#ffffff", "");
    svg.text(8.0, 20.0, title, "start", 16.0);
    svg.png(0.0, top, dw, dh, png);
    for (i, (id, text)) in legend.iter().enumerate() {
        let y = top + 22.0 * i as f64;
        svg.rect(
            lx,
            y,
            14.0,
            14.0,
            &rgb(colour(*id)),
            r##"stroke="#000000""##,
        );
        svg.text(lx + 22.0, y + 12.0, text, "start", SIZE);
    }
    if let Some(px) = pixel_size_um {
        let len_um = super::draw::scale_bar_um(w as f64 * px);
        let len = len_um / px * zoom;
        let label = super::draw::scale_bar_label(len_um);
        let label_w = f64::from(super::draw::advance(&label, SIZE as f32));
        let (bx, by) = (8.0, top + dh - 30.0);
        svg.rect(
            bx - 4.0,
            by - 4.0,
            len.max(label_w) + 8.0,
            30.0,
            "#ffffff",
            "",
        );
        svg.rect(bx, by, len, 5.0, "#000000", "");
        svg.text(bx, by + 20.0, &label, "start", SIZE);
    }
    svg.finish(title, "Phase map: each pixel in its phase's colour; the legend gives each phase's id, name and area")
        .replacen(
            r#"font-family="sans-serif""#,
            r#"font-family="DejaVu Sans, sans-serif""#,
            1,
        )
}

/// "Nice" tick values covering `lo..hi`.
fn ticks(lo: f64, hi: f64, n: usize) -> Vec<f64> {
    if hi.partial_cmp(&lo) != Some(std::cmp::Ordering::Greater)
        || !lo.is_finite()
        || !hi.is_finite()
    {
        return vec![lo];
    }
    let raw = (hi - lo) / n.max(1) as f64;
    let mag = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 2.5, 5.0, 10.0]
        .iter()
        .map(|m| m * mag)
        .find(|s| *s >= raw)
        .unwrap_or(10.0 * mag);
    let mut v = (lo / step).ceil() * step;
    let mut out = Vec::new();
    while v <= hi + 1e-9 * step {
        out.push(v);
        v += step;
    }
    out
}

fn fmt_tick(v: f64) -> String {
    if v.abs() >= 1000.0 || (v - v.round()).abs() < 1e-9 {
        format!("{v:.0}")
    } else if v.abs() >= 1.0 {
        format!("{v:.1}")
    } else {
        format!("{v:.3}")
    }
}

/// Plot area with linear axes.
struct Axes {
    x: (f64, f64),
    y: (f64, f64),
    left: f64,
    top: f64,
    width: f64,
    height: f64,
}

impl Axes {
    fn px(&self, x: f64) -> f64 {
        self.left + (x - self.x.0) / (self.x.1 - self.x.0) * self.width
    }

    fn py(&self, y: f64) -> f64 {
        self.top + self.height - (y - self.y.0) / (self.y.1 - self.y.0) * self.height
    }

    fn draw(&self, svg: &mut Svg, xlabel: &str, ylabel: &str) {
        let (l, t, w, h) = (self.left, self.top, self.width, self.height);
        svg.line(l, t + h, l + w, t + h, "#333", 1.0);
        svg.line(l, t, l, t + h, "#333", 1.0);
        for v in ticks(self.x.0, self.x.1, 5) {
            let x = self.px(v);
            svg.line(x, t + h, x, t + h + 4.0, "#333", 1.0);
            svg.text(x, t + h + 16.0, &fmt_tick(v), "middle", 11.0);
        }
        for v in ticks(self.y.0, self.y.1, 5) {
            let y = self.py(v);
            svg.line(l - 4.0, y, l, y, "#333", 1.0);
            svg.line(l, y, l + w, y, "#eee", 1.0);
            svg.text(l - 6.0, y + 4.0, &fmt_tick(v), "end", 11.0);
        }
        svg.text(l + w / 2.0, t + h + 32.0, xlabel, "middle", 12.0);
        let _ = write!(
            svg.body,
            r#"<text x="14" y="{:.1}" text-anchor="middle" font-size="12" transform="rotate(-90 14 {:.1})">{}</text>"#,
            t + h / 2.0,
            t + h / 2.0,
            esc(ylabel)
        );
    }
}

/// Stacked bar of area fractions (phases in id order, then unassigned).
pub fn area_bar(r: &Report) -> String {
    let (w, h) = (640.0, 70.0);
    let mut svg = Svg::new(w, h);
    let (left, width) = (10.0, w - 20.0);
    let mut x = left;
    let mut parts: Vec<(u16, String, f64)> = r
        .phases
        .iter()
        .map(|p| (p.id, p.name.clone(), p.area_fraction))
        .collect();
    parts.push((0, "unassigned".into(), r.unassigned_fraction));
    for (id, name, f) in &parts {
        let seg = f * width;
        let fill = rgb(colour(*id));
        let _ = write!(
            svg.body,
            r#"<g><title>{} {}: {:.2} %</title>"#,
            if *id == 0 {
                String::new()
            } else {
                id.to_string()
            },
            esc(name),
            100.0 * f
        );
        svg.rect(
            x,
            10.0,
            seg,
            30.0,
            &fill,
            r##"stroke="#333" stroke-width="0.5""##,
        );
        if seg > 16.0 {
            let ink = if *id == 0 { "#fff" } else { "#000" };
            let label = if *id == 0 {
                "–".to_string()
            } else {
                id.to_string()
            };
            let _ = write!(
                svg.body,
                r#"<text x="{:.1}" y="30" text-anchor="middle" font-size="12" fill="{ink}">{label}</text>"#,
                x + seg / 2.0
            );
        }
        svg.body.push_str("</g>");
        x += seg;
    }
    svg.text(left, 58.0, "0 %", "start", 11.0);
    svg.text(left + width, 58.0, "100 % of the field", "end", 11.0);
    svg.finish(
        "Area fractions",
        &parts
            .iter()
            .map(|(id, n, f)| format!("{id} {n} {:.2} %", 100.0 * f))
            .collect::<Vec<_>>()
            .join("; "),
    )
}

/// Composition bars (wt% with ± 1σ) of every phase.
pub fn composition_bars(r: &Report) -> String {
    let els = &r.composition.elements;
    let row = 16.0;
    let block = row * els.len() as f64 + 26.0;
    let (w, h) = (640.0, 30.0 + block * r.phases.len() as f64);
    let mut svg = Svg::new(w, h);
    let ax = Axes {
        x: (0.0, 100.0),
        y: (0.0, 1.0),
        left: 150.0,
        top: 10.0,
        width: w - 190.0,
        height: h - 40.0,
    };
    for v in ticks(0.0, 100.0, 5) {
        let x = ax.px(v);
        svg.line(x, 10.0, x, h - 30.0, "#eee", 1.0);
        svg.text(x, h - 14.0, &format!("{v:.0}"), "middle", 11.0);
    }
    svg.text(ax.left + ax.width / 2.0, h - 2.0, "wt%", "middle", 11.0);
    for (i, p) in r.phases.iter().enumerate() {
        let y0 = 10.0 + i as f64 * block;
        svg.text(
            4.0,
            y0 + 14.0,
            &format!("{} {}", p.id, p.name),
            "start",
            12.0,
        );
        for (j, e) in els.iter().enumerate() {
            let v = p.composition_wt.get(e).copied().unwrap_or(0.0);
            let sd = p.composition_wt_sd.get(e).copied().unwrap_or(0.0);
            let y = y0 + 20.0 + j as f64 * row;
            svg.text(ax.left - 6.0, y + 11.0, e, "end", 11.0);
            svg.rect(
                ax.px(0.0),
                y + 2.0,
                ax.px(v) - ax.px(0.0),
                row - 5.0,
                &rgb(colour(p.id)),
                r##"stroke="#333" stroke-width="0.5""##,
            );
            if sd > 0.0 {
                let (a, b) = (ax.px((v - sd).max(0.0)), ax.px((v + sd).min(100.0)));
                svg.line(a, y + row / 2.0, b, y + row / 2.0, "#000", 1.0);
            }
            svg.text(ax.px(v) + 4.0, y + 11.0, &format!("{v:.1}"), "start", 10.0);
        }
    }
    svg.finish(
        "Phase compositions",
        &format!(
            "Composition in wt% of each phase with one standard deviation; basis: {}",
            r.composition.basis
        ),
    )
}

/// Phase-count curve: BIC per number of phases, the minimum marked.
pub fn bic_curve(r: &Report) -> Option<String> {
    let c = &r.phase_count.curve;
    if c.len() < 2 {
        return None;
    }
    let (w, h) = (420.0, 260.0);
    let mut svg = Svg::new(w, h);
    let (kmin, kmax) = (c[0].k as f64, c[c.len() - 1].k as f64);
    let lo = c.iter().map(|p| p.bic).fold(f64::INFINITY, f64::min);
    let hi = c.iter().map(|p| p.bic).fold(f64::NEG_INFINITY, f64::max);
    let pad = ((hi - lo) * 0.05).max(1.0);
    let ax = Axes {
        x: (kmin - 0.5, kmax + 0.5),
        y: (lo - pad, hi + pad),
        left: 80.0,
        top: 10.0,
        width: w - 100.0,
        height: h - 60.0,
    };
    ax.draw(&mut svg, "phases (components)", "BIC");
    let pts: Vec<String> = c
        .iter()
        .map(|p| format!("{:.2},{:.2}", ax.px(p.k as f64), ax.py(p.bic)))
        .collect();
    let _ = write!(
        svg.body,
        r##"<polyline points="{}" fill="none" stroke="#0072b2" stroke-width="1.5"/>"##,
        pts.join(" ")
    );
    for p in c {
        let best = Some(p.k) == r.phase_count.bic_minimum;
        let _ = write!(
            svg.body,
            r##"<circle cx="{:.2}" cy="{:.2}" r="{}" fill="{}"><title>{} components: BIC {:.1}</title></circle>"##,
            ax.px(p.k as f64),
            ax.py(p.bic),
            if best { 5 } else { 3 },
            if best { "#d55e00" } else { "#0072b2" },
            p.k,
            p.bic
        );
    }
    Some(svg.finish(
        "Phase-count curve",
        &format!(
            "BIC{} for {} to {} components; lowest at {}; {} phases after merging and dissolving{}",
            match r.phase_count.counted_with {
                Some(m) => format!(" of the {}", m.describe()),
                None => String::new(),
            },
            kmin,
            kmax,
            r.phase_count
                .bic_minimum
                .map_or("no count".to_string(), |k| k.to_string()),
            r.phase_count.phases,
            if r.phase_count.counted_with.is_some() {
                format!(", then fitted with {} from its phases", r.options.cluster.method.describe())
            } else {
                String::new()
            }
        ),
    ))
}

/// The X-ray yield across the field as a heat map (from the fitted smooth field's
/// coefficients), with its colour scale; None where no yield was applied.
pub fn yield_map(r: &Report) -> Option<String> {
    let y = r.xray_yield.as_ref().filter(|y| y.applied)?;
    let (cols, rows) = if r.width >= r.height {
        (48, (48 * r.height / r.width.max(1)).max(2))
    } else {
        ((48 * r.width / r.height.max(1)).max(2), 48)
    };
    let cell = 300.0 / cols.max(rows) as f64;
    let (mw, mh) = (cols as f64 * cell, rows as f64 * cell);
    let mut svg = Svg::new(mw + 150.0, mh.max(120.0) + 10.0);
    let span = (y.max - 1.0)
        .max(1.0 - y.min)
        .max(crate::xray_yield::WARN_ABOVE);
    let shade = |g: f64| -> String {
        let t = ((g - 1.0) / span).clamp(-1.0, 1.0);
        let (end, t) = if t < 0.0 {
            ([0u8, 114, 178], -t)
        } else {
            ([213u8, 94, 0], t)
        };
        let mix = |e: u8| (255.0 + (f64::from(e) - 255.0) * t).round() as u8;
        rgb([mix(end[0]), mix(end[1]), mix(end[2])])
    };
    for j in 0..rows {
        for i in 0..cols {
            let x = (i * 2 + 1) * r.width / (2 * cols);
            let yy = (j * 2 + 1) * r.height / (2 * rows);
            let g = y.at(x, yy, r.width, r.height);
            svg.rect(
                i as f64 * cell,
                j as f64 * cell,
                cell + 0.5,
                cell + 0.5,
                &shade(g),
                "",
            );
        }
    }
    for (k, g) in [1.0 + span, 1.0, 1.0 - span].iter().enumerate() {
        let top = 10.0 + k as f64 * 40.0;
        svg.rect(mw + 15.0, top, 20.0, 20.0, &shade(*g), "stroke=\"#333\"");
        svg.text(mw + 42.0, top + 15.0, &format!("{g:.2}"), "start", 12.0);
    }
    Some(svg.finish(
        "X-ray yield across the field",
        &format!(
            "Relative X-ray yield, {:.2} to {:.2} of the field's mean (blue low, orange high), divided out of every count",
            y.min, y.max
        ),
    ))
}

/// BSE check: measured mean grey level (± SE) of each phase against its predicted
/// backscatter coefficient, with the linear fit; flagged phases outlined in red.
pub fn bse_plot(r: &Report) -> Option<String> {
    let b = r.bse.as_ref()?;
    let pts: Vec<&crate::bse::PhaseBse> = b
        .phases
        .iter()
        .filter(|p| p.bse_mean.is_finite() && p.pixels_used >= 10)
        .collect();
    if pts.len() < 2 {
        return None;
    }
    let flagged: Vec<u16> = b.flags.iter().flat_map(|f| f.phases).collect();
    let (w, h) = (420.0, 280.0);
    let mut svg = Svg::new(w, h);
    let xs = pts.iter().map(|p| p.eta_predicted);
    let ys = pts.iter().map(|p| p.bse_mean);
    let (x0, x1) = (
        xs.clone().fold(f64::INFINITY, f64::min),
        xs.fold(0.0, f64::max),
    );
    let (y0, y1) = (
        ys.clone().fold(f64::INFINITY, f64::min),
        ys.fold(0.0, f64::max),
    );
    let (px, py) = (((x1 - x0) * 0.1).max(0.01), ((y1 - y0) * 0.1).max(1.0));
    let ax = Axes {
        x: (x0 - px, x1 + px),
        y: (y0 - py, y1 + py),
        left: 80.0,
        top: 10.0,
        width: w - 100.0,
        height: h - 60.0,
    };
    ax.draw(
        &mut svg,
        "predicted backscatter coefficient η",
        "mean BSE grey level",
    );
    if let Some(f) = &b.fit {
        let (a, c) = (ax.x.0, ax.x.1);
        svg.line(
            ax.px(a),
            ax.py(f.intercept + f.slope * a),
            ax.px(c),
            ax.py(f.intercept + f.slope * c),
            "#999",
            1.0,
        );
    }
    for p in pts {
        let (x, y) = (ax.px(p.eta_predicted), ax.py(p.bse_mean));
        let se = if p.bse_se.is_finite() { p.bse_se } else { 0.0 };
        svg.line(
            x,
            ax.py(p.bse_mean - se),
            x,
            ax.py(p.bse_mean + se),
            "#000",
            1.0,
        );
        let flag = flagged.contains(&p.id);
        let _ = write!(
            svg.body,
            r##"<circle cx="{x:.2}" cy="{y:.2}" r="6" fill="{}" stroke="{}" stroke-width="{}"><title>phase {}: η {:.3}, BSE {:.1} ± {:.1}{}</title></circle>"##,
            rgb(colour(p.id)),
            if flag { "#d00" } else { "#333" },
            if flag { 3 } else { 1 },
            p.id,
            p.eta_predicted,
            p.bse_mean,
            se,
            if flag { " (flagged)" } else { "" }
        );
        svg.text(
            x + 9.0,
            y - 6.0,
            &format!("{}{}", p.id, if flag { "!" } else { "" }),
            "start",
            11.0,
        );
    }
    Some(svg.finish(
        "BSE brightness against predicted backscatter coefficient",
        &format!(
            "One point per phase; Spearman {:?}; fit R² {:?}; {} flags",
            b.spearman,
            b.fit.map(|f| f.r2),
            b.flags.len()
        ),
    ))
}

/// A 2-D histogram of two elements' counts, each bin in the colour of the phase most of
/// its pixels belong to, darker with more pixels (log scale); the axes run from 0 to
/// `top` (each element's 99.5th percentile, at least 1).
pub fn density_scatter(
    (ex, ey): (&str, &str),
    (x, y): (&[f32], &[f32]),
    top: (f32, f32),
    labels: &[u16],
    k: usize,
) -> String {
    const B: usize = 48;
    let (xm, ym) = (f64::from(top.0.max(1.0)), f64::from(top.1.max(1.0)));
    let mut bins = vec![0u32; B * B * (k + 1)];
    for ((&a, &b), &l) in x.iter().zip(y).zip(labels) {
        let i = ((f64::from(a) / xm * B as f64) as usize).min(B - 1);
        let j = ((f64::from(b) / ym * B as f64) as usize).min(B - 1);
        bins[(j * B + i) * (k + 1) + (l as usize).min(k)] += 1;
    }
    let (w, h) = (300.0, 300.0);
    let mut svg = Svg::new(w, h);
    let ax = Axes {
        x: (0.0, xm),
        y: (0.0, ym),
        left: 60.0,
        top: 10.0,
        width: w - 75.0,
        height: h - 60.0,
    };
    ax.draw(
        &mut svg,
        &format!("{ex} counts per pixel"),
        &format!("{ey} counts per pixel"),
    );
    let max = (0..B * B)
        .map(|c| bins[c * (k + 1)..(c + 1) * (k + 1)].iter().sum::<u32>())
        .max()
        .unwrap_or(1)
        .max(1);
    let (cw, ch) = (ax.width / B as f64, ax.height / B as f64);
    for j in 0..B {
        for i in 0..B {
            let cell = &bins[(j * B + i) * (k + 1)..(j * B + i + 1) * (k + 1)];
            let total: u32 = cell.iter().sum();
            if total == 0 {
                continue;
            }
            let (l, _) = cell
                .iter()
                .enumerate()
                .max_by_key(|(_, &c)| c)
                .unwrap_or((0, &0));
            let alpha = 0.25 + 0.75 * (f64::from(total).ln_1p() / f64::from(max).ln_1p());
            svg.rect(
                ax.left + i as f64 * cw,
                ax.top + ax.height - (j + 1) as f64 * ch,
                cw,
                ch,
                &rgb(colour(l as u16)),
                &format!(r#"fill-opacity="{alpha:.2}""#),
            );
        }
    }
    svg.finish(
        &format!("{ey} against {ex}"),
        &format!("Two-dimensional histogram of {ex} and {ey} counts per pixel, coloured by the phase most pixels of each bin belong to"),
    )
}

/// The pairs of elements that separate the phases best: elements ranked by the spread of
/// the phase means over the mean within-phase SD, the top three paired.
pub fn informative_pairs(r: &Report) -> Vec<(String, String)> {
    let mut score: Vec<(f64, &String)> = r
        .elements
        .iter()
        .map(|e| {
            let means: Vec<f64> = r.phases.iter().map(|p| p.mean[e]).collect();
            let sds: Vec<f64> = r.phases.iter().map(|p| p.sd[e]).collect();
            let m = means.iter().sum::<f64>() / means.len().max(1) as f64;
            let spread = (means.iter().map(|v| (v - m).powi(2)).sum::<f64>()
                / means.len().max(1) as f64)
                .sqrt();
            let noise = sds.iter().sum::<f64>() / sds.len().max(1) as f64;
            (spread / noise.max(1e-6), e)
        })
        .collect();
    score.sort_by(|a, b| b.0.total_cmp(&a.0));
    let top: Vec<&String> = score.iter().take(3).map(|s| s.1).collect();
    let mut pairs = Vec::new();
    for i in 0..top.len() {
        for j in i + 1..top.len() {
            pairs.push((top[i].clone(), top[j].clone()));
        }
    }
    pairs
}

/// An image embedded in the page.
pub struct Figure {
    /// PNG bytes.
    pub png: Vec<u8>,
    /// Alternative text.
    pub alt: String,
    /// Caption.
    pub caption: String,
}

/// Everything besides the report that the page shows.
pub struct Extras {
    /// Phase map, BSE, overlay.
    pub figures: Vec<Figure>,
    /// Element maps (small multiples).
    pub element_maps: Vec<Figure>,
    /// Density scatters (SVG).
    pub scatters: Vec<String>,
    /// What the page cannot show, with why (a field labelled strip by strip).
    pub left_out: Vec<String>,
}

const STYLE: &str = "body{font-family:sans-serif;max-width:1100px;margin:1.5em auto;padding:0 1em;color:#111;line-height:1.4}h1{font-size:1.6em}h2{font-size:1.25em;border-bottom:1px solid #ccc;margin-top:1.6em}figure{margin:.5em;display:inline-block;vertical-align:top}figure img{max-width:100%;image-rendering:pixelated;border:1px solid #999}figcaption{font-size:.85em;color:#333;max-width:520px}.maps figure{max-width:100%}.row{display:flex;flex-wrap:wrap;gap:1em;align-items:flex-start}table{border-collapse:collapse;font-size:.9em}th,td{border:1px solid #bbb;padding:.25em .5em;text-align:right;vertical-align:top}th{background:#f2f2f2}td.l,th.l{text-align:left}.sw{display:inline-block;width:1em;height:1em;border:1px solid #333;vertical-align:middle;margin-right:.3em}.note{font-size:.9em}ul{padding-left:1.2em}code{font-size:.9em}@media print{@page{size:A4;margin:15mm}body{max-width:none;margin:0;font-size:10pt}h2{break-after:avoid}figure,table,svg{break-inside:avoid}}";

/// The page.
pub fn page(r: &Report, extras: &Extras) -> String {
    let mut h = String::new();
    let _ = write!(
        h,
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><meta name=\"viewport\" content=\"width=device-width\"><title>modalmap report: {}</title><style>{STYLE}</style></head><body>\n",
        esc(&r.field)
    );
    let _ = writeln!(
        h,
        "<h1>Phase report: {}</h1><p>{} × {} pixels{}{}; elements {}; {} phases, {:.2} % unassigned.</p>",
        esc(&r.field),
        r.width,
        r.height,
        r.pixel_size_um.map_or(String::new(), |p| format!(" of {p} µm")),
        r.beam_kv.map_or(String::new(), |k| format!(", {k} kV")),
        esc(&r.elements.join(", ")),
        r.phases.len(),
        100.0 * r.unassigned_fraction
    );
    figure_row(&mut h, "Phase map", "row", &extras.figures);
    note_list(&mut h, "Left out of this report", &extras.left_out);
    figure_row(&mut h, "Element maps", "row maps", &extras.element_maps);
    h.push_str(&phase_table(r));
    h.push_str("<h2>Area fractions</h2>");
    h.push_str(&area_bar(r));
    h.push_str("<h2>Compositions</h2>");
    h.push_str(&composition_bars(r));
    h.push_str(&pairs_section(r, &extras.scatters));
    h.push_str(&bse_section(r));
    h.push_str(&yield_section(r));
    h.push_str(&count_section(r));
    note_list(&mut h, "Beam-physics advice", &r.advisor.messages);
    note_list(&mut h, "Notes on the compositions", &r.composition.notes);
    note_list(&mut h, "Warnings", &r.warnings);
    note_list(&mut h, "Cautions", &r.cautions);
    h.push_str(&provenance_section(r));
    h.push_str("</body></html>\n");
    h
}

/// A titled row of embedded PNG figures (nothing when there are none).
fn figure_row(h: &mut String, title: &str, class: &str, figs: &[Figure]) {
    if figs.is_empty() {
        return;
    }
    let _ = write!(h, "<h2>{title}</h2><div class=\"{class}\">");
    for f in figs {
        let _ = write!(
            h,
            "<figure><img src=\"data:image/png;base64,{}\" alt=\"{}\"><figcaption>{}</figcaption></figure>",
            base64(&f.png),
            esc(&f.alt),
            esc(&f.caption)
        );
    }
    h.push_str("</div>\n");
}

/// A titled list of notes (nothing when there are none).
fn note_list(h: &mut String, title: &str, items: &[String]) {
    if items.is_empty() {
        return;
    }
    let _ = write!(h, "<h2>{}</h2><ul class=\"note\">", esc(title));
    for i in items {
        let _ = write!(h, "<li>{}</li>", esc(i));
    }
    h.push_str("</ul>\n");
}

/// The phase table: id, name, area with its interval, composition, reference match,
/// features and their mean ECD; with how the numbers were made.
fn phase_table(r: &Report) -> String {
    let mut h = String::new();
    h.push_str("<h2>Phases</h2><table id=\"phases\"><thead><tr><th>id</th><th class=\"l\">phase</th><th>area %</th><th>95 % CI</th><th class=\"l\">composition wt% ± 1σ</th><th class=\"l\">reference match</th><th>features</th><th>mean ECD</th></tr></thead><tbody>\n");
    for p in &r.phases {
        let comp: Vec<String> = r
            .composition
            .elements
            .iter()
            .filter(|e| p.composition_wt[*e] >= 0.5)
            .map(|e| {
                format!(
                    "{e} {}",
                    super::value_pm(p.composition_wt[e], p.composition_wt_sd[e], " ± ")
                )
            })
            .chain(
                (!p.not_detected.is_empty())
                    .then(|| format!("not detected: {}", super::not_detected_text(p, ","))),
            )
            .collect();
        let m = match &p.reference {
            Some(m) => match &m.reference {
                Some(name) if m.alternatives.is_empty() => {
                    format!("{} (quality {:.2})", esc(name), m.quality)
                }
                Some(name) => format!(
                    "{} (quality {:.2}; {} fit as well: the mapped elements cannot tell them apart)",
                    esc(name),
                    m.quality,
                    esc(&m.alternatives.join(", "))
                ),
                None => format!("no match (closest {}, {:.3})", esc(&m.closest), m.quality),
            },
            None => "–".into(),
        };
        let ecd = match p.mean_ecd_um {
            Some(u) => format!("{u:.2} µm"),
            None => format!("{:.1} px", p.mean_ecd_px),
        };
        let _ = writeln!(
            h,
            "<tr><td>{id}</td><td class=\"l\"><span class=\"sw\" style=\"background:{c}\"></span>{name}</td><td>{a:.2}</td><td>{ci}</td><td class=\"l\">{comp}{mixed}</td><td class=\"l\">{m}</td><td>{n}</td><td>{ecd}</td></tr>",
            id = p.id,
            c = rgb(colour(p.id)),
            name = esc(&p.name),
            a = 100.0 * p.area_fraction,
            ci = super::ci_text(p.area_fraction_ci95, " – "),
            comp = esc(&comp.join(", ")),
            mixed = match (p.composition_from_interior, p.composition_unmixed) {
                (true, _) => "",
                (false, true) => " (unmixed from its neighbours)",
                (false, false) => " (mixed with neighbours)",
            },
            n = p.features,
        );
    }
    let _ = writeln!(
        h,
        "</tbody></table><p class=\"note\">Composition: {}. {} Area interval: {}.</p>",
        esc(&r.composition.method),
        esc(&r.composition.uncertainty),
        esc(r
            .statistics
            .get("method")
            .and_then(|v| v.as_str())
            .unwrap_or(""))
    );
    h
}

/// The density plots of the element pairs, with their colour key.
fn pairs_section(r: &Report, scatters: &[String]) -> String {
    let mut h = String::new();
    if !scatters.is_empty() {
        h.push_str("<h2>Counts of the most telling element pairs</h2><div class=\"row\">");
        for s in scatters {
            h.push_str(s);
        }
        h.push_str("</div><p class=\"note\">Each bin takes the colour of the phase most of its pixels belong to, darker with more pixels: ");
        for p in &r.phases {
            let _ = write!(
                h,
                "<span class=\"sw\" style=\"background:{}\"></span>{} {} &nbsp; ",
                rgb(colour(p.id)),
                p.id,
                esc(&p.name)
            );
        }
        h.push_str("<span class=\"sw\" style=\"background:#000\"></span>unassigned.</p>\n");
    }
    h
}

/// The BSE contrast check: the plot and what it found.
fn bse_section(r: &Report) -> String {
    let mut h = String::new();
    if let Some(svg) = bse_plot(r) {
        h.push_str("<h2>BSE contrast check</h2>");
        h.push_str(&svg);
        if let Some(b) = &r.bse {
            h.push_str("<ul class=\"note\">");
            if b.flags.is_empty() {
                h.push_str("<li>The BSE brightness order agrees with the predicted backscatter coefficients.</li>");
            }
            for f in &b.flags {
                let _ = write!(h, "<li>{}</li>", esc(&f.message));
            }
            h.push_str("</ul>");
        }
    }
    h
}

/// The X-ray yield across the field: the map and the factor's range, or why there is none.
fn yield_section(r: &Report) -> String {
    let mut h = String::new();
    match &r.xray_yield {
        Some(y) if y.applied => {
            h.push_str("<h2>X-ray yield across the field</h2>");
            if let Some(svg) = yield_map(r) {
                h.push_str(&svg);
            }
            let _ = write!(
                h,
                "<p class=\"note\">A smooth factor on every count (quadratic in ln{}, fitted with the phases on {} interior pixels; ΔBIC {:.0}) ranges from {:.3} (± {:.3}) to {:.3} (± {:.3}); the counts were divided by it before the last labelling and the compositions.{}</p>",
                match y.tiles {
                    Some([a, d]) => format!(" across each of the montage's {a} × {d} tiles, with a step per tile"),
                    None => String::new(),
                },
                y.pixels,
                y.delta_bic,
                y.min,
                y.min * y.min_max_log_se[0],
                y.max,
                y.max * y.min_max_log_se[1],
                y.note.as_deref().map_or(String::new(), |n| format!(" Note: {}.", esc(n)))
            );
        }
        Some(y) => {
            let why = match &y.not_estimated {
                Some(reason) => reason.clone(),
                None => format!(
                    "flat: a smooth factor did not earn its terms (ΔBIC {:+.0} on {} interior pixels), so no correction was made",
                    y.delta_bic, y.pixels
                ),
            };
            let _ = write!(
                h,
                "<h2>X-ray yield across the field</h2><p class=\"note\">{}.</p>",
                esc(&why)
            );
        }
        None => {}
    }
    h
}

/// How many phases: the BIC curve and the simplifications.
fn count_section(r: &Report) -> String {
    let mut h = String::new();
    if let Some(svg) = bic_curve(r) {
        h.push_str("<h2>How many phases</h2>");
        h.push_str(&svg);
        h.push_str("<ul class=\"note\">");
        for s in &r.phase_count.simplifications {
            let _ = write!(h, "<li>{}</li>", esc(&s.action));
        }
        h.push_str("</ul>");
    }
    h
}

/// Tool, version, seed, model, input files with their hashes, and the options.
fn provenance_section(r: &Report) -> String {
    let mut h = String::new();
    let inputs: Vec<String> = r
        .provenance
        .inputs
        .iter()
        .map(|i| format!("{}  SHA-256 {}", i.path, i.sha256))
        .collect();
    let _ = write!(
        h,
        "<h2>Provenance</h2><p class=\"note\">{} {}, seed {}{}.</p>",
        esc(&r.provenance.tool),
        esc(&r.provenance.version),
        r.provenance.seed,
        r.model.as_ref().map_or(String::new(), |m| format!(
            ", model {} (SHA-256 {})",
            esc(&m.path),
            m.sha256
        ))
    );
    note_list(&mut h, "Inputs", &inputs);
    let opts = serde_json::to_string(&r.options).unwrap_or_default();
    let _ = write!(
        h,
        "<p class=\"note\">Options: <code>{}</code></p>",
        esc(&opts)
    );
    h
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ticks_are_round_and_cover_the_range() {
        assert_eq!(
            ticks(0.0, 100.0, 5),
            vec![0.0, 20.0, 40.0, 60.0, 80.0, 100.0]
        );
        let t = ticks(0.13, 0.41, 4);
        assert!(t.first().unwrap() >= &0.13 && t.last().unwrap() <= &0.41 && t.len() >= 3);
    }

    /// The phase table escapes each text once ("<" of a detection limit shows as "<", not
    /// as "&lt;"), and a sole element normalised to 100 % says it has no σ.
    #[test]
    fn the_phase_table_escapes_once() {
        let r: Report =
            serde_json::from_str(include_str!("../../tests/golden/map.report.json")).unwrap();
        let h = phase_table(&r);
        assert!(h.contains("not detected: Ag &lt;1.07"), "{h}");
        assert!(!h.contains("&amp;lt;"), "{h}");
        assert!(h.contains("Sn 100.0 (100 % by normalisation, no σ)"), "{h}");
        // The match column names the same candidates as the name column.
        let p1 = &r.phases[0];
        let alternatives = &p1.reference.as_ref().unwrap().alternatives;
        assert!(
            !alternatives.is_empty() && p1.name.contains(&alternatives[0]),
            "{}",
            p1.name
        );
        assert!(
            h.contains(&format!("{} fit as well", alternatives.join(", "))),
            "{h}"
        );
        assert!(!h.contains("± 0.0<") && !h.contains("± 0.0,"), "{h}");
    }

    /// The SVG phase map embeds the image as it is (every pixel in its phase's colour),
    /// writes every legend entry as text (escaped) with room for the longest, and draws a
    /// scale bar only when the pixel size is known.
    #[test]
    fn the_svg_phase_map_keeps_pixels_and_vector_text() {
        let (w, h) = (40usize, 20usize);
        let labels: Vec<u16> = (0..w * h).map(|i| ((i % w) / 14) as u16).collect();
        let rgb: Vec<u8> = labels.iter().flat_map(|&l| colour(l)).collect();
        let png = crate::io::raster::encode_png_rgb(w, h, &rgb);
        let legend = vec![
            (1, "1 Cu6Sn5 (eta) & Cu3Sn  4.9 %".to_string()),
            (2, "2 Ag3Sn  1.5 %".to_string()),
            (0, "unassigned  0.8 %".to_string()),
        ];
        let svg = phase_map_svg("f: phase map", (&png, w, h), &legend, Some(0.5));
        for (_, t) in &legend {
            assert!(svg.contains(&format!(">{}</text>", esc(t))), "{t}");
        }
        // 40 px × 0.5 µm = 20 µm wide: a 2 µm bar (the round length at most a fifth),
        // 4 px of the image, drawn 20 units a pixel.
        assert_eq!(super::super::draw::scale_bar_um(20.0), 2.0);
        assert!(svg.contains(">2 µm</text>"), "{svg}");
        assert!(svg.contains(r#"width="80.00" height="5.00""#), "{svg}");
        assert!(!phase_map_svg("f", (&png, w, h), &legend, None).contains("µm</text>"));
        // Room for the longest legend text beside the 800-unit image.
        let width: f64 = svg
            .split("width=\"")
            .nth(1)
            .unwrap()
            .split('"')
            .next()
            .unwrap()
            .parse()
            .unwrap();
        let longest = f64::from(super::super::draw::advance(&legend[0].1, 14.0));
        assert!(width >= MAP_SVG_WIDTH + 16.0 + 22.0 + longest, "{width}");
        // The embedded PNG decodes to the labels' colours, pixel for pixel.
        let data = svg
            .split("base64,")
            .nth(1)
            .unwrap()
            .split('"')
            .next()
            .unwrap();
        use base64::Engine as _;
        let bytes = base64::engine::general_purpose::STANDARD
            .decode(data)
            .unwrap();
        let mut reader = png::Decoder::new(std::io::Cursor::new(bytes))
            .read_info()
            .unwrap();
        let mut buf = vec![0; reader.output_buffer_size().unwrap()];
        let info = reader.next_frame(&mut buf).unwrap();
        assert_eq!((info.width as usize, info.height as usize), (w, h));
        assert_eq!(&buf[..info.buffer_size()], &rgb[..]);
    }
}
