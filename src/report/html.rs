//! `report.html`: one self-contained page per run (and one per batch) to open in a
//! browser and read in one place: the headline table, the crossover, the per-bin
//! tables, the information budgets, every figure (inline SVG), the resolved inputs, the
//! versions, the caveats that apply, and a methods paragraph with references. No
//! network resources: styles and the one small script are inline; figures are inline
//! SVG; links point only to files beside the page.
//!
//! The tables are drawn from `summary.json`'s arrays of row objects, so a new key in a
//! row becomes a new column without changes here. Text is escaped with `html-escape`.
//!
//! The inline script records script errors and, once loaded, how many figures have a
//! non-empty bounding box, as attributes of the `<html>` element
//! (`data-script-errors`, `data-figures-drawn`), which the browser test reads.

use html_escape::{encode_double_quoted_attribute as attr, encode_text as esc};
use serde_json::Value;

use crate::pipeline::RunResult;
use crate::report::format_sig;
use crate::report::table::TableFormat;

const STYLE: &str = r#"
@font-face { font-family: ngreach-sans; src: local("DejaVu Sans"), local("DejaVuSans"); }
body { font-family: ngreach-sans, "DejaVu Sans", Verdana, sans-serif; max-width: 1180px;
  margin: 1.5em auto; padding: 0 1em; color: #1a1a1a; line-height: 1.45; }
h1 { font-size: 1.6em; margin-bottom: 0.2em; } h2 { margin-top: 1.8em; border-bottom: 1px solid #ccc; }
table { border-collapse: collapse; margin: 0.6em 0 1.2em; font-size: 0.9em; display: block;
  overflow-x: auto; max-width: 100%; }
th, td { padding: 0.2em 0.7em; text-align: right; border-bottom: 1px solid #e2e2e2; }
th { border-bottom: 2px solid #888; background: #f5f5f5; }
td.t, th.t { text-align: left; }
figure { margin: 1.2em 0; } figure svg { max-width: 100%; height: auto; border: 1px solid #ddd; }
figcaption { font-size: 0.9em; color: #444; }
pre { background: #f7f7f7; padding: 0.8em; overflow-x: auto; font-size: 0.8em; }
.note { color: #555; font-size: 0.9em; } nav a { margin-right: 1em; }
"#;

const SCRIPT: &str = r#"
(function () {
  var root = document.documentElement;
  root.setAttribute("data-script-errors", "0");
  window.addEventListener("error", function () {
    root.setAttribute("data-script-errors", String(Number(root.getAttribute("data-script-errors")) + 1));
  });
  window.addEventListener("load", function () {
    var drawn = 0;
    document.querySelectorAll("figure svg").forEach(function (s) {
      var b = s.getBBox();
      if (b.width > 0 && b.height > 0) { drawn += 1; }
    });
    root.setAttribute("data-figures-drawn", String(drawn));
    root.setAttribute("data-loaded", "yes");
  });
})();
"#;

/// A cell of a JSON row: numbers with four significant digits (integers as they are),
/// null as an em dash (no value: infinite sigma or undefined slope).
fn cell(v: &Value) -> (String, bool) {
    match v {
        Value::Number(n) if n.is_f64() => (
            n.as_f64().map_or_else(String::new, |x| format_sig(x, 4)),
            false,
        ),
        Value::Number(n) => (n.to_string(), false),
        Value::Null => ("—".into(), false),
        Value::String(s) => (s.clone(), true),
        Value::Bool(b) => (b.to_string(), true),
        other => (other.to_string(), true),
    }
}

/// Keys shown first, in this order, when a table has them: what a row is about, then
/// where on the grid; every other key follows in the order met.
const LEADING: [&str; 23] = [
    "folder",
    "experiment",
    "cmb_fields",
    "fields",
    "survey",
    "probe",
    "kind",
    "source",
    "shape",
    "z_min",
    "z_max",
    "z_eff",
    "lmax",
    "lmax_t_used",
    "lmax_e_used",
    "kmax_h_mpc",
    "kmax_used_h_mpc",
    "squeezed_share",
    "equilateral_share",
    "flattened_share",
    "sn2_per_fnl2",
    "sn2_per_fnl2_engine",
    "cell_sum_over_engine",
];

/// An HTML table of an array of JSON objects, skipping `skip` keys.
pub fn json_table(rows: &[Value], skip: &[&str]) -> String {
    let mut cols: Vec<String> = Vec::new();
    for r in rows {
        if let Value::Object(m) = r {
            for k in m.keys() {
                if !skip.contains(&k.as_str()) && !cols.contains(k) {
                    cols.push(k.clone());
                }
            }
        }
    }
    let rank = |c: &String| LEADING.iter().position(|l| l == c).unwrap_or(LEADING.len());
    cols.sort_by_key(rank);
    let texty: Vec<bool> = cols
        .iter()
        .map(|c| rows.iter().any(|r| r.get(c).is_some_and(Value::is_string)))
        .collect();
    if rows.is_empty() {
        return "<p class=\"note\">(none)</p>\n".into();
    }
    let mut s = String::from("<table>\n<thead><tr>");
    for (c, t) in cols.iter().zip(&texty) {
        let class = if *t { " class=\"t\"" } else { "" };
        s.push_str(&format!("<th{class}>{}</th>", esc(c)));
    }
    s.push_str("</tr></thead>\n<tbody>\n");
    for r in rows {
        s.push_str("<tr>");
        for c in &cols {
            let (text, is_text) = cell(r.get(c).unwrap_or(&Value::Null));
            if is_text {
                s.push_str(&format!("<td class=\"t\">{}</td>", esc(&text)));
            } else {
                s.push_str(&format!("<td>{}</td>", esc(&text)));
            }
        }
        s.push_str("</tr>\n");
    }
    s.push_str("</tbody>\n</table>\n");
    s
}

/// A long table folded into a `<details>` element (open when short).
fn folded(table: &str, rows: usize) -> String {
    let open = if rows <= 24 { " open" } else { "" };
    format!("<details{open}><summary>{rows} rows</summary>\n{table}</details>\n")
}

fn head(title: &str) -> String {
    format!(
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n<title>{}</title>\n<style>{STYLE}</style>\n<script>{SCRIPT}</script>\n</head>\n<body>\n",
        esc(title)
    )
}

fn array<'a>(v: &'a Value, key: &str) -> &'a [Value] {
    v.get(key)
        .and_then(Value::as_array)
        .map_or(&[], Vec::as_slice)
}

/// The caveats that apply to this run.
fn caveats(r: &RunResult, summary: &Value) -> Vec<String> {
    let sc = &r.scenario;
    let mut v = Vec::new();
    if !r.cmb.is_empty() {
        let spectra = match sc.cmb_spectra {
            crate::cmb::lensing::CovarianceSpectra::Lensed if sc.delensing > 0.0 => format!(
                "lensed spectra in the covariance with {}% of the lensing-potential power removed",
                crate::report::format_sig(100.0 * sc.delensing, 3)
            ),
            crate::cmb::lensing::CovarianceSpectra::Lensed => {
                "lensed spectra in the covariance".to_string()
            }
            crate::cmb::lensing::CovarianceSpectra::Unlensed => {
                "unlensed spectra in the covariance (optimistic at high l)".to_string()
            }
        };
        v.push(format!("CMB: {spectra}; Gaussian bispectrum covariance; the ISW-lensing bias of f_NL (lensing_bias) is reported beside sigma, not subtracted; foregrounds and masks enter only through f_sky."));
        v.push("Each CMB field stops at the experiment's own l_max: grid values above it repeat the capped result.".into());
        v.push(format!(
            "CMB information by configuration: summed over cells of multipoles at l_max = {} (at most {}); the table's cell_sum_over_engine column gives its agreement with the Fisher engine.",
            r.cmb
                .iter()
                .find_map(|c| c.config_budget.as_ref().map(|b| b.lmax))
                .unwrap_or(0),
            crate::cmb::config_budget::BUDGET_LMAX
        ));
    }
    for s in &r.surveys {
        v.push(format!(
            "{}: tree-level bispectrum; {}; the bispectrum uses the first tracer of each bin.",
            s.survey.name,
            s.survey.covariance.describe()
        ));
    }
    if !r.surveys.is_empty() {
        v.push("Survey information by triangle class: from the Gaussian covariance with the nuisances fixed (with the realistic covariance and marginalized nuisances the information does not split by triangle).".into());
    }
    if r.surveys.iter().any(|s| s.survey.real_space) {
        v.push("At least one survey is in real space (no redshift-space distortions).".into());
    }
    for c in array(summary, "crossover") {
        if c["below_grid"] == Value::Bool(true) {
            v.push(format!(
                "Crossover {} vs {} ({}, {}): already below the CMB at the first k_max of the grid; the true crossover is at or below it (extend the grid downward to find it).",
                c["survey"].as_str().unwrap_or(""),
                c["experiment"].as_str().unwrap_or(""),
                c["probe"].as_str().unwrap_or(""),
                c["shape"].as_str().unwrap_or("")
            ));
        }
    }
    if sc.lmax.len() < 2 {
        v.push("A single l_max: log slopes are undefined (null).".into());
    }
    v
}

const METHODS: &str = "We forecast the constraints on the amplitude f_NL of each primordial bispectrum shape \
(local, equilateral, orthogonal and squeezed-index templates; Creminelli et al. 2006; Senatore, Smith & \
Zaldarriaga 2010), in the CMB convention, with Fisher matrices. For the CMB we sum the reduced bispectrum \
over all multipole triplets up to l_max with the full Gaunt-factor weight and the temperature and E-mode \
covariance per multipole (Komatsu & Spergel 2001; Babich & Zaldarriaga 2004; Yadav, Komatsu & Wandelt \
2007), evaluated by a Gauss-Legendre quadrature in the angle and blocked products over multipoles (Smith & \
Zaldarriaga 2006), from line-of-sight transfer functions; instrumental noise follows Knox (1995). For the \
galaxy survey we combine the power spectrum, through the scale-dependent bias of Dalal et al. (2008) and \
Slosar et al. (2008), with the tree-level galaxy bispectrum in redshift space with Gaussian covariance \
(Scoccimarro, Sefusatti & Zaldarriaga 2004; Sefusatti et al. 2006), per redshift bin, marginalizing the \
bias and shot-noise nuisances per bin; the power-spectrum Fisher information follows Tegmark (1997). With \
the realistic covariance model we add a theoretical-error envelope for the tree-level models (Baldauf et \
al. 2016) and the leading power spectrum-bispectrum cross-covariance. The CMB and survey Fisher matrices \
add. We split the bispectrum information by triangle configuration (squeezed, equilateral, flattened: the \
nearest corner of the plane of side ratios) per multipole or wavenumber triplet. The fiducial cosmology is Planck 2018 base LCDM (Planck Collaboration \
VI 2020).";

/// The run's page. `written` lists the files of the run folder, so that each figure links
/// the table file that exists (the tau_NL figure tables are CSV in either table format).
pub fn run_page(
    r: &RunResult,
    summary: &Value,
    svgs: &[(String, String, String)],
    tables: TableFormat,
    written: &[String],
) -> String {
    let sc = &r.scenario;
    let mut s = head(&format!("ngreach: {}", sc.name));
    s.push_str(&format!(
        "<h1>{}</h1>\n<p class=\"note\">ngreach {} · sigma(f_NL) in the CMB convention · k in h/Mpc</p>\n",
        esc(&sc.name),
        esc(crate::VERSION)
    ));
    s.push_str("<nav><a href=\"#headline\">Headline</a><a href=\"#crossover\">Crossover</a><a href=\"#figures\">Figures</a><a href=\"#bins\">Per bin</a><a href=\"#information\">Information</a><a href=\"#inputs\">Inputs</a><a href=\"#methods\">Methods</a></nav>\n");
    s.push_str("<h2 id=\"headline\">Headline</h2>\n<p class=\"note\">sigma_cmb, sigma_survey, sigma_joint: single-shape (the other f_NL fixed, nuisances marginalized); the *_marginal columns: marginalized over the other shapes. CMB (T+E) at the largest l_max, surveys at the largest k_max; joint = CMB + survey Fisher matrices; improvement = best single probe / joint.</p>\n");
    s.push_str(&json_table(array(summary, "rows"), &[]));
    s.push_str("<h2 id=\"crossover\">Crossover</h2>\n<p class=\"note\">The k_max at which the survey's single-shape sigma (other f_NL fixed, nuisances marginalized) falls below the CMB's (T+E at the experiment's l_max): kmax_h_mpc, below_grid; the same on sigmas marginalized over the other shapes: kmax_marginal_h_mpc, below_grid_marginal; null: not reached on the grid; below_grid: already below at the first grid point (a bound, not a found point).</p>\n");
    s.push_str(&json_table(array(summary, "crossover"), &[]));
    s.push_str("<h2 id=\"figures\">Figures</h2>\n");
    for (stem, svg, desc) in svgs {
        let numbers = [
            format!("{stem}.{}", tables.extension()),
            format!("{stem}.csv"),
        ]
        .into_iter()
        .find(|f| written.contains(f))
        .map_or(String::new(), |f| {
            format!("numbers: <a href=\"{}\">{}</a>; ", attr(&f), esc(&f))
        });
        s.push_str(&format!(
            "<figure id=\"{}\">\n{}\n<figcaption><b>{}</b>: {} ({}<a href=\"{}\">PNG</a>)</figcaption>\n</figure>\n",
            attr(stem),
            inline_svg(svg),
            esc(stem),
            esc(desc),
            numbers,
            attr(&format!("{stem}.png"))
        ));
    }
    s.push_str("<h2 id=\"bins\">Per redshift bin</h2>\n");
    for sv in &r.surveys {
        let rows: Vec<Value> = array(summary, "per_bin")
            .iter()
            .filter(|x| x["survey"] == Value::String(sv.survey.name.clone()))
            .cloned()
            .collect();
        s.push_str(&format!("<h3>{}</h3>\n", esc(&sv.survey.name)));
        s.push_str(&folded(&json_table(&rows, &["survey"]), rows.len()));
    }
    s.push_str("<h2 id=\"information\">Information budgets</h2>\n");
    for t in array(summary, "information") {
        s.push_str(&format!(
            "<h3>{}</h3>\n<p class=\"note\">{}</p>\n",
            esc(t["table"].as_str().unwrap_or("")),
            esc(t["description"].as_str().unwrap_or(""))
        ));
        let rows = array(t, "rows");
        s.push_str(&folded(&json_table(rows, &[]), rows.len()));
    }
    s.push_str("<h2 id=\"inputs\">Resolved inputs</h2>\n<details><summary>inputs (as in summary.json)</summary>\n<pre>");
    s.push_str(&esc(
        &serde_json::to_string_pretty(&summary["inputs"]).unwrap_or_default()
    ));
    s.push_str("</pre></details>\n");
    s.push_str(&format!(
        "<h2>Versions</h2>\n<table><tbody><tr><td class=\"t\">ngreach</td><td class=\"t\">{}</td></tr><tr><td class=\"t\">CMB transfer</td><td class=\"t\">{}</td></tr><tr><td class=\"t\">survey linear power</td><td class=\"t\">{}</td></tr></tbody></table>\n",
        esc(crate::VERSION),
        esc(&compact(&r.transfer)),
        esc(&compact(&r.linear_power))
    ));
    s.push_str("<h2>Caveats</h2>\n<ul>\n");
    for c in caveats(r, summary) {
        s.push_str(&format!("<li>{}</li>\n", esc(&c)));
    }
    for u in array(summary, "units") {
        if let Some(t) = u.as_str() {
            s.push_str(&format!("<li>{}</li>\n", esc(t)));
        }
    }
    s.push_str("</ul>\n");
    s.push_str(&format!(
        "<h2 id=\"methods\">Methods (to paste)</h2>\n<p>{}</p>\n",
        esc(METHODS)
    ));
    s.push_str("<p class=\"note\">Files beside this page: summary.json (every number), tables.json (table descriptions and units), fisher/ (Fisher matrices as .npy with fisher/index.json), table.tex.</p>\n");
    s.push_str("</body>\n</html>\n");
    s
}

fn compact(v: &Value) -> String {
    match v {
        Value::Null => "—".into(),
        other => other.to_string(),
    }
}

/// An SVG document as an inline element: drops any XML declaration (the SVG backend
/// writes none today).
fn inline_svg(svg: &str) -> &str {
    let t = svg.trim_start();
    match t.strip_prefix("<?xml") {
        Some(rest) => rest.find("?>").map_or(t, |i| rest[i + 2..].trim_start()),
        None => t,
    }
}

/// The batch's page: the combined table and links to each scenario's page.
pub fn batch_page(name: &str, rows: &[Value], folders: &[String]) -> String {
    let mut s = head(&format!("ngreach batch: {name}"));
    s.push_str(&format!(
        "<h1>Batch: {}</h1>\n<p class=\"note\">ngreach {} · one row per scenario, experiment, survey, probe, shape, l_max and k_max; sigma(f_NL) single-shape unless the column says marginal, CMB convention; k in h/Mpc</p>\n",
        esc(name),
        esc(crate::VERSION)
    ));
    s.push_str("<h2>Scenarios</h2>\n<ul>\n");
    for f in folders {
        s.push_str(&format!(
            "<li><a href=\"{}\">{}</a></li>\n",
            attr(&format!("{f}/report.html")),
            esc(f)
        ));
    }
    s.push_str("</ul>\n<h2>Combined table</h2>\n");
    s.push_str(&json_table(rows, &[]));
    s.push_str("</body>\n</html>\n");
    s
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    #[test]
    fn tables_escape_and_keep_columns() {
        let rows = vec![
            json!({"shape": "<local>", "sigma": 5.0, "lmax": 3000}),
            json!({"shape": "a&b", "sigma": null, "extra": 0.123456}),
        ];
        let t = json_table(&rows, &[]);
        assert!(t.contains("&lt;local&gt;") && t.contains("a&amp;b"));
        assert!(t.contains("<th>extra</th>") && t.contains("5.000") && t.contains("0.1235"));
        assert!(t.contains("<td>3000</td>") && t.contains("—"));
    }

    #[test]
    fn page_has_no_network_resources() {
        let p = batch_page("x", &[json!({"a": 1})], &["s0000".into()]);
        assert!(!p.contains("http://") && !p.contains("https://") && !p.contains("src="));
        assert!(p.starts_with("<!DOCTYPE html>") && p.ends_with("</html>\n"));
    }
}
