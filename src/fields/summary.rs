//! The pooled summary's files for a spreadsheet and a report: summary.csv (pooled, one row
//! per phase and one for the unassigned pixels), fields.csv (long format: one row per field
//! and phase), summary-areas.svg and .png (area fractions with their 95 % intervals, and
//! each field's value) and summary.html. Every area is in % of the field's pixels; every
//! composition in wt% with its ± and basis.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::{Component, Path, PathBuf};

use super::{PooledPhase, Summary};
use crate::report::html::esc;
use crate::report::{csv_field, Report};

/// The elements of the pooled compositions, in the summary's order.
fn elements(s: &Summary) -> Vec<String> {
    s.phases
        .first()
        .map(|p| p.composition_wt.keys().cloned().collect())
        .unwrap_or_default()
}

fn pct(v: f64) -> String {
    format!("{:.4}", 100.0 * v)
}

fn opt_pct(v: Option<f64>) -> String {
    v.map_or(String::new(), pct)
}

/// `summary.csv`: one row per phase (ids as in the model) and a last row, id 0, for the
/// unassigned pixels, so that the area column adds up to 100 %. An interval or SD that is
/// undefined (one field) is left empty.
pub fn summary_csv(s: &Summary) -> String {
    let elements = elements(s);
    let mut out = String::from("id,name,fields,area_pct_mean,area_pct_sd,area_pct_ci95_low,area_pct_ci95_high,relative_accuracy_pct,features,pixels,composition_basis");
    for e in &elements {
        let _ = write!(out, ",wt_pct_{e},wt_pct_sd_between_fields_{e}");
    }
    out.push('\n');
    for p in &s.phases {
        let _ = write!(
            out,
            "{},{},{},{},{},{},{},{},{},{},{}",
            p.id,
            csv_field(&p.name),
            p.fields,
            pct(p.area_fraction_mean),
            sd_pct(s, p.area_fraction_sd).map_or(String::new(), |v| format!("{v:.4}")),
            opt_pct(p.area_fraction_ci95.map(|c| c[0])),
            opt_pct(p.area_fraction_ci95.map(|c| c[1])),
            p.relative_accuracy_pct
                .map_or(String::new(), |v| format!("{v:.2}")),
            p.features,
            p.pixels,
            csv_field(&p.composition_basis),
        );
        composition_cells(
            &mut out,
            &elements,
            &p.composition_wt,
            &p.composition_wt_sd_between_fields,
        );
    }
    let _ = write!(
        out,
        "0,unassigned,{},{},{},{},{},,,,",
        s.fields.len(),
        pct(s.unassigned_fraction_mean),
        sd_pct(s, s.unassigned_fraction_sd).map_or(String::new(), |v| format!("{v:.4}")),
        opt_pct(s.unassigned_fraction_ci95.map(|c| c[0])),
        opt_pct(s.unassigned_fraction_ci95.map(|c| c[1])),
    );
    composition_cells(&mut out, &elements, &BTreeMap::new(), &BTreeMap::new());
    out
}

/// `fields.csv`, long format for a spreadsheet's pivot table: one row per field and phase
/// (area with the field's own 95 % interval from its tiles, features, ECD, composition
/// with its counting σ and basis), and a row per field for its unassigned pixels.
pub fn fields_csv(reports: &[(PathBuf, Report)]) -> String {
    let elements: Vec<String> = reports
        .first()
        .map(|(_, r)| r.elements.clone())
        .unwrap_or_default();
    let mut out = String::from("field,phase_id,phase,area_pct,area_pct_ci95_low,area_pct_ci95_high,features,mean_ecd_um,composition_basis");
    for e in &elements {
        let _ = write!(out, ",wt_pct_{e},wt_pct_sd_{e}");
    }
    out.push('\n');
    for (_, r) in reports {
        let field = csv_field(&r.field);
        for p in &r.phases {
            let _ = write!(
                out,
                "{field},{},{},{},{},{},{},{},{}",
                p.id,
                csv_field(&p.name),
                pct(p.area_fraction),
                opt_pct(p.area_fraction_ci95.map(|c| c[0])),
                opt_pct(p.area_fraction_ci95.map(|c| c[1])),
                p.features,
                p.mean_ecd_um.map_or(String::new(), |v| format!("{v:.3}")),
                csv_field(&p.composition_basis),
            );
            composition_cells(&mut out, &elements, &p.composition_wt, &p.composition_wt_sd);
        }
        let _ = write!(
            out,
            "{field},0,unassigned,{},,,,,",
            pct(r.unassigned_fraction)
        );
        composition_cells(&mut out, &elements, &BTreeMap::new(), &BTreeMap::new());
    }
    out
}

