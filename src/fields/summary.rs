//! The pooled summary's files for a spreadsheet and a report: summary.csv and
//! summary.html.

use super::{PooledPhase, Summary};

/// `summary.csv`: one row per phase.
pub fn summary_csv(s: &Summary) -> String {
    let elements: Vec<String> = s
        .phases
        .first()
        .map(|p| p.composition_wt.keys().cloned().collect())
        .unwrap_or_default();
    let mut out = String::from("id,name,fields,area_fraction_mean,area_fraction_sd,area_fraction_ci95_low,area_fraction_ci95_high,relative_accuracy_pct,particles,pixels");
    for e in &elements {
        out.push_str(&format!(",wt_{e}"));
    }
    out.push('\n');
    for p in &s.phases {
        let name = crate::report::csv_field(&p.name);
        out.push_str(&format!(
            "{},{},{},{:.6},{:.6},{},{},{},{},{}",
            p.id,
            name,
            p.fields,
            p.area_fraction_mean,
            p.area_fraction_sd,
            p.area_fraction_ci95
                .map_or(String::new(), |c| format!("{:.6}", c[0])),
            p.area_fraction_ci95
                .map_or(String::new(), |c| format!("{:.6}", c[1])),
            p.relative_accuracy_pct
                .map_or(String::new(), |v| format!("{v:.2}")),
            p.particles,
            p.pixels
        ));
        for e in &elements {
            out.push_str(&format!(
                ",{}",
                p.composition_wt
                    .get(e)
                    .map_or(String::new(), |v| format!("{v:.3}"))
            ));
        }
        out.push('\n');
    }
    out
}

/// A pooled phase's 95 % interval in %, or why it has none.
pub fn pooled_ci_text(p: &PooledPhase, dash: &str) -> String {
    match p.area_fraction_ci95 {
        Some([lo, hi]) => format!("{:.2}{dash}{:.2}", 100.0 * lo, 100.0 * hi),
        None => "undefined (one field)".into(),
    }
}

/// `summary.html`: a short self-contained page with the pooled table.
pub fn summary_html(s: &Summary) -> String {
    let mut rows = String::new();
    for p in &s.phases {
        let comp: Vec<String> = p
            .composition_wt
            .iter()
            .filter(|(_, v)| **v >= 1.0)
            .map(|(e, v)| format!("{e} {v:.1}"))
            .collect();
        rows.push_str(&format!(
            "<tr><td>{}</td><td>{}</td><td>{:.2}</td><td>{:.2}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>\n",
            p.id,
            crate::report::html::esc(&p.name),
            100.0 * p.area_fraction_mean,
            100.0 * p.area_fraction_sd,
            pooled_ci_text(p, " – "),
            p.relative_accuracy_pct.map_or("–".into(), |v| format!("{v:.1}")),
            p.particles,
            crate::report::html::esc(&comp.join(", "))
        ));
    }
    let cautions: String = s
        .cautions
        .iter()
        .map(|c| format!("<li>{}</li>", crate::report::html::esc(c)))
        .collect();
    let fields: String = s
        .fields
        .iter()
        .map(|f| format!("<li>{}</li>", crate::report::html::esc(&f.field)))
        .collect();
    format!(
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><title>modalmap summary</title>\n<style>body{{font-family:sans-serif;max-width:60em;margin:2em auto;}}table{{border-collapse:collapse;}}td,th{{border:1px solid #999;padding:.3em .6em;text-align:right;}}td:nth-child(2){{text-align:left;}}</style></head><body>\n<h1>Pooled phase statistics over {} fields</h1>\n<p>Model: {} (SHA-256 {}).</p>\n<table>\n<tr><th>id</th><th>phase</th><th>mean area %</th><th>SD %</th><th>95 % CI %</th><th>%RA</th><th>features</th><th>composition wt%</th></tr>\n{rows}</table>\n<p>{}</p>\n<h2>Cautions</h2><ul>{cautions}</ul>\n<h2>Fields</h2><ul>{fields}</ul>\n</body></html>\n",
        s.fields.len(),
        crate::report::html::esc(&s.model.path),
        &s.model.sha256,
        crate::report::html::esc(&s.method),
    )
}
