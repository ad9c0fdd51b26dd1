//! On-disk cache of the radial functions X^{p,X}_l(r) of a [`BispectrumPlan`].
//!
//! The radial functions cost seconds at l_max = 3000 (160 radial nodes x 5000 k nodes x
//! every l), but they depend only on the transfer table, the primordial spectrum, the
//! exponents p of the shapes' separable terms, the radial nodes, l_max and the kernel's
//! own constants ([`K_TAPER`], the l_cut rule, [`XLANES`], [`RGROUP`]), not on the
//! experiment (noise, beam, f_sky, multipole ranges). A planner that scans many
//! experiments, or re-runs a scan, reads them from here. They are stored beside the transfer tables as
//! `radial-<key>.bin`, where the key is a 64-bit FNV-1a fingerprint of all those inputs
//! (the table through its k nodes, weights and a rotating every-16th multipole of every
//! row; the primordial spectrum, exponents and taper through the k weights c_e(k) they
//! produce) and [`RADIAL_VERSION`].
//!
//! File format (our own, little endian; the framing of [`crate::cmb::cache_file`]):
//!
//! ```text
//! offset  size  content
//! 0       8     magic "NGRRADL1"
//! 8       8     key (u64)
//! 16      8     payload length in bytes (u64)
//! 24      8     checksum of the payload (u64): FNV-1a over its 64-bit words
//! 32      ...   payload: n_exponents, n_fields, n_l, n_r (u64 each); then for every
//!               (exponent, field, l) in that order the radial range outside which X_l(r)
//!               is +0.0 (all bits zero), start and length (u32 each), and its values (f64 each)
//! ```
//!
//! Storing only each l's nonzero radial range keeps the file smaller where the low-r nodes
//! lie below every k r that reaches that l. A file that fails any check (magic, key,
//! length, checksum, sizes, ranges) is recomputed and replaced, never trusted, and the
//! status says why. Writes go to a temporary file in the same folder that is then renamed
//! over the target. Size at l_max = 3000 (full transfer, local + equilateral + orthogonal:
//! 4 exponents, T and E, 160 nodes): about 31 MB; the folder keeps at most
//! [`MAX_BYTES`] of radial files, least recently used removed first.

use std::path::{Path, PathBuf};

use super::CmbFisherInput;
use super::plan::{K_TAPER, PlanLayout, RGROUP, RadialFunctions, XLANES};
use crate::cmb::boltzmann::{CacheOptions, CacheStatus, Fnv1a};
use crate::cmb::cache_file::{prune_by_size, read_framed, write_framed};
use crate::cmb::transfer::Field;

const MAGIC: &[u8; 8] = b"NGRRADL1";
/// Bumped whenever the radial-function kernel changes what it computes.
const RADIAL_VERSION: u64 = 2;
/// The radial files in a cache folder are pruned to at most this many bytes (about 30
/// files at l_max = 3000), least recently used first; the file just written is kept.
const MAX_BYTES: u64 = 1_000_000_000;

/// The key of a radial-function request (see the module docs for what it covers).
pub(super) fn radial_key(inp: &CmbFisherInput<'_>, layout: &PlanLayout, coefs: &[Vec<f64>]) -> u64 {
    let tr = inp.transfer;
    let mut h = Fnv1a::new();
    h.bytes(b"ngreach radial functions");
    h.u64(RADIAL_VERSION);
    h.u64(K_TAPER.to_bits());
    h.u64(XLANES as u64);
    h.u64(RGROUP as u64);
    // The l_cut rule, sampled: a changed rule changes the key.
    for x in [0.5, 5.0, 50.0, 500.0, 5000.0] {
        h.u64(crate::special::bessel::l_cut(x) as u64);
    }
    h.u64(tr.lmax() as u64);
    h.u64(u64::from(tr.k_truncated()));
    for f in tr.fields() {
        h.u64(match f {
            Field::T => 0,
            Field::E => 1,
        });
    }
    h.u64(tr.k().len() as u64);
    for v in tr.k().iter().chain(tr.weights()) {
        h.u64(v.to_bits());
    }
    for f in 0..tr.fields().len() {
        for ik in 0..tr.k().len() {
            // Every 16th multipole, starting at a k-dependent offset so that every
            // multipole enters through some rows: enough to tell two tables apart.
            for v in tr.row(f, ik).iter().skip(ik % 16).step_by(16) {
                h.u64(v.to_bits());
            }
        }
    }
    // c_e(k) carries the primordial spectrum, the exponents and the taper.
    h.u64(layout.exponents.len() as u64);
    for p in &layout.exponents {
        h.u64(p.to_bits());
    }
    for c in coefs.iter().flatten() {
        h.u64(c.to_bits());
    }
    h.u64(inp.radial.r.len() as u64);
    for r in &inp.radial.r {
        h.u64(r.to_bits());
    }
    h.u64(layout.lmax as u64);
    h.finish()
}