/// The value and ± cells of each element (empty where a map lacks it), ending the row.
fn composition_cells(
    out: &mut String,
    elements: &[String],
    wt: &BTreeMap<String, f64>,
    sd: &BTreeMap<String, f64>,
) {
    let cell = |v: Option<&f64>| v.map_or(String::new(), |v| format!("{v:.3}"));
    for e in elements {
        let _ = write!(out, ",{},{}", cell(wt.get(e)), cell(sd.get(e)));
    }
    out.push('\n');
}

/// Why a pooled SD or interval has no value.
pub const ONE_FIELD: &str = "undefined (one field)";

/// A pooled 95 % interval (fractions) in % for tables, or why it has none.
pub fn interval_text(ci: Option<[f64; 2]>, dash: &str) -> String {
    match ci {
        Some([lo, hi]) => format!("{:.2}{dash}{:.2}", 100.0 * lo, 100.0 * hi),
        None => ONE_FIELD.into(),
    }
}

/// A pooled phase's 95 % interval in %, or why it has none.
pub fn pooled_ci_text(p: &PooledPhase, dash: &str) -> String {
    interval_text(p.area_fraction_ci95, dash)
}

/// A pooled SD (a fraction) in %; `None` with one field, where it is undefined.
pub fn sd_pct(s: &Summary, sd: f64) -> Option<f64> {
    (s.fields.len() > 1).then_some(100.0 * sd)
}

/// [`sd_pct`] for a table: two decimals, or why there is none.
fn sd_text(s: &Summary, sd: f64) -> String {
    sd_pct(s, sd).map_or(ONE_FIELD.into(), |v| format!("{v:.2}"))
}

/// The layout of the area figure, in SVG user units (the PNG draws it at
/// [`AREAS_PNG_ZOOM`] pixels a unit): phase names right-aligned before `left`, bars
/// `bar_w` long for 0 to `scale` %, a row of `row_h` per phase from `top`.
struct AreaAxes {
    left: f64,
    bar_w: f64,
    row_h: f64,
    top: f64,
    scale: f64,
    width: f64,
    height: f64,
}

impl AreaAxes {
    fn of(s: &Summary) -> AreaAxes {
        let (left, bar_w, row_h, top) = (220.0, 420.0, 34.0, 40.0);
        let top_value = s
            .fields
            .iter()
            .flat_map(|f| f.area_fractions.iter().copied())
            .chain(
                s.phases
                    .iter()
                    .filter_map(|p| p.area_fraction_ci95.map(|c| c[1])),
            )
            .chain(s.phases.iter().map(|p| p.area_fraction_mean))
            .fold(0.0f64, f64::max)
            .max(1e-3);
        AreaAxes {
            left,
            bar_w,
            row_h,
            top,
            scale: nice_max(100.0 * top_value),
            width: left + bar_w + 40.0,
            height: top + row_h * s.phases.len() as f64 + 50.0,
        }
    }

    /// The x of an area fraction (0–1).
    fn x(&self, f: f64) -> f64 {
        self.left + self.bar_w * (100.0 * f / self.scale).clamp(0.0, 1.0)
    }

    /// The y of the top of phase row `i`, and of the axis.
    fn row(&self, i: usize) -> f64 {
        self.top + self.row_h * i as f64
    }

    /// The figure's title line.
    fn title(s: &Summary) -> String {
        format!(
            "area % of the field ({} fields; bar: mean, whisker: 95 % interval, dots: fields)",
            s.fields.len()
        )
    }
}

