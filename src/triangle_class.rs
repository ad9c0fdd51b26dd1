//! Triangle configuration classes of a bispectrum (galaxy wavenumbers or CMB
//! multipoles) and the share of an information sum by class.
//!
//! A triangle with sides sorted s1 <= s2 <= s3 is the point (x, y) = (s1/s3, s2/s3) of the
//! triangle plane (x <= y <= 1, x + y >= 1). Its class is the nearest of the plane's three
//! corners: squeezed (0, 1), equilateral (1, 1), flattened (1/2, 1/2). The boundaries are
//! the perpendicular bisectors: squeezed/equilateral x = 1/2, squeezed/flattened
//! y = x + 1/2, equilateral/flattened x + y = 3/2. So: squeezed when x <= 1/2 and
//! y >= x + 1/2; equilateral when x > 1/2 and x + y > 3/2; flattened otherwise.

/// A triangle configuration class.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum TriangleClass {
    /// One side much shorter than the other two.
    Squeezed,
    /// Three nearly equal sides.
    Equilateral,
    /// The two shorter sides nearly add up to the longest.
    Flattened,
}

impl TriangleClass {
    /// The class of a triangle with sides (a, b, c) in any order and unit (wavenumbers or
    /// multipoles): the corner of the (k1/k3, k2/k3) plane nearest to the triangle.
    pub fn of(a: f64, b: f64, c: f64) -> TriangleClass {
        let mut s = [a, b, c];
        s.sort_by(f64::total_cmp);
        let (x, y) = (s[0] / s[2], s[1] / s[2]);
        let d = |cx: f64, cy: f64| (x - cx).powi(2) + (y - cy).powi(2);
        let (sq, eq, fl) = (d(0.0, 1.0), d(1.0, 1.0), d(0.5, 0.5));
        if sq <= eq && sq <= fl {
            TriangleClass::Squeezed
        } else if eq <= fl {
            TriangleClass::Equilateral
        } else {
            TriangleClass::Flattened
        }
    }

    /// Lower-case name.
    pub fn name(self) -> &'static str {
        match self {
            TriangleClass::Squeezed => "squeezed",
            TriangleClass::Equilateral => "equilateral",
            TriangleClass::Flattened => "flattened",
        }
    }
}

/// Shares of the information by triangle class.
#[derive(Debug, Clone, Copy, PartialEq, Default, serde::Serialize)]
pub struct ClassBudget {
    /// Share from squeezed triangles.
    pub squeezed: f64,
    /// Share from equilateral triangles.
    pub equilateral: f64,
    /// Share from flattened triangles.
    pub flattened: f64,
    /// The total information summed.
    pub total: f64,
}

/// The share of the information by triangle class from per-triangle contributions
/// ((side lengths), Fisher information of that triangle).
pub fn triangle_class_budget(
    contributions: impl IntoIterator<Item = ([f64; 3], f64)>,
) -> ClassBudget {
    let mut b = ClassBudget::default();
    for ([a, bb, c], f) in contributions {
        match TriangleClass::of(a, bb, c) {
            TriangleClass::Squeezed => b.squeezed += f,
            TriangleClass::Equilateral => b.equilateral += f,
            TriangleClass::Flattened => b.flattened += f,
        }
        b.total += f;
    }
    if b.total > 0.0 {
        b.squeezed /= b.total;
        b.equilateral /= b.total;
        b.flattened /= b.total;
    }
    b
}

/// Cells per axis of the plane histogram ([`PlaneDensity`]) for a sum over every
/// triplet (CMB multipole cells).
pub const PLANE_CELLS: usize = 20;

/// Cells per axis for a sum over quadrature nodes (the survey's triangle rule): coarser,
/// so that every cell of the region holds nodes.
pub const PLANE_CELLS_COARSE: usize = 10;

/// Information on the triangle plane: a cells x cells histogram over x in [0, 1] (s1/s3)
/// and y in [1/2, 1] (s2/s3) of the share of the total information per cell.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct PlaneDensity {
    /// Cells per axis.
    pub cells: usize,
    /// share[iy * cells + ix]; the shares add up to one.
    pub share: Vec<f64>,
}

/// The cell (iy * cells + ix) of a triangle with sides in any order.
pub fn plane_cell(k: [f64; 3], cells: usize) -> usize {
    let n = cells.max(1);
    let (x, y) = plane_point(k);
    let ix = ((x * n as f64) as usize).min(n - 1);
    let iy = (((y - 0.5) * 2.0 * n as f64).max(0.0) as usize).min(n - 1);
    iy * n + ix
}

impl PlaneDensity {
    /// The histogram of per-triangle contributions ((sides), information) on
    /// [`PLANE_CELLS`] cells per axis.
    pub fn of(contributions: impl IntoIterator<Item = ([f64; 3], f64)>) -> Self {
        let n = PLANE_CELLS;
        let mut share = vec![0.0; n * n];
        let mut tot = 0.0;
        for (k, f) in contributions {
            share[plane_cell(k, n)] += f;
            tot += f;
        }
        if tot > 0.0 {
            share.iter_mut().for_each(|v| *v /= tot);
        }
        Self { cells: n, share }
    }
}

/// The point (s1/s3, s2/s3) of a triangle with sides in any order.
pub fn plane_point(k: [f64; 3]) -> (f64, f64) {
    let mut s = k;
    s.sort_by(f64::total_cmp);
    (s[0] / s[2], s[1] / s[2])
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn triangle_classes_by_nearest_corner() {
        assert_eq!(TriangleClass::of(1.0, 1.0, 1.0), TriangleClass::Equilateral);
        assert_eq!(TriangleClass::of(0.05, 1.0, 1.0), TriangleClass::Squeezed);
        assert_eq!(TriangleClass::of(1.0, 0.5, 0.5), TriangleClass::Flattened);
        assert_eq!(TriangleClass::of(2.0, 1.9, 0.2), TriangleClass::Squeezed);
    }

    #[test]
    fn class_budget_shares_sum_to_one() {
        let b = triangle_class_budget([
            ([1.0, 1.0, 1.0], 2.0),
            ([0.1, 1.0, 1.0], 1.0),
            ([0.5, 0.5, 1.0], 1.0),
        ]);
        assert!((b.equilateral - 0.5).abs() < 1e-15);
        assert!((b.squeezed - 0.25).abs() < 1e-15 && (b.flattened - 0.25).abs() < 1e-15);
        assert_eq!(b.total, 4.0);
    }

    #[test]
    fn plane_density_adds_up_and_places_corners() {
        let d = PlaneDensity::of([([1.0, 1.0, 1.0], 1.0), ([0.01, 1.0, 1.0], 3.0)]);
        let n = PLANE_CELLS;
        assert!((d.share.iter().sum::<f64>() - 1.0).abs() < 1e-15);
        assert_eq!(d.share[(n - 1) * n + (n - 1)], 0.25);
        assert_eq!(d.share[(n - 1) * n], 0.75);
    }
}
