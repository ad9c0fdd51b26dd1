//! `table.tex`: one booktabs table per survey (so each fits a page column or a page):
//! shapes by probe, single-shape sigma(f_NL) (other f_NL fixed, nuisances marginalized)
//! with the value marginalized over the other shapes in parentheses, for every CMB
//! experiment (T+E) and survey probe, and the crossover k_max of the survey's headline
//! probe against every experiment on the same two bases.

use crate::pipeline::RunResult;
use crate::report::artifacts::{cmb_reference_set, headline_probe, pidx};
use crate::report::format_sig;
use crate::report::outputs::crossovers;

/// The whole `table.tex` text.
pub fn latex_table(r: &RunResult) -> String {
    let sc = &r.scenario;
    let cross = crossovers(r);
    let kx = sc.kmax_h_mpc.last().copied().unwrap_or(f64::NAN);
    let head = headline_probe(&sc.probes);
    let mut t = format!(
        "% ngreach {} -- requires \\usepackage{{booktabs}}; one table per survey\n",
        crate::VERSION
    );
    for s in &r.surveys {
        let mut cols: Vec<String> = r
            .cmb
            .iter()
            .map(|c| {
                let fs = cmb_reference_set(&c.forecast.field_sets);
                format!(
                    "{} {}",
                    tex(&c.experiment.name),
                    c.forecast.field_sets[fs].label()
                )
            })
            .collect();
        cols.extend(sc.probes.iter().map(|p| p.label().to_string()));
        cols.extend(
            r.cmb
                .iter()
                .map(|c| format!("$k_\\times$ {}", tex(&c.experiment.name))),
        );
        t.push_str("\\begin{table}\n\\centering\n\\small\n");
        t.push_str(&format!(
            "\\caption{{{}: forecast single-shape $\\sigma(f_{{\\rm NL}})$ (CMB convention; other $f_{{\\rm NL}}$ fixed, survey nuisances marginalized), with the value marginalized over the other shapes in parentheses. CMB at $\\ell_{{\\max}} = {}$ (each field capped at the experiment's own $\\ell_{{\\max}}$); survey probes at $k_{{\\max}} = {}\\,h\\,{{\\rm Mpc}}^{{-1}}$ ({} covariance; {}). $k_\\times$: the $k_{{\\max}}$ [$h\\,{{\\rm Mpc}}^{{-1}}$] at which the survey's {} beats each experiment, single-shape (marginalized over the other shapes in parentheses).}}\n",
            tex(&s.survey.name),
            sc.lmax.last().copied().unwrap_or(0),
            format_sig(kx, 3),
            s.forecast.covariance.label(),
            if s.survey.kmax_scales_with_z() {
                "$k_{\\max}(z = 0)$, each bin capped at the tree-level limit"
            } else {
                "each bin capped at the tree-level limit"
            },
            head.map_or("--", |p| p.label()),
        ));
        t.push_str(&format!(
            "\\begin{{tabular}}{{l{}}}\n\\toprule\nShape & {} \\\\\n\\midrule\n",
            "r".repeat(cols.len()),
            cols.join(" & ")
        ));
        for (is, shape) in sc.shapes.iter().enumerate() {
            let mut cells = Vec::new();
            let pair = |f: &crate::fisher::FisherMatrix| {
                format!(
                    "{} ({})",
                    fmt_tex(f.sigma_conditional(is)),
                    fmt_tex(f.sigma_marginal_or_inf()[is])
                )
            };
            for c in &r.cmb {
                let fs = cmb_reference_set(&c.forecast.field_sets);
                cells.push(
                    c.forecast.fisher[fs]
                        .last()
                        .map_or_else(|| "--".into(), pair),
                );
            }
            for &p in &sc.probes {
                cells.push(
                    s.forecast
                        .total
                        .last()
                        .map_or_else(|| "--".into(), |t| pair(&t[pidx(p)])),
                );
            }
            let kcell = |x: Option<&crate::combine::Crossover>| match x
                .map(|x| (x.kmax_h_mpc, x.below_grid))
            {
                Some((Some(k), true)) => format!("$\\le {}$", format_sig(k, 2)),
                Some((Some(k), false)) => format_sig(k, 2),
                Some((None, _)) => format!("$> {}$", format_sig(kx, 2)),
                None => "--".into(),
            };
            for c in &r.cmb {
                let x = cross.iter().find(|x| {
                    x.experiment == c.experiment.name
                        && x.survey == s.survey.name
                        && x.shape == shape.name()
                        && Some(x.probe.as_str()) == head.map(|p| p.label())
                });
                cells.push(format!(
                    "{} ({})",
                    kcell(x.map(|x| &x.crossover)),
                    kcell(x.map(|x| &x.crossover_marginal))
                ));
            }
            t.push_str(&format!(
                "{} & {} \\\\\n",
                tex(&shape.name()),
                cells.join(" & ")
            ));
        }
        t.push_str("\\bottomrule\n\\end{tabular}\n\\end{table}\n\n");
    }
    t.push_str(&crate::report::lensing_outputs::latex_table(r));
    t
}

fn tex(s: &str) -> String {
    s.replace('_', "\\_")
        .replace('&', "\\&")
        .replace('%', "\\%")
}

/// Three significant digits, trailing zeros kept (4.80 next to 5.24).
fn fmt_tex(x: f64) -> String {
    if x.is_finite() {
        format_sig(x, 3)
    } else {
        "--".into()
    }
}
