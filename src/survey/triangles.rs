//! Triangle quadrature for the bispectrum Fisher sum.
//!
//! The Fisher sum runs over triangle bins of width dk (a multiple of the fundamental mode
//! k_f) with k1 >= k2 >= k3; each bin holds V_123 / (s_123 k_f^3) = V k1 k2 k3 dk^3 /
//! (pi s_123) independent triangles per unit Var B normalization (Scoccimarro, Sefusatti
//! & Zaldarriaga 2004). Summed exactly, the cost grows as (k_max / k_f)^3.
//!
//! The quadrature here keeps the exact bin sum only where discreteness matters, for
//! triangles whose smallest side lies in the first `exact_bins` bins (the squeezed
//! triangles that carry the local-shape signal, ~k3^-4), and replaces the rest by the
//! continuum limit Sum_T -> Integral (V k1 k2 k3 / pi) dk1 dk2 dk3 over the ordered region
//! k3 <= k2 <= k1 <= k_max, k1 <= k2 + k3, k3 >= k_c (the 1/s_123 factors only weigh the
//! measure-zero diagonals). The continuum region is covered by Gauss-Legendre rules: k1 on
//! panels with an edge at every k_max, k3 on logarithmic panels below k1/2 (where the
//! squeezed signal rises) and a plain rule above, k2 on its interval. The cost grows as
//! (k_max / k_f) (the exact strip) plus a constant.
//!
//! Points come in rows that share the largest side, so that the Fisher sum can be cut at
//! every k_max of a grid.

/// One quadrature point: a triangle and the number of triangles it stands for (divided by
/// s_123).
#[derive(Debug, Clone, Copy)]
pub struct TriPoint {
    /// Sides k1 >= k2 >= k3, 1/Mpc.
    pub k: [f64; 3],
    /// Triangle count / s_123 (multiplies Sum_orientations g g / Prod P_t).
    pub weight: f64,
}

/// Points sharing a largest side: they enter the sum once k_max >= `k_cum`.
#[derive(Debug, Clone)]
pub struct TriRow {
    /// The largest side's upper bin edge (exact rows) or the upper edge of the k1 segment
    /// between two k_max values (continuum rows), 1/Mpc.
    pub k_cum: f64,
    /// The points.
    pub points: Vec<TriPoint>,
}

/// Quadrature settings.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct TriangleRule {
    /// Smallest-side bins summed exactly (None: every bin, the exact triangle sum).
    pub exact_bins: Option<usize>,
    /// Target width of the k1 panels, 1/Mpc.
    pub k1_panel_mpc: f64,
    /// Gauss-Legendre nodes per k1 panel.
    pub k1_nodes: usize,
    /// Ratio of the logarithmic k3 panels.
    pub k3_log_ratio: f64,
    /// Nodes per k3 panel (and per k3 rule above k1/2).
    pub k3_nodes: usize,
    /// Nodes in k2.
    pub k2_nodes: usize,
}

impl Default for TriangleRule {
    fn default() -> Self {
        Self {
            exact_bins: Some(5),
            k1_panel_mpc: 0.025,
            k1_nodes: 4,
            k3_log_ratio: 2.2,
            k3_nodes: 4,
            k2_nodes: 4,
        }
    }
}

/// The rows of the bispectrum sum for bins of width `dk` from `kmin` up to `k_top`, with
/// an edge at each of `breaks` (1/Mpc), in a volume (Mpc^3).
pub fn triangle_rows(
    rule: &TriangleRule,
    kmin: f64,
    dk: f64,
    k_top: f64,
    breaks: &[f64],
    volume: f64,
) -> Vec<TriRow> {
    let nk = ((k_top - kmin) / dk).floor().max(0.0) as usize;
    let n_exact = rule.exact_bins.unwrap_or(usize::MAX);
    let mut rows = exact_rows(kmin, dk, nk, n_exact, volume);
    if rule.exact_bins.is_some() {
        let k_c = kmin + n_exact as f64 * dk;
        // The continuum stops where the bins do: the last bin edge below each k_max.
        let snap = |k: f64| kmin + ((k - kmin) / dk * (1.0 + 1e-12)).floor().max(0.0) * dk;
        let top = snap(k_top);
        let snapped: Vec<f64> = breaks.iter().map(|&b| snap(b)).collect();
        if k_c < top {
            rows.extend(continuum_rows(rule, k_c, top, &snapped, volume));
        }
    }
    rows
}

/// Exact bin sum over triangles whose smallest-side bin index is below `n_exact`.
fn exact_rows(kmin: f64, dk: f64, nk: usize, n_exact: usize, volume: f64) -> Vec<TriRow> {
    let kc = |i: usize| kmin + (i as f64 + 0.5) * dk;
    (0..nk)
        .map(|i| {
            let k1 = kc(i);
            let mut points = Vec::new();
            for l in 0..=i.min(n_exact.saturating_sub(1)) {
                let k3 = kc(l);
                for j in l..=i {
                    let k2 = kc(j);
                    if k1 > k2 + k3 {
                        continue;
                    }
                    let s123 = if i == j && j == l {
                        6.0
                    } else if i == j || j == l {
                        2.0
                    } else {
                        1.0
                    };
                    points.push(TriPoint {
                        k: [k1, k2, k3],
                        weight: volume * k1 * k2 * k3 * dk * dk * dk
                            / (std::f64::consts::PI * s123),
                    });
                }
            }
            TriRow {
                k_cum: k1 + 0.5 * dk,
                points,
            }
        })
        .collect()
}

