//! The survey bispectrum information by triangle: the Gaussian-covariance Fisher
//! information of the bispectrum alone, with the nuisances held at their fiducial values,
//! split over groups of triangles (configuration class and cell of the triangle plane).
//!
//! With a Gaussian covariance the triangle bins are independent, so each triangle's part
//! of F_ii (single shape) is well defined; with the realistic covariance (theoretical
//! error, P-B cross-covariance) and after marginalizing nuisances the information does not
//! split by triangle, so the budget is stated for the Gaussian, unmarginalized case. It
//! sets up one redshift bin as the engine does ([`crate::survey::fisher`]) and runs the
//! engine's own bispectrum sum ([`BispectrumBin::cumulative`]) over each group of rows of
//! the engine's triangle quadrature; summed over groups it equals the engine's Gaussian,
//! unmarginalized bispectrum Fisher matrix.

use crate::cosmology::{Background, LinearPower};
use crate::survey::bispectrum::BispectrumBin;
use crate::survey::fisher::SurveySettings;
use crate::survey::kernels::{BispectrumModel, BispectrumTracer};
use crate::survey::layout::Layout;
use crate::survey::response::{ShapeInput, SigmaTable};
use crate::survey::spec::Survey;
use crate::survey::triangles::{TriPoint, TriRow, triangle_rows};
use crate::triangle_class::{
    ClassBudget, PLANE_CELLS_COARSE, PlaneDensity, TriangleClass, plane_cell,
};

/// The information of one group of triangles, summed over redshift bins.
#[derive(Debug, Clone, PartialEq)]
pub struct TriangleGroup {
    /// Configuration class.
    pub class: TriangleClass,
    /// Cell of the triangle plane ([`PLANE_CELLS_COARSE`] per axis).
    pub cell: usize,
    /// A representative point (x, y) of the group (information-weighted would need the
    /// signal; this is the cell centre).
    pub xy: (f64, f64),
    /// Per shape: the single-shape Gaussian bispectrum information F_ii of the group.
    pub info: Vec<f64>,
}

fn group_of(k: [f64; 3]) -> (TriangleClass, usize) {
    (
        TriangleClass::of(k[0], k[1], k[2]),
        plane_cell(k, PLANE_CELLS_COARSE),
    )
}

/// The Gaussian, unmarginalized bispectrum information per triangle group at one k_max
/// (1/Mpc, the survey's rule applied per bin as in the engine), summed over bins.
pub fn triangle_information(
    survey: &Survey,
    power: &LinearPower,
    bg: &Background,
    shapes: &[ShapeInput],
    kmax_mpc: f64,
    st: &SurveySettings,
) -> Vec<TriangleGroup> {
    let table = SigmaTable::new(power);
    let ns = shapes.len();
    let mut acc: Vec<(TriangleClass, usize, Vec<f64>)> = Vec::new();
    for (ib, bin) in survey.bins.iter().enumerate() {
        let z = bin.z_eff;
        let kf = 2.0 * std::f64::consts::PI / bin.volume_mpc3.cbrt();
        let kmin = survey.kmin_mpc.unwrap_or(kf);
        let kmax = survey.kmax_for_bin(kmax_mpc, bin, power).max(kmin);
        // As in the engine's bin setup (survey::fisher::bin_fisher).
        let (f, damp2) = crate::survey::fisher::redshift_space(survey, power, bg, z);
        let t0 = survey.tracers[0].bins[ib];
        let response =
            crate::survey::fisher::tracer_response(survey, &table, power, shapes, &t0, z);
        let lay = Layout {
            n_shapes: ns,
            n_tracers: survey.tracers.len(),
        };
        let dk = st.dk_over_kf * kf;
        let bctx = BispectrumBin {
            z,
            model: BispectrumModel {
                f,
                damp2,
                terms: st.terms,
            },
            tracer: BispectrumTracer {
                b1: t0.b1,
                b2: t0.b2,
                bs2: t0.bs2,
                bphi: response.b_phi,
                bphi_delta: response.b_phi_delta,
                inv_n: 1.0 / t0.nbar_mpc3,
            },
            response: &response,
            lay,
            shapes,
            power,
            theory: None,
            orient: (st.orient_mu, st.orient_phi),
            cells: (kmin, dk, 1, bin.volume_mpc3),
            parallel: st.parallel,
        };
        let rows = triangle_rows(&st.triangles, kmin, dk, kmax, &[kmax], bin.volume_mpc3);
        // Regroup the quadrature points by (class, plane cell), keeping each row's k_cum.
        let mut groups: Vec<((TriangleClass, usize), Vec<TriRow>)> = Vec::new();
        for row in &rows {
            let mut split: Vec<((TriangleClass, usize), Vec<TriPoint>)> = Vec::new();
            for p in &row.points {
                let g = group_of(p.k);
                match split.iter_mut().find(|(k, _)| *k == g) {
                    Some((_, v)) => v.push(*p),
                    None => split.push((g, vec![*p])),
                }
            }
            for (g, points) in split {
                let r = TriRow {
                    k_cum: row.k_cum,
                    points,
                };
                match groups.iter_mut().find(|(k, _)| *k == g) {
                    Some((_, v)) => v.push(r),
                    None => groups.push((g, vec![r])),
                }
            }
        }
        for ((class, cell), rs) in groups {
            let fm = bctx.cumulative(&rs, &[kmax], 1.0);
            let Some([fb, _]) = fm.into_iter().next() else {
                continue;
            };
            let n = lay.n();
            let info: Vec<f64> = (0..ns).map(|s| fb[s * n + s]).collect();
            match acc.iter_mut().find(|(c, ce, _)| *c == class && *ce == cell) {
                Some((_, _, v)) => v.iter_mut().zip(&info).for_each(|(a, b)| *a += b),
                None => acc.push((class, cell, info)),
            }
        }
    }
    let n = PLANE_CELLS_COARSE as f64;
    acc.into_iter()
        .map(|(class, cell, info)| TriangleGroup {
            class,
            cell,
            xy: (
                ((cell % PLANE_CELLS_COARSE) as f64 + 0.5) / n,
                0.5 + ((cell / PLANE_CELLS_COARSE) as f64 + 0.5) / (2.0 * n),
            ),
            info,
        })
        .collect()
}

