//! The terminal summary of `ngreach run`: per survey, shapes by probe at the largest grid
//! values, each shape on two lines (single-shape sigma, other f_NL fixed and nuisances
//! marginalized, the headline; then marginalized over the other shapes) with the
//! crossover k_max against each CMB experiment on the same basis, then the single-shape
//! sigma per redshift bin. Numbers carry three significant digits, trailing zeros
//! kept, so columns line up in precision.

use crate::pipeline::RunResult;
use crate::report::artifacts::{cmb_reference_set, headline_probe, pidx};
use crate::report::format_sig;
use crate::report::outputs::crossovers;

/// " (Halcyon: T 2500, E 2000; ...)" for the experiments of a run, or nothing.
fn own_lmax_note(r: &RunResult) -> String {
    let parts: Vec<String> = r
        .cmb
        .iter()
        .map(|c| {
            let grid = r.scenario.lmax.last().copied().unwrap_or(0);
            format!(
                "{}: T {}, E {}",
                c.experiment.name,
                c.experiment.lmax_t.min(grid),
                c.experiment.lmax_e.min(grid)
            )
        })
        .collect();
    if parts.is_empty() {
        String::new()
    } else {
        format!(" ({})", parts.join("; "))
    }
}

/// The compact terminal summary (fits 100 columns).
pub fn terminal_summary(r: &RunResult) -> String {
    let sc = &r.scenario;
    let cross = crossovers(r);
    let mut out = String::new();
    let kx = sc.kmax_h_mpc.last().copied().unwrap_or(f64::NAN);
    let head = headline_probe(&sc.probes);
    out.push_str(&format!("ngreach {}: {}\n", crate::VERSION, sc.name));
    out.push_str(&format!(
        "sigma(f_NL) per shape: first line single-shape (other f_NL fixed, nuisances marginalized),\n`marg.` line marginalized over the other shapes; k_x: survey {} beats the CMB (same basis)\nCMB: T+E at the largest grid l_max = {}, each field capped at its experiment's own l_max{}; surveys at k_max = {} h/Mpc (see each survey's line for its meaning and the per-bin table for each bin's value)\n",
        head.map_or("-", |p| p.label()),
        sc.lmax.last().copied().unwrap_or(0),
        own_lmax_note(r),
        format_sig(kx, 3)
    ));
    let short = |s: &str, n: usize| -> String {
        if s.chars().count() <= n {
            s.to_string()
        } else {
            let first = s.split_whitespace().next().unwrap_or(s);
            first.chars().take(n).collect()
        }
    };
    for s in &r.surveys {
        out.push_str(&format!(
            "\n{} (covariance: {}; k_max: {})\n",
            s.survey.name,
            s.forecast.covariance.label(),
            crate::commands::survey::kmax_meaning(&s.survey)
        ));
        for w in &s.forecast.warnings {
            out.push_str(&format!("warning: {w}\n"));
        }
        let mut header = format!("{:<12}", "shape");
        for c in &r.cmb {
            header.push_str(&format!("{:>10}", short(&c.experiment.name, 9)));
        }
        for p in &sc.probes {
            header.push_str(&format!("{:>8}", p.label()));
        }
        for c in &r.cmb {
            header.push_str(&format!(
                "  {:<17}",
                format!("k_x vs {}", short(&c.experiment.name, 9))
            ));
        }
        out.push_str(header.trim_end());
        out.push('\n');
        for (is, shape) in sc.shapes.iter().enumerate() {
            // Two lines per shape: single-shape sigma (the headline), then marginalized
            // over the other shapes; the crossover on the same basis in each line.
            for marginal in [false, true] {
                let pick = |f: &crate::fisher::FisherMatrix| {
                    if marginal {
                        f.sigma_marginal_or_inf()[is]
                    } else {
                        f.sigma_conditional(is)
                    }
                };
                let label = if marginal {
                    "  marg.".to_string()
                } else {
                    short(&shape.name(), 12)
                };
                let mut line = format!("{label:<12}");
                for c in &r.cmb {
                    let fs = cmb_reference_set(&c.forecast.field_sets);
                    line.push_str(&format!(
                        "{:>10}",
                        cell(c.forecast.fisher[fs].last().map_or(f64::NAN, pick))
                    ));
                }
                for &p in &sc.probes {
                    line.push_str(&format!(
                        "{:>8}",
                        cell(
                            s.forecast
                                .total
                                .last()
                                .map_or(f64::NAN, |t| pick(&t[pidx(p)]))
                        )
                    ));
                }
                for c in &r.cmb {
                    let x = cross
                        .iter()
                        .find(|x| {
                            x.experiment == c.experiment.name
                                && x.survey == s.survey.name
                                && x.shape == shape.name()
                                && Some(x.probe.as_str()) == head.map(|p| p.label())
                        })
                        .map(|x| {
                            if marginal {
                                &x.crossover_marginal
                            } else {
                                &x.crossover
                            }
                        });
                    let txt = match x.map(|x| (&x.kmax_h_mpc, x.below_grid)) {
                        Some((Some(k), false)) => format!("{} h/Mpc", format_sig(*k, 2)),
                        Some((Some(k), true)) => format!("<= {}", format_sig(*k, 2)),
                        Some((None, _)) => format!("> {}", format_sig(kx, 2)),
                        None => "-".into(),
                    };
                    line.push_str(&format!("  {txt:<17}"));
                }
                out.push_str(line.trim_end());
                out.push('\n');
            }
        }
        out.push_str(&per_bin_block(r, s));
    }
    out.push_str(&crate::report::tau_outputs::terminal_lines(r));
    out.push_str(&crate::report::lensing_outputs::terminal_lines(r));
    out
}

/// Single-shape sigma(f_NL) per redshift bin (headline probe, nuisances marginalized)
/// for one survey.
fn per_bin_block(r: &RunResult, s: &crate::pipeline::SurveyResult) -> String {
    let sc = &r.scenario;
    let (Some(ik), Some(p)) = (
        sc.kmax_h_mpc.len().checked_sub(1),
        headline_probe(&sc.probes),
    ) else {
        return String::new();
    };
    let h = sc.cosmology.h();
    let mut out = format!(
        "  per redshift bin ({}, single-shape, nuisances marginalized, each bin alone):\n",
        p.label()
    );
    let mut header = format!("  {:<13}{:>7}{:>12}", "z", "z_eff", "k_max used");
    for shape in &sc.shapes {
        let name: String = shape.name().chars().take(11).collect();
        header.push_str(&format!("{name:>12}"));
    }
    out.push_str(header.trim_end());
    out.push('\n');
    for b in &s.forecast.bins {
        let mut line = format!(
            "  {:<13}{:>7}{:>12}",
            format!("{:.2}-{:.2}", b.bin.z_min, b.bin.z_max),
            format!("{:.2}", b.bin.z_eff),
            format_sig(b.kmax_used_mpc[ik] / h, 3)
        );
        let f = &b.fisher[ik][pidx(p)];
        for is in 0..sc.shapes.len().min(f.len()) {
            line.push_str(&format!("{:>12}", cell(f.sigma_conditional(is))));
        }
        out.push_str(line.trim_end());
        out.push('\n');
    }
    out
}

fn cell(x: f64) -> String {
    if x.is_finite() {
        format_sig(x, 3)
    } else {
        "inf".into()
    }
}