/// Gauss-Legendre nodes and weights on [a, b].
fn gl(n: usize, a: f64, b: f64) -> (Vec<f64>, Vec<f64>) {
    crate::numerics::GaussLegendre::new(n).mapped(a, b)
}

/// Continuum rows over the ordered region with k3 >= k_c and k1 <= k_top.
fn continuum_rows(
    rule: &TriangleRule,
    k_c: f64,
    k_top: f64,
    breaks: &[f64],
    volume: f64,
) -> Vec<TriRow> {
    let mut edges = vec![k_c];
    edges.extend(breaks.iter().copied().filter(|&b| b > k_c && b < k_top));
    edges.push(k_top);
    edges.sort_by(f64::total_cmp);
    edges.dedup_by(|a, b| (*a - *b).abs() <= 1e-12 * b.abs());
    let norm = volume / std::f64::consts::PI;
    let mut rows = Vec::new();
    for seg in edges.windows(2) {
        let (a, b) = (seg[0], seg[1]);
        let n_pan = ((b - a) / rule.k1_panel_mpc).ceil().max(1.0) as usize;
        let h = (b - a) / n_pan as f64;
        for ip in 0..n_pan {
            let (x1, w1) = gl(rule.k1_nodes, a + ip as f64 * h, a + (ip + 1) as f64 * h);
            for (&k1, &wk1) in x1.iter().zip(&w1) {
                let mut points = Vec::new();
                let half = 0.5 * k1;
                // Below k1/2: log panels in k3, k2 in [k1 - k3, k1].
                if half > k_c {
                    let n3 = ((half / k_c).ln() / rule.k3_log_ratio.ln()).ceil().max(1.0) as usize;
                    let dl = (half / k_c).ln() / n3 as f64;
                    for i3 in 0..n3 {
                        let lo = k_c.ln() + i3 as f64 * dl;
                        let (x3, w3) = gl(rule.k3_nodes, lo, lo + dl);
                        for (&l3, &wl3) in x3.iter().zip(&w3) {
                            let k3 = l3.exp();
                            let (x2, w2) = gl(rule.k2_nodes, k1 - k3, k1);
                            for (&k2, &wk2) in x2.iter().zip(&w2) {
                                points.push(TriPoint {
                                    k: [k1, k2, k3],
                                    weight: norm * k1 * k2 * k3 * wk1 * wl3 * k3 * wk2,
                                });
                            }
                        }
                    }
                }
                // Above k1/2: k3 in [max(k1/2, k_c), k1], k2 in [k3, k1].
                let lo3 = half.max(k_c);
                let n3b = rule.k3_nodes + 2;
                let (x3, w3) = gl(n3b, lo3, k1);
                for (&k3, &wk3) in x3.iter().zip(&w3) {
                    let (x2, w2) = gl(rule.k2_nodes, k3, k1);
                    for (&k2, &wk2) in x2.iter().zip(&w2) {
                        points.push(TriPoint {
                            k: [k1, k2, k3],
                            weight: norm * k1 * k2 * k3 * wk1 * wk3 * wk2,
                        });
                    }
                }
                // The row enters at the k_max of its segment (its upper edge).
                rows.push(TriRow { k_cum: b, points });
            }
        }
    }
    rows
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The quadrature counts triangles: the weights of a smooth integrand (here 1 / (k1 k2
    /// k3)^2, so that the count density is flat-ish) agree with the exact bin sum.
    #[test]
    fn quadrature_matches_exact_sum_of_a_smooth_function() {
        let (kmin, dk, top, vol) = (0.003, 0.003, 0.3, 1.0);
        let f = |k: &[f64; 3]| 1.0 / (k[0] * k[1] * k[2]).powf(1.5);
        let sum = |rows: &[TriRow]| -> f64 {
            rows.iter()
                .flat_map(|r| r.points.iter())
                .map(|p| p.weight * f(&p.k))
                .sum()
        };
        let exact = triangle_rows(
            &TriangleRule {
                exact_bins: None,
                ..TriangleRule::default()
            },
            kmin,
            dk,
            top,
            &[],
            vol,
        );
        let quick = triangle_rows(&TriangleRule::default(), kmin, dk, top, &[], vol);
        let (a, b) = (sum(&exact), sum(&quick));
        let n_exact: usize = exact.iter().map(|r| r.points.len()).sum();
        let n_quick: usize = quick.iter().map(|r| r.points.len()).sum();
        println!("exact {a} ({n_exact} points), quadrature {b} ({n_quick} points)");
        assert!((a / b - 1.0).abs() < 5e-3, "exact {a} quadrature {b}");
        assert!(n_quick * 5 < n_exact);
    }
}
