//! The ISW-lensing bias of f_NL in the outputs of `ngreach run`: one table per CMB
//! experiment (every field set, l_max and shape), a terminal block and a LaTeX table.
//! The numbers come from [`crate::cmb::lensing::bias`]; the sign convention is
//! [`BIAS_NOTE`].

use crate::cmb::lensing::bias::BIAS_NOTE;
use crate::pipeline::{CmbResult, RunResult};
use crate::report::artifacts::{Artifact, cmb_reference_set, own_lmax};
use crate::report::format_sig;
use crate::report::outputs::slug;
use crate::report::table::{Column, Table};

/// (field set index, grid index) of the reference row of an experiment: T+E (or the
/// richest set) at the largest grid value its fields reach.
fn reference_point(c: &CmbResult) -> (usize, usize) {
    let fs = cmb_reference_set(&c.forecast.field_sets);
    let top = own_lmax(c, c.forecast.field_sets[fs]);
    let m = c.forecast.lmax.iter().rposition(|&l| l <= top).unwrap_or(0);
    (fs, m)
}

/// One table per experiment with a computed bias: `lensing_bias_<experiment>`.
pub fn bias_tables(r: &RunResult) -> Vec<Artifact> {
    let sc = &r.scenario;
    let mut out = Vec::new();
    for c in &r.cmb {
        let Some(b) = &c.lensing else { continue };
        let mut t = Table::new(
            &format!("lensing_bias_{}", slug(&c.experiment.name)),
            &format!(
                "{}: bias of f_NL from the ISW-lensing bispectrum, per field set, l_max and shape",
                c.experiment.name
            ),
            vec![
                Column::new("fields", "CMB field set"),
                Column::new("lmax", "l_max (rows of a field set stop at its own l_max)"),
                Column::new("shape", "primordial shape"),
                Column::new(
                    "sigma_marginal",
                    "sigma(f_NL), marginalized over the other shapes (same covariance as the bias)",
                ),
                Column::new(
                    "lensing_bias",
                    "Delta f_NL (f_NL units, CMB convention), single-shape: F_ss^-1 F_s,lens",
                ),
                Column::new(
                    "lensing_bias_marginal",
                    "Delta f_NL (f_NL units, CMB convention), joint over the shapes of the run: (F^-1 F_lens)_s",
                ),
                Column::new(
                    "isw_lensing_sn",
                    "signal-to-noise of the ISW-lensing bispectrum itself, sqrt(F_lens,lens)",
                ),
            ],
        );
        t.notes.push(BIAS_NOTE.into());
        t.notes.push(b.description());
        for (ifs, &fs) in c.forecast.field_sets.iter().enumerate() {
            let top = own_lmax(c, fs);
            for (m, &l) in c.forecast.lmax.iter().enumerate() {
                if l > top {
                    continue;
                }
                let f = &c.forecast.fisher[ifs][m];
                let bias = b.bias(f, ifs, m);
                let marg = f.sigma_marginal_or_inf();
                for (is, shape) in sc.shapes.iter().enumerate() {
                    t.push(vec![
                        fs.label().into(),
                        l.into(),
                        shape.name().into(),
                        marg[is].into(),
                        bias.single[is].into(),
                        bias.joint[is].into(),
                        b.signal_to_noise(ifs, m).into(),
                    ]);
                }
            }
        }
        out.push(Artifact {
            table: t,
            figure: None,
        });
    }
    out
}

fn cell(x: f64) -> String {
    if x.is_finite() {
        format_sig(x, 3)
    } else {
        "-".into()
    }
}

/// The terminal block: per experiment, the reference field set at its largest l_max.
pub fn terminal_lines(r: &RunResult) -> String {
    let sc = &r.scenario;
    let mut out = String::new();
    for c in &r.cmb {
        let Some(b) = &c.lensing else { continue };
        let (fs, m) = reference_point(c);
        let f = &c.forecast.fisher[fs][m];
        let bias = b.bias(f, fs, m);
        if out.is_empty() {
            out.push_str(
                "\nISW-lensing bias of f_NL (f_NL units; single-shape, joint in brackets; positive mimics positive f_NL):\n",
            );
        }
        let parts: Vec<String> = sc
            .shapes
            .iter()
            .enumerate()
            .map(|(is, s)| {
                format!(
                    "{} {} ({})",
                    s.name(),
                    cell(bias.single[is]),
                    cell(bias.joint[is])
                )
            })
            .collect();
        out.push_str(&format!(
            "{} {} l_max {}: {}; ISW-lensing S/N {}\n",
            c.experiment.name,
            c.forecast.field_sets[fs].label(),
            c.forecast.lmax[m],
            parts.join(", "),
            cell(b.signal_to_noise(fs, m))
        ));
    }
    out
}

fn tex(s: &str) -> String {
    s.replace('_', "\\_")
        .replace('&', "\\&")
        .replace('%', "\\%")
}

/// The LaTeX table: shapes by experiment (reference field set at its largest l_max),
/// sigma and the single-shape bias.
pub fn latex_table(r: &RunResult) -> String {
    let sc = &r.scenario;
    let with: Vec<&CmbResult> = r.cmb.iter().filter(|c| c.lensing.is_some()).collect();
    if with.is_empty() {
        return String::new();
    }
    let mut t = String::from("\\begin{table}\n\\centering\n\\small\n");
    t.push_str("\\caption{CMB: marginalized $\\sigma(f_{\\rm NL})$ and the bias $\\Delta f_{\\rm NL}$ induced by the ISW-lensing bispectrum (single-shape, $F_{ss}^{-1} F_{s,{\\rm lens}}$; joint over the shapes in brackets), in the CMB convention (positive: mimics a positive $f_{\\rm NL}$), with the covariance of the forecast.}\n");
    t.push_str(&format!(
        "\\begin{{tabular}}{{l{}}}\n\\toprule\nShape",
        "rr".repeat(with.len())
    ));
    for c in &with {
        let (fs, m) = reference_point(c);
        t.push_str(&format!(
            " & \\multicolumn{{2}}{{c}}{{{} {} $\\ell_{{\\max}} = {}$}}",
            tex(&c.experiment.name),
            c.forecast.field_sets[fs].label(),
            c.forecast.lmax[m]
        ));
    }
    t.push_str(" \\\\\n");
    t.push_str(&" & $\\sigma$ & $\\Delta f_{\\rm NL}$".repeat(with.len()));
    t.push_str(" \\\\\n\\midrule\n");
    for (is, shape) in sc.shapes.iter().enumerate() {
        t.push_str(&tex(&shape.name()));
        for c in &with {
            let (fs, m) = reference_point(c);
            let f = &c.forecast.fisher[fs][m];
            let Some(b) = &c.lensing else { continue };
            let bias = b.bias(f, fs, m);
            t.push_str(&format!(
                " & {} & {} ({})",
                cell(f.sigma_marginal_or_inf()[is]),
                cell(bias.single[is]),
                cell(bias.joint[is])
            ));
        }
        t.push_str(" \\\\\n");
    }
    t.push_str("\\bottomrule\n\\end{tabular}\n\\end{table}\n\n");
    t
}
