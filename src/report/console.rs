//! The terminal summary of `ngreach run`: per survey, shapes by probe (marginalized sigma
//! at the largest grid values) with the crossover k_max against each CMB experiment,
//! then sigma per redshift bin. Numbers carry three significant digits, trailing zeros
//! kept, so columns line up in precision.

use crate::pipeline::RunResult;
use crate::report::artifacts::{cmb_reference_set, headline_probe, pidx};
use crate::report::format_sig;
use crate::report::outputs::crossovers;

/// The compact terminal summary (fits 100 columns).
pub fn terminal_summary(r: &RunResult) -> String {
    let sc = &r.scenario;
    let cross = crossovers(r);
    let mut out = String::new();
    let kx = sc.kmax_h_mpc.last().copied().unwrap_or(f64::NAN);
    let head = headline_probe(&sc.probes);
    out.push_str(&format!("ngreach {}: {}\n", crate::VERSION, sc.name));
    out.push_str(&format!(
        "sigma(f_NL), marginalized over the other shapes; CMB: T+E at l_max = {}; surveys at k_max = {} h/Mpc (see each survey's line for its meaning and the per-bin table for each bin's value)\n",
        sc.lmax.last().copied().unwrap_or(0),
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
            let mut line = format!("{:<12}", short(&shape.name(), 12));
            for c in &r.cmb {
                let fs = cmb_reference_set(&c.forecast.field_sets);
                line.push_str(&format!(
                    "{:>10}",
                    cell(
                        c.forecast.fisher[fs]
                            .last()
                            .map_or(f64::NAN, |m| m.sigma_marginal_or_inf()[is])
                    )
                ));
            }
            for &p in &sc.probes {
                line.push_str(&format!(
                    "{:>8}",
                    cell(
                        s.forecast
                            .total
                            .last()
                            .map_or(f64::NAN, |t| t[pidx(p)].sigma_marginal_or_inf()[is])
                    )
                ));
            }
            for c in &r.cmb {
                let x = cross.iter().find(|x| {
                    x.experiment == c.experiment.name
                        && x.survey == s.survey.name
                        && x.shape == shape.name()
                        && Some(x.probe.as_str()) == head.map(|p| p.label())
                });
                let txt = match x.map(|x| (&x.crossover.kmax_h_mpc, x.crossover.below_grid)) {
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
        out.push_str(&per_bin_block(r, s));
    }
    out.push_str(&crate::report::tau_outputs::terminal_lines(r));
    out.push_str(&crate::report::lensing_outputs::terminal_lines(r));
    out
}

/// sigma(f_NL) per redshift bin (headline probe, marginalized) for one survey.
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
        "  per redshift bin ({}, marginalized, each bin alone):\n",
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
        let sig = b.fisher[ik][pidx(p)].sigma_marginal_or_inf();
        for v in sig.iter().take(sc.shapes.len()) {
            line.push_str(&format!("{:>12}", cell(*v)));
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