/// The triangle-class budget of one survey.
#[derive(Debug, Clone, serde::Serialize)]
pub struct TriangleBudget {
    /// The k_max of the budget (the survey's largest), h/Mpc (the survey's k_max rule
    /// applies per bin).
    pub kmax_h_mpc: f64,
    /// Shape names.
    pub shapes: Vec<String>,
    /// Per shape: shares of the Gaussian, unmarginalized bispectrum F_ii by class.
    pub classes: Vec<ClassBudget>,
    /// Per shape: shares on the (k1/k3, k2/k3) plane.
    pub plane: Vec<PlaneDensity>,
}

/// [`triangle_information`] summarized by class and plane cell.
pub fn triangle_budget(
    survey: &Survey,
    power: &LinearPower,
    bg: &Background,
    shapes: &[ShapeInput],
    kmax_mpc: f64,
    st: &SurveySettings,
) -> TriangleBudget {
    let groups = triangle_information(survey, power, bg, shapes, kmax_mpc, st);
    let h = bg.cosmology().h();
    let n = PLANE_CELLS_COARSE;
    let mut classes = Vec::new();
    let mut plane = Vec::new();
    for s in 0..shapes.len() {
        let mut b = ClassBudget::default();
        let mut share = vec![0.0; n * n];
        for g in &groups {
            let f = g.info[s];
            match g.class {
                TriangleClass::Squeezed => b.squeezed += f,
                TriangleClass::Equilateral => b.equilateral += f,
                TriangleClass::Flattened => b.flattened += f,
            }
            b.total += f;
            share[g.cell] += f;
        }
        if b.total > 0.0 {
            b.squeezed /= b.total;
            b.equilateral /= b.total;
            b.flattened /= b.total;
            share.iter_mut().for_each(|v| *v /= b.total);
        }
        classes.push(b);
        plane.push(PlaneDensity { cells: n, share });
    }
    TriangleBudget {
        kmax_h_mpc: kmax_mpc / h,
        shapes: shapes.iter().map(|s| s.name.clone()).collect(),
        classes,
        plane,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cosmology::{Cosmology, Primordial};
    use crate::shapes::Shape;
    use crate::survey::CovarianceModel;
    use crate::survey::fisher::{Probe, survey_fisher};
    use crate::survey::spec::NuisanceSwitches;

    /// Summed over groups, the budget equals the engine's bispectrum F_ii with a Gaussian
    /// covariance and every nuisance fixed (one bin, redshift space, three shapes), and
    /// the local shape's information sits mostly in squeezed triangles.
    #[test]
    fn groups_add_up_to_the_engine() {
        let c = Cosmology::planck2018();
        let (bg, power, prim) = (
            Background::new(&c),
            LinearPower::eisenstein_hu(&c),
            Primordial::new(&c),
        );
        let shapes: Vec<ShapeInput> = [Shape::Local, Shape::Equilateral, Shape::Orthogonal]
            .into_iter()
            .map(|s| ShapeInput::new(s, prim))
            .collect();
        let mut sv = Survey::quick(2.0, 1.0, 5e-4, 2.0, false, 0.6736).unwrap();
        sv.covariance = CovarianceModel::Gaussian;
        sv.nuisance = NuisanceSwitches::all_fixed();
        let st = SurveySettings::default();
        let kmax = 0.12;
        let fc = survey_fisher(&sv, &power, &bg, &shapes, &[kmax], &st);
        let groups = triangle_information(&sv, &power, &bg, &shapes, kmax, &st);
        let ib = Probe::B as usize;
        for s in 0..3 {
            let sum: f64 = groups.iter().map(|g| g.info[s]).sum();
            let eng = fc.total[0][ib].get(s, s);
            assert!((sum / eng - 1.0).abs() < 1e-9, "shape {s}: {sum} vs {eng}");
        }
        let sq: f64 = groups
            .iter()
            .filter(|g| g.class == TriangleClass::Squeezed)
            .map(|g| g.info[0])
            .sum();
        let tot: f64 = groups.iter().map(|g| g.info[0]).sum();
        assert!(sq / tot > 0.5, "local squeezed share {}", sq / tot);
    }
}
