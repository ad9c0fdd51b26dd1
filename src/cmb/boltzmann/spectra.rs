//! Angular power spectra from transfer functions:
//! C^XY_l = (2/pi) Int k^2 dk P_Phi(k) Delta^X_l(k) Delta^Y_l(k) (dimensionless), at every
//! l from a [`TransferTable`], or at sampled l with a cubic spline in l of l(l+1) C_l.

use rayon::prelude::*;

use crate::cmb::transfer::{Field, TransferTable};
use crate::cosmology::Primordial;
use crate::numerics::CubicSpline;

/// Unlensed scalar spectra C_l^TT, C_l^EE, C_l^TE (dimensionless, Delta T / T), indexed
/// by l from 0 to lmax (l = 0, 1 are zero).
#[derive(Debug, Clone, PartialEq)]
pub struct Spectra {
    /// C_l^TT.
    pub tt: Vec<f64>,
    /// C_l^EE.
    pub ee: Vec<f64>,
    /// C_l^TE.
    pub te: Vec<f64>,
}

impl Spectra {
    /// Spectra of a table holding both T and E.
    ///
    /// # Panics
    /// If the table lacks T or E (tables built by the solver hold both).
    pub fn from_table(table: &TransferTable, prim: &Primordial) -> Self {
        let ft = table.field_index(Field::T).expect("table holds T");
        let fe = table.field_index(Field::E).expect("table holds E");
        // One pass over the table for all three spectra, in fixed blocks of k summed in
        // parallel and then added in block order (the same result on any thread count;
        // equal to `TransferTable::cl` up to the summation order).
        let n = table.lmax() + 1;
        let nk = table.k().len();
        let block = nk.div_ceil(64).max(1);
        let partial = |b: usize| -> [Vec<f64>; 3] {
            let mut acc = [vec![0.0; n], vec![0.0; n], vec![0.0; n]];
            for ik in b * block..((b + 1) * block).min(nk) {
                let k = table.k()[ik];
                let a = 2.0 / std::f64::consts::PI * table.weights()[ik] * k * k * prim.p_phi(k);
                let (rt, re) = (table.row(ft, ik), table.row(fe, ik));
                let [tt, ee, te] = &mut acc;
                for l in 0..n {
                    let (t, e) = (a * rt[l], a * re[l]);
                    tt[l] += t * rt[l];
                    ee[l] += e * re[l];
                    te[l] += t * re[l];
                }
            }
            acc
        };
        let parts: Vec<[Vec<f64>; 3]> = (0..nk.div_ceil(block))
            .into_par_iter()
            .map(partial)
            .collect();
        let mut sum = [vec![0.0; n], vec![0.0; n], vec![0.0; n]];
        for p in &parts {
            for (s, v) in sum.iter_mut().zip(p) {
                for (a, b) in s.iter_mut().zip(v) {
                    *a += b;
                }
            }
        }
        let [tt, ee, te] = sum;
        let mut s = Self { tt, ee, te };
        for v in [&mut s.tt, &mut s.ee, &mut s.te] {
            for x in v.iter_mut().take(2) {
                *x = 0.0;
            }
        }
        s
    }

    /// Highest l.
    pub fn lmax(&self) -> usize {
        self.tt.len().saturating_sub(1)
    }

    /// D_l = l(l+1) C_l / (2 pi) in microkelvin^2 for a CMB temperature in kelvin.
    pub fn d_l_uk2(c: &[f64], t_cmb_k: f64) -> Vec<f64> {
        let t2 = (t_cmb_k * 1e6).powi(2);
        c.iter()
            .enumerate()
            .map(|(l, &v)| (l * (l + 1)) as f64 * v / (2.0 * std::f64::consts::PI) * t2)
            .collect()
    }
}

/// Spectra at sampled multipoles (the cheap route to C_l), with interpolation to every l.
#[derive(Debug, Clone, PartialEq)]
pub struct SampledSpectra {
    /// The sampled l, increasing.
    pub l: Vec<usize>,
    /// C_l^TT at the sampled l.
    pub tt: Vec<f64>,
    /// C_l^EE.
    pub ee: Vec<f64>,
    /// C_l^TE.
    pub te: Vec<f64>,
}

impl SampledSpectra {
    /// Every l from 0 to the last sampled l, by natural cubic splines in l of l(l+1) C_l
    /// (exact at the sampled l; l = 0, 1 are zero).
    pub fn interpolate(&self) -> Spectra {
        let lmax = self.l.last().copied().unwrap_or(0);
        let x: Vec<f64> = self.l.iter().map(|&l| l as f64).collect();
        let go = |c: &[f64]| -> Vec<f64> {
            let mut out = vec![0.0; lmax + 1];
            if x.len() < 2 {
                for (&l, &v) in self.l.iter().zip(c) {
                    out[l] = v;
                }
                return out;
            }
            let d: Vec<f64> = self
                .l
                .iter()
                .zip(c)
                .map(|(&l, &v)| (l * (l + 1)) as f64 * v)
                .collect();
            let s = CubicSpline::new(x.clone(), d);
            for (l, o) in out.iter_mut().enumerate().skip(self.l[0]) {
                *o = s.eval(l as f64) / (l * (l + 1)) as f64;
            }
            out
        };
        Spectra {
            tt: go(&self.tt),
            ee: go(&self.ee),
            te: go(&self.te),
        }
    }
}

/// (2/pi) Int k^2 dk P_Phi X Y for l-major rows of sampled transfer functions.
pub(crate) fn sampled_cl(
    ks: &[f64],
    wk: &[f64],
    prim: &Primordial,
    x: &[f64],
    y: &[f64],
    nl: usize,
) -> Vec<f64> {
    let nk = ks.len();
    let pw: Vec<f64> = ks
        .iter()
        .zip(wk)
        .map(|(&k, &w)| 2.0 / std::f64::consts::PI * w * k * k * prim.p_phi(k))
        .collect();
    (0..nl)
        .map(|il| {
            let (rx, ry) = (&x[il * nk..(il + 1) * nk], &y[il * nk..(il + 1) * nk]);
            pw.iter()
                .zip(rx.iter().zip(ry))
                .map(|(p, (a, b))| p * a * b)
                .sum()
        })
        .collect()
}