/// `summary-areas.svg`: per phase, the mean area % as a bar with its 95 % interval as a
/// whisker, and each field's value as a dot; vector text, so it scales into any report.
pub fn areas_svg(s: &Summary) -> String {
    let a = AreaAxes::of(s);
    let (left, bar_w, row_h, top, scale) = (a.left, a.bar_w, a.row_h, a.top, a.scale);
    let x = |f: f64| a.x(f);
    let (width, height) = (a.width, a.height);
    let mut g = format!(
        "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{width:.0}\" height=\"{height:.0}\" viewBox=\"0 0 {width:.0} {height:.0}\" font-family=\"sans-serif\" font-size=\"13\">\n<title>Area fractions of the phases over {} fields: mean (bar), 95 % interval (whisker), each field (dot)</title>\n<rect width=\"100%\" height=\"100%\" fill=\"white\"/>\n",
        s.fields.len()
    );
    let _ = writeln!(
        g,
        "<text x=\"{left}\" y=\"22\">{}</text>",
        AreaAxes::title(s)
    );
    for (i, p) in s.phases.iter().enumerate() {
        let y = top + row_h * i as f64;
        let [r, gr, b] = crate::report::draw::colour(p.id);
        let _ = writeln!(
            g,
            "<text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"end\">{} {}</text>",
            left - 8.0,
            y + 17.0,
            p.id,
            esc(&shorten(&p.name, 28))
        );
        let _ = writeln!(
            g,
            "<rect x=\"{left}\" y=\"{:.1}\" width=\"{:.2}\" height=\"18\" fill=\"rgb({r},{gr},{b})\" fill-opacity=\"0.75\"/>",
            y + 4.0,
            x(p.area_fraction_mean) - left
        );
        if let Some([lo, hi]) = p.area_fraction_ci95 {
            let (xl, xh, ym) = (x(lo), x(hi), y + 13.0);
            let _ = writeln!(
                g,
                "<path d=\"M{xl:.2} {ym:.1}H{xh:.2}M{xl:.2} {:.1}V{:.1}M{xh:.2} {:.1}V{:.1}\" stroke=\"black\" stroke-width=\"1.5\" fill=\"none\"/>",
                ym - 6.0,
                ym + 6.0,
                ym - 6.0,
                ym + 6.0
            );
        }
        for f in &s.fields {
            if let Some(&v) = f.area_fractions.get(i) {
                let _ = writeln!(
                    g,
                    "<circle cx=\"{:.2}\" cy=\"{:.1}\" r=\"2.5\" fill=\"black\" fill-opacity=\"0.6\"><title>{}: {:.2} %</title></circle>",
                    x(v),
                    y + 13.0,
                    esc(&f.field),
                    100.0 * v
                );
            }
        }
    }
    let axis_y = top + row_h * s.phases.len() as f64 + 6.0;
    let _ = writeln!(
        g,
        "<path d=\"M{left} {axis_y:.1}H{:.1}\" stroke=\"black\"/>",
        left + bar_w
    );
    for k in 0..=4 {
        let v = scale * k as f64 / 4.0;
        let xv = left + bar_w * k as f64 / 4.0;
        let _ = writeln!(
            g,
            "<path d=\"M{xv:.1} {axis_y:.1}v5\" stroke=\"black\"/><text x=\"{xv:.1}\" y=\"{:.1}\" text-anchor=\"middle\">{}</text>",
            axis_y + 19.0,
            fmt_axis(v)
        );
    }
    g.push_str("</svg>\n");
    g
}

/// Pixels per SVG unit of `summary-areas.png`: twice the SVG's size, sharp in print.
pub const AREAS_PNG_ZOOM: f64 = 2.0;

