//! Non-bispectrum parameters accepted in a shape list: `tau_nl`, the amplitude of the
//! collapsed trispectrum (convention of Suyama & Yamaguchi 2008: tau_NL = (6 f_NL / 5)^2
//! for a single local source; see [`crate::cmb::collapsed`]). It is not a bispectrum
//! [`crate::shapes::Shape`]: lists are split into the f_NL shapes and this switch.

/// The name of the collapsed-trispectrum amplitude in shape lists and output rows.
pub const TAU_NL: &str = "tau_nl";

/// True when `text` names tau_NL (ASCII case and surrounding blanks ignored).
pub fn is_tau_nl(text: &str) -> bool {
    text.trim().eq_ignore_ascii_case(TAU_NL)
}

/// True when a shape list asks for tau_NL.
pub fn lists_tau_nl<S: AsRef<str>>(list: &[S]) -> bool {
    list.iter().any(|s| is_tau_nl(s.as_ref()))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn recognizes_tau_nl_only() {
        assert!(is_tau_nl(" TAU_NL "));
        assert!(!is_tau_nl("local"));
        assert!(lists_tau_nl(&["local", "tau_nl"]));
        assert!(!lists_tau_nl(&["local", "equilateral"]));
    }
}