fn file_of(dir: &Path, key: u64) -> PathBuf {
    dir.join(format!("radial-{key:016x}.bin"))
}

fn payload(x: &RadialFunctions, n_r: usize) -> Vec<u8> {
    let ne = x.len();
    let nf = x.first().map_or(0, Vec::len);
    let nl = if n_r == 0 {
        0
    } else {
        x.first()
            .and_then(|v| v.first())
            .map_or(0, |v| v.len() / n_r)
    };
    let mut out = Vec::with_capacity(32 + ne * nf * nl * (8 + 8 * n_r));
    for v in [ne, nf, nl, n_r] {
        out.extend_from_slice(&(v as u64).to_le_bytes());
    }
    for xe in x {
        for xf in xe {
            for row in xf.chunks_exact(n_r.max(1)) {
                let start = row.iter().position(|v| v.to_bits() != 0).unwrap_or(0);
                let end = row
                    .iter()
                    .rposition(|v| v.to_bits() != 0)
                    .map_or(start, |i| i + 1);
                out.extend_from_slice(&(start as u32).to_le_bytes());
                out.extend_from_slice(&((end - start) as u32).to_le_bytes());
                for v in &row[start..end] {
                    out.extend_from_slice(&v.to_le_bytes());
                }
            }
        }
    }
    out
}

/// The radial functions in `body`, which must have `dims` = (exponents, fields, l's, r's).
fn parse(body: &[u8], dims: [usize; 4]) -> Result<RadialFunctions, String> {
    let [ne, nf, nl, n_r] = dims;
    let u64_at = |o: usize| -> Option<u64> {
        Some(u64::from_le_bytes(body.get(o..o + 8)?.try_into().ok()?))
    };
    for (i, &want) in dims.iter().enumerate() {
        if u64_at(8 * i) != Some(want as u64) {
            return Err(format!(
                "sizes differ from the request (exponents, fields, multipoles, radial nodes {dims:?})"
            ));
        }
    }
    let mut at = 32usize;
    let mut x = vec![vec![vec![0.0; nl * n_r]; nf]; ne];
    for xe in &mut x {
        for xf in xe.iter_mut() {
            for row in xf.chunks_exact_mut(n_r.max(1)) {
                let span = u64_at(at).ok_or("truncated")?;
                at += 8;
                let (start, len) = ((span & 0xffff_ffff) as usize, (span >> 32) as usize);
                if start + len > n_r {
                    return Err("a radial range lies outside the radial grid".into());
                }
                let bytes = body.get(at..at + 8 * len).ok_or("truncated")?;
                at += 8 * len;
                for (v, c) in row[start..start + len]
                    .iter_mut()
                    .zip(bytes.chunks_exact(8))
                {
                    *v = f64::from_le_bytes(c.try_into().expect("8 bytes"));
                }
            }
        }
    }
    if at != body.len() {
        return Err("trailing bytes after the radial functions".into());
    }
    Ok(x)
}

fn read(path: &Path, key: u64, dims: [usize; 4]) -> Result<RadialFunctions, String> {
    let body = read_framed(path, MAGIC, key)?;
    if body.len() % 8 != 0 {
        return Err("length is not a whole number of values".into());
    }
    parse(&body, dims)
}

fn write(path: &Path, key: u64, x: &RadialFunctions, n_r: usize) -> std::io::Result<()> {
    write_framed(path, MAGIC, "radial", key, &payload(x, n_r))
}