/// `summary-areas.png`: the figure of [`areas_svg`] as an image (for a word processor or
/// a slide), drawn at [`AREAS_PNG_ZOOM`] pixels a unit with the bundled font.
pub fn areas_png(s: &Summary) -> Vec<u8> {
    use crate::report::draw::{advance, colour, Canvas};
    let a = AreaAxes::of(s);
    let z = AREAS_PNG_ZOOM;
    let px = |v: f64| (v * z).round() as usize;
    let (em, ink) = (13.0 * z as f32, [0u8; 3]);
    let mut c = Canvas::new(px(a.width), px(a.height), [255; 3]);
    c.text_at(
        (a.left * z) as f32,
        (22.0 * z) as f32,
        &AreaAxes::title(s),
        em,
        ink,
    );
    for (i, p) in s.phases.iter().enumerate() {
        let y = a.row(i);
        let name = format!("{} {}", p.id, shorten(&p.name, 28));
        let nx = (a.left - 8.0) * z - f64::from(advance(&name, em));
        c.text_at(nx as f32, ((y + 17.0) * z) as f32, &name, em, ink);
        // The SVG's fill-opacity 0.75 on white.
        let fill = colour(p.id).map(|v| (0.75 * f64::from(v) + 0.25 * 255.0).round() as u8);
        let bar = px(a.x(p.area_fraction_mean)).saturating_sub(px(a.left));
        c.rect(px(a.left), px(y + 4.0), bar, px(18.0), fill);
        if let Some([lo, hi]) = p.area_fraction_ci95 {
            let (xl, xh, ym) = (px(a.x(lo)), px(a.x(hi)), y + 13.0);
            let t = px(1.5).max(1);
            c.rect(xl, px(ym) - t / 2, xh.saturating_sub(xl) + t, t, ink);
            for xe in [xl, xh] {
                c.rect(xe, px(ym - 6.0), t, px(12.0), ink);
            }
        }
        for f in &s.fields {
            if let Some(&v) = f.area_fractions.get(i) {
                c.disc((a.x(v) * z, (y + 13.0) * z), 2.5 * z, ink, 0.6);
            }
        }
    }
    let axis_y = a.row(s.phases.len()) + 6.0;
    c.rect(px(a.left), px(axis_y), px(a.bar_w), px(1.0), ink);
    for k in 0..=4 {
        let v = a.scale * k as f64 / 4.0;
        let xv = a.left + a.bar_w * k as f64 / 4.0;
        c.rect(px(xv), px(axis_y), px(1.0), px(5.0), ink);
        let label = fmt_axis(v);
        let lx = xv * z - f64::from(advance(&label, em)) / 2.0;
        c.text_at(lx as f32, ((axis_y + 19.0) * z) as f32, &label, em, ink);
    }
    crate::io::raster::encode_png_rgb(c.width, c.height, &c.rgb)
}

/// The smallest of 1, 2, 2.5, 5 × 10ⁿ at or above `v`.
fn nice_max(v: f64) -> f64 {
    let p = 10f64.powf(v.log10().floor());
    [1.0, 2.0, 2.5, 5.0, 10.0]
        .iter()
        .map(|m| m * p)
        .find(|&c| c >= v * (1.0 - 1e-9))
        .unwrap_or(10.0 * p)
        .min(100.0)
}

fn fmt_axis(v: f64) -> String {
    if (v - v.round()).abs() < 1e-9 {
        format!("{v:.0}")
    } else {
        format!("{v:.2}")
            .trim_end_matches('0')
            .trim_end_matches('.')
            .to_string()
    }
}

fn shorten(name: &str, max: usize) -> String {
    if name.chars().count() <= max {
        name.to_string()
    } else {
        name.chars().take(max - 1).chain(['…']).collect()
    }
}

/// Each field's report.html as a link relative to the summary folder `out` (so the
/// folders can move together), in the summary's field order.
pub fn report_links(s: &Summary, out: &Path) -> Vec<String> {
    s.fields
        .iter()
        .map(|f| relative(out, &Path::new(&f.report).with_file_name("report.html")))
        .collect()
}

/// `to` relative to the folder `from`, both taken from the working folder, with `/`.
fn relative(from: &Path, to: &Path) -> String {
    let abs = |p: &Path| -> Vec<String> {
        let p = std::path::absolute(p).unwrap_or_else(|_| p.to_path_buf());
        let mut parts: Vec<String> = Vec::new();
        for c in p.components() {
            match c {
                Component::Normal(n) => parts.push(n.to_string_lossy().into_owned()),
                Component::ParentDir => {
                    parts.pop();
                }
                _ => {}
            }
        }
        parts
    };
    let (f, t) = (abs(from), abs(to));
    let common = f.iter().zip(&t).take_while(|(a, b)| a == b).count();
    let mut parts: Vec<String> = vec!["..".into(); f.len() - common];
    parts.extend(t[common..].iter().cloned());
    parts.join("/")
}

/// A pooled composition with its ± (SD between fields) and basis, or its values alone
/// with one field.
fn composition_text(s: &Summary, p: &PooledPhase) -> String {
    let parts: Vec<String> = p
        .composition_wt
        .iter()
        .filter(|(_, v)| **v >= 1.0)
        .map(|(e, v)| match p.composition_wt_sd_between_fields.get(e) {
            Some(sd) => format!("{e} {}", crate::report::value_pm(*v, *sd, " ± ")),
            None => format!("{e} {v:.1}"),
        })
        .collect();
    let spread = if s.fields.len() < 2 {
        "one field: its counting σ is in its report"
    } else {
        "± SD between fields"
    };
    format!("{} ({spread}; {})", parts.join(", "), p.composition_basis)
}

