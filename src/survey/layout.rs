//! The parameter layout of one redshift bin: the f_NL of each shape, then per tracer b1
//! and the P shot-noise amplitude, then b2, b_s2 and the two B shot-noise amplitudes of
//! the bispectrum tracer (the first one): of the 1/nbar^2 term and of the P_i/nbar term.

/// Parameter layout of one bin.
#[derive(Debug, Clone, Copy)]
pub struct Layout {
    /// Number of shapes (f_NL parameters first).
    pub n_shapes: usize,
    /// Number of tracers.
    pub n_tracers: usize,
}

impl Layout {
    /// Number of parameters.
    pub fn n(&self) -> usize {
        self.n_shapes + 2 * self.n_tracers + 4
    }
    /// Index of b1 of tracer t.
    pub fn b1(&self, t: usize) -> usize {
        self.n_shapes + 2 * t
    }
    /// Index of the P shot-noise amplitude of tracer t.
    pub fn pshot(&self, t: usize) -> usize {
        self.n_shapes + 2 * t + 1
    }
    /// Index of b2.
    pub fn b2(&self) -> usize {
        self.n_shapes + 2 * self.n_tracers
    }
    /// Index of b_s2.
    pub fn bs2(&self) -> usize {
        self.b2() + 1
    }
    /// Index of the B shot-noise amplitude of the 1/nbar^2 term.
    pub fn bshot(&self) -> usize {
        self.b2() + 2
    }
    /// Index of the B shot-noise amplitude of the P_i/nbar term (a stochastic term of its
    /// own, not tied to the P shot-noise amplitude).
    pub fn bshot_p(&self) -> usize {
        self.b2() + 3
    }
    /// Parameter names.
    pub fn names(&self, shapes: &[String], tracer_names: &[String]) -> Vec<String> {
        let mut v: Vec<String> = shapes.iter().map(|s| format!("fnl_{s}")).collect();
        for t in tracer_names {
            v.push(format!("b1[{t}]"));
            v.push(format!("pshot[{t}]"));
        }
        v.push("b2".into());
        v.push("bs2".into());
        v.push("bshot".into());
        v.push("bshot_p".into());
        v
    }
}