/// The radial functions through the cache: read when a trusted file exists, else
/// `compute()` and store.
pub(super) fn cached_radial(
    inp: &CmbFisherInput<'_>,
    layout: &PlanLayout,
    coefs: &[Vec<f64>],
    cache: &CacheOptions,
    compute: impl FnOnce() -> RadialFunctions,
) -> (RadialFunctions, CacheStatus) {
    if cache.disabled {
        return (compute(), CacheStatus::Disabled);
    }
    let Some(dir) = cache.resolve_dir() else {
        return (compute(), CacheStatus::NoDirectory);
    };
    let key = radial_key(inp, layout, coefs);
    let path = file_of(&dir, key);
    let n_r = inp.radial.len();
    let dims = [
        layout.exponents.len(),
        inp.transfer.fields().len(),
        layout.lmax + 1,
        n_r,
    ];
    let previous = if path.exists() {
        match read(&path, key, dims) {
            Ok(x) => {
                // Least-recently-used order for pruning (best effort).
                if let Ok(f) = std::fs::File::options().append(true).open(&path) {
                    let _ = f.set_modified(std::time::SystemTime::now());
                }
                return (x, CacheStatus::Hit(path));
            }
            Err(reason) => Some(reason),
        }
    } else {
        None
    };
    let x = compute();
    let status = match write(&path, key, &x, n_r) {
        Err(e) => CacheStatus::StoreFailed {
            path,
            reason: e.to_string(),
        },
        Ok(()) => {
            prune_by_size(&dir, "radial-", &path, MAX_BYTES);
            match previous {
                Some(reason) => CacheStatus::Replaced { path, reason },
                None => CacheStatus::Stored(path),
            }
        }
    };
    (x, status)
}

#[cfg(test)]
mod tests {
    use super::super::tests::{toy_radial, toy_table};
    use super::*;
    use crate::cmb::bispectrum::{BispectrumPlan, FieldSet, cmb_fisher_with_plan};
    use crate::cmb::experiment::Experiment;
    use crate::cmb::transfer::RadialGrid;
    use crate::cosmology::Primordial;
    use crate::shapes::Shape;