/// `summary.html`: the pooled table (with the unassigned pixels), the figure, every field's
/// area fractions with a link to its report, the method and the cautions.
pub fn summary_html(s: &Summary, figure: &str, links: &[String]) -> String {
    let mut h = format!(
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><title>modalmap summary</title>\n<style>body{{font-family:sans-serif;max-width:70em;margin:2em auto;}}table{{border-collapse:collapse;margin:1em 0;}}td,th{{border:1px solid #999;padding:.3em .6em;text-align:right;}}td.l,th.l{{text-align:left;}}</style></head><body>\n<h1>Pooled phase statistics over {} fields</h1>\n<p>Model: {} (SHA-256 {}).</p>\n",
        s.fields.len(),
        esc(&s.model.path),
        &s.model.sha256,
    );
    h.push_str("<h2>Phases</h2><table id=\"pooled\">\n<tr><th>id</th><th class=\"l\">phase</th><th>mean area %</th><th>SD %</th><th>95 % CI %</th><th>%RA</th><th>features</th><th class=\"l\">composition wt%</th></tr>\n");
    for p in &s.phases {
        let _ = writeln!(
            h,
            "<tr><td>{}</td><td class=\"l\">{}</td><td>{:.2}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td class=\"l\">{}</td></tr>",
            p.id,
            esc(&p.name),
            100.0 * p.area_fraction_mean,
            sd_text(s, p.area_fraction_sd),
            pooled_ci_text(p, " – "),
            p.relative_accuracy_pct
                .map_or("–".into(), |v| format!("{v:.1}")),
            p.features,
            esc(&composition_text(s, p))
        );
    }
    let un_ci = interval_text(s.unassigned_fraction_ci95, " – ");
    let _ = writeln!(
        h,
        "<tr><td>0</td><td class=\"l\">unassigned</td><td>{:.2}</td><td>{}</td><td>{un_ci}</td><td>–</td><td>–</td><td class=\"l\">–</td></tr>\n</table>\n<p>{}</p>",
        100.0 * s.unassigned_fraction_mean,
        sd_text(s, s.unassigned_fraction_sd),
        esc(&s.method)
    );
    let _ = writeln!(
        h,
        "<h2>Area fractions</h2><figure>{}<figcaption>Mean area % of each phase (bar), its 95 % interval over the fields (whisker) and each field's value (dots); also in summary-areas.svg and summary-areas.png.</figcaption></figure>",
        figure.trim_end()
    );
    h.push_str("<h2>Fields</h2><table id=\"fields\">\n<tr><th class=\"l\">field</th>");
    for p in &s.phases {
        let _ = write!(h, "<th>{} {} %</th>", p.id, esc(&shorten(&p.name, 24)));
    }
    h.push_str("<th>unassigned %</th></tr>\n");
    for (f, link) in s.fields.iter().zip(links) {
        let _ = write!(
            h,
            "<tr><td class=\"l\"><a href=\"{}\">{}</a></td>",
            esc(link),
            esc(&f.field)
        );
        for v in &f.area_fractions {
            let _ = write!(h, "<td>{:.2}</td>", 100.0 * v);
        }
        let _ = writeln!(h, "<td>{:.2}</td></tr>", 100.0 * f.unassigned_fraction);
    }
    h.push_str("</table>\n<h2>Cautions</h2><ul>");
    for c in &s.cautions {
        let _ = write!(h, "<li>{}</li>", esc(c));
    }
    h.push_str("</ul>\n</body></html>\n");
    h
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn links_are_relative_to_the_summary_folder() {
        assert_eq!(
            relative(Path::new("/w/sum"), Path::new("/w/all/f1/report.html")),
            "../all/f1/report.html"
        );
        assert_eq!(
            relative(
                Path::new("/w/a/b/sum"),
                Path::new("/w/a/b/sum/x/report.html")
            ),
            "x/report.html"
        );
        assert_eq!(
            relative(
                Path::new("/w/sum/"),
                Path::new("/w/out/../all/f/report.html")
            ),
            "../all/f/report.html"
        );
    }

    #[test]
    fn axis_limits_are_round() {
        assert_eq!(nice_max(38.8), 50.0);
        assert_eq!(nice_max(3.2), 5.0);
        assert_eq!(nice_max(0.21), 0.25);
        assert_eq!(nice_max(100.0), 100.0);
        assert_eq!(fmt_axis(12.5), "12.5");
        assert_eq!(fmt_axis(25.0), "25");
    }
}