    fn input<'a>(
        tr: &'a crate::cmb::transfer::TransferTable,
        radial: &'a RadialGrid,
        exp: &'a Experiment,
        shapes: &'a [Shape],
        grid: &'a [usize],
    ) -> CmbFisherInput<'a> {
        CmbFisherInput {
            transfer: tr,
            primordial: Primordial::from_values(2.1e-9, 0.965, 0.05),
            shapes,
            experiment: exp,
            t_cmb_k: 2.7255,
            lmax_grid: grid,
            field_sets: &[FieldSet::T, FieldSet::E, FieldSet::TE],
            radial,
            parallel: true,
            signal_cl: None,
        }
    }

    fn radial_files(dir: &Path) -> Vec<PathBuf> {
        let mut v: Vec<PathBuf> = std::fs::read_dir(dir)
            .map(|d| d.filter_map(|e| e.ok()).map(|e| e.path()).collect())
            .unwrap_or_default();
        v.retain(|p| {
            p.file_name()
                .is_some_and(|n| n.to_string_lossy().starts_with("radial-"))
        });
        v.sort();
        v
    }

    fn same_radial(a: &BispectrumPlan, b: &BispectrumPlan) -> bool {
        let bits = |p: &BispectrumPlan| -> Vec<u64> {
            p.x.iter()
                .flatten()
                .flatten()
                .map(|v| v.to_bits())
                .collect()
        };
        bits(a) == bits(b)
    }

    /// Written once, then read back bit for bit, with identical Fisher matrices; a
    /// flipped byte is detected and the file replaced; other exponents, another radial
    /// grid or another l_max miss; no cache folder means no file.
    #[test]
    fn round_trip_corruption_and_keys() {
        let dir = std::env::temp_dir().join(format!("ngreach-radcache-{}", std::process::id()));
        std::fs::remove_dir_all(&dir).ok();
        let cache = CacheOptions::in_dir(&dir);
        let lmax = 40;
        let tr = toy_table(lmax, Some(0.02), true);
        let radial = toy_radial(600.0, 8);
        let exp = Experiment::ideal(lmax);
        let shapes = [Shape::Local, Shape::Equilateral, Shape::Orthogonal];
        let grid = [20, lmax];
        let inp = input(&tr, &radial, &exp, &shapes, &grid);
        let fresh = BispectrumPlan::new(&inp);

        let (written, st) = BispectrumPlan::new_cached(&inp, &cache);
        assert_eq!(st.label(), "stored", "{st:?}");
        assert!(st.warning("radial-function").is_none());
        let files = radial_files(&dir);
        assert_eq!(files.len(), 1, "{files:?}");
        let (hit, st) = BispectrumPlan::new_cached(&inp, &cache);
        assert_eq!(st, CacheStatus::Hit(files[0].clone()));
        assert!(same_radial(&fresh, &written) && same_radial(&fresh, &hit));
        let f_fresh = cmb_fisher_with_plan(&fresh, &grid, true);
        let f_hit = cmb_fisher_with_plan(&hit, &grid, true);
        for (a, b) in f_fresh
            .fisher
            .iter()
            .flatten()
            .zip(f_hit.fisher.iter().flatten())
        {
            assert_eq!(a, b);
        }

        // Flip one byte of the values: detected, recomputed, replaced, then a hit again.
        let mut bytes = std::fs::read(&files[0]).unwrap();
        let n = bytes.len();
        bytes[n - 5] ^= 0x10;
        std::fs::write(&files[0], &bytes).unwrap();
        let (again, st) = BispectrumPlan::new_cached(&inp, &cache);
        assert_eq!(st.label(), "replaced", "{st:?}");
        assert!(
            st.warning("radial-function").unwrap().contains("checksum"),
            "{st:?}"
        );
        assert!(same_radial(&fresh, &again));
        assert_eq!(BispectrumPlan::new_cached(&inp, &cache).1.label(), "hit");
        // A truncated file is refused too.
        let bytes = std::fs::read(&files[0]).unwrap();
        std::fs::write(&files[0], &bytes[..bytes.len() - 8]).unwrap();
        assert_eq!(
            BispectrumPlan::new_cached(&inp, &cache).1.label(),
            "replaced"
        );

        // Other inputs miss: another exponent set, another radial grid, another l_max.
        let local = [Shape::Local];
        let radial2 = toy_radial(600.0, 9);
        let grid2 = [20, lmax - 1];
        for other in [
            input(&tr, &radial, &exp, &local, &grid),
            input(&tr, &radial2, &exp, &shapes, &grid),
            input(&tr, &radial, &exp, &shapes, &grid2),
        ] {
            let (p, st) = BispectrumPlan::new_cached(&other, &cache);
            assert_eq!(st.label(), "stored", "{st:?}");
            assert!(same_radial(&p, &BispectrumPlan::new(&other)));
        }
        assert_eq!(radial_files(&dir).len(), 4);
        // The experiment is not part of the key: another noise level hits.
        let noisy = Experiment::ideal(30);
        let (_, st) =
            BispectrumPlan::new_cached(&input(&tr, &radial, &noisy, &shapes, &grid), &cache);
        assert_eq!(st.label(), "hit");

        let (p, st) = BispectrumPlan::new_cached(&inp, &CacheOptions::disabled());
        assert_eq!(st, CacheStatus::Disabled);
        assert!(same_radial(&fresh, &p));
        std::fs::remove_dir_all(&dir).ok();
    }

    #[test]
    fn sparse_rows_round_trip() {
        // Leading and trailing zeros, an all-zero row, a row with no zeros.
        let n_r = 5;
        let x = vec![vec![vec![
            0.0, 0.0, 1.5, -2.0, 0.0, //
            0.0, 0.0, 0.0, 0.0, 0.0, //
            1.0, 2.0, 3.0, 4.0, 5.0, //
            -0.0, 7.0, 0.0, 8.0, 0.0,
        ]]];
        let body = payload(&x, n_r);
        let y = parse(&body, [1, 1, 4, n_r]).unwrap();
        let bits = |x: &RadialFunctions| -> Vec<u64> {
            x.iter()
                .flatten()
                .flatten()
                .map(|v| v.to_bits())
                .collect::<Vec<_>>()
        };
        // Only +0.0 counts as absent, so a -0.0 at a row's edge keeps its sign.
        assert_eq!(bits(&y), bits(&x));
        assert!(parse(&body, [1, 1, 4, n_r + 1]).is_err());
        assert!(parse(&body[..body.len() - 8], [1, 1, 4, n_r]).is_err());
    }
}
