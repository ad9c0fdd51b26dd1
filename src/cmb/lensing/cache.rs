//! On-disk cache of [`Lensing`]: the unlensed spectra with their high-l tail, the lensing
//! potential spectra and the lensed spectra cost several seconds per cosmology (a
//! sampled-l Boltzmann solve past the table's l_max, the Weyl-potential solve, the
//! curved-sky correlation functions), more than the Fisher sums of a small scan. They are
//! stored beside the transfer tables, keyed by a fingerprint of the transfer table they
//! came from, the output l_max, the delensing fraction and the solver precision.
//!
//! File format (our own; the framing of [`crate::cmb::cache_file`]): the 8-byte magic
//! `NGRLENS2`, the key (u64), the payload length (u64), an FNV-1a checksum over the
//! payload's 64-bit words (u64), then the payload: ten vectors, each a
//! u64 length followed by little-endian f64 values (unlensed TT, EE, TE; C^{phi phi},
//! C^{T phi}; lensed TT, EE, TE, BB; C^{E phi}, with length `u64::MAX` for none). A file
//! that fails any check is recomputed and replaced, never trusted.

use std::path::{Path, PathBuf};

use super::{LensedSpectra, Lensing, LensingSpectra, UNLENSED_MARGIN, lensing_of};
use crate::cmb::ThermalHistory;
use crate::cmb::boltzmann::{CacheOptions, Fnv1a, SOLVER_VERSION, Spectra};
use crate::cmb::cache_file::{read_framed, write_framed};
use crate::cmb::transfer::TransferTable;
use crate::cosmology::{Background, Cosmology};
use crate::error::Result;

const MAGIC: &[u8; 8] = b"NGRLENS2";
/// Bumped whenever the lensing numerics change what they compute.
const LENSING_VERSION: u64 = 1;
/// At most this many lensing files are kept (least recently written removed first); each
/// is about 0.3 MB at l_max 3000.
const MAX_FILES: usize = 200;

/// What the lensing cache did for one request.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LensingCacheStatus {
    /// Read from the cache.
    Hit,
    /// Computed and stored.
    Stored,
    /// Computed; the cache is off or could not be written.
    Computed,
}

impl LensingCacheStatus {
    /// `hit`, `stored` or `computed`.
    pub fn label(self) -> &'static str {
        match self {
            Self::Hit => "hit",
            Self::Stored => "stored",
            Self::Computed => "computed",
        }
    }
}

/// The key of a lensing request: a fingerprint of the transfer table (cosmology, label,
/// k nodes, weights and every 16th multipole of every row), the output l_max, delensing and precision.
pub fn lensing_key(
    cosmo: &Cosmology,
    table: &TransferTable,
    lmax_out: usize,
    delensing: f64,
    precision: u32,
) -> u64 {
    let mut h = Fnv1a::new();
    h.bytes(b"ngreach lensing spectra");
    h.u64(LENSING_VERSION);
    h.u64(SOLVER_VERSION);
    h.u64(UNLENSED_MARGIN as u64);
    h.bytes(format!("{:?}", cosmo.params()).as_bytes());
    h.bytes(table.label().as_bytes());
    h.u64(table.lmax() as u64);
    h.u64(table.fields().len() as u64);
    for v in table.k().iter().chain(table.weights()) {
        h.u64(v.to_bits());
    }
    for f in 0..table.fields().len() {
        for ik in 0..table.k().len() {
            // Every 16th multipole of every row: enough to tell two tables apart.
            for v in table.row(f, ik).iter().step_by(16) {
                h.u64(v.to_bits());
            }
        }
    }
    h.u64(lmax_out as u64);
    h.u64(delensing.to_bits());
    h.u64(precision as u64);
    h.finish()
}

fn file_of(dir: &Path, key: u64) -> PathBuf {
    dir.join(format!("lensing-{key:016x}.bin"))
}

fn payload(l: &Lensing) -> Vec<u8> {
    let mut out = Vec::new();
    let mut put = |v: Option<&[f64]>| match v {
        Some(v) => {
            out.extend_from_slice(&(v.len() as u64).to_le_bytes());
            for x in v {
                out.extend_from_slice(&x.to_le_bytes());
            }
        }
        None => out.extend_from_slice(&u64::MAX.to_le_bytes()),
    };
    put(Some(&l.unlensed.tt));
    put(Some(&l.unlensed.ee));
    put(Some(&l.unlensed.te));
    put(Some(&l.potential.pp));
    put(Some(&l.potential.tp));
    put(Some(&l.lensed.tt));
    put(Some(&l.lensed.ee));
    put(Some(&l.lensed.te));
    put(Some(&l.lensed.bb));
    put(l.e_phi.as_deref());
    out
}

fn parse(body: &[u8], delensing: f64) -> Option<Lensing> {
    let mut at = 0usize;
    let mut next = || -> Option<Option<Vec<f64>>> {
        let n = u64::from_le_bytes(body.get(at..at + 8)?.try_into().ok()?);
        at += 8;
        if n == u64::MAX {
            return Some(None);
        }
        let n = usize::try_from(n).ok()?;
        let bytes = body.get(at..at.checked_add(n.checked_mul(8)?)?)?;
        at += 8 * n;
        Some(Some(
            bytes
                .chunks_exact(8)
                .map(|c| f64::from_le_bytes(c.try_into().expect("8 bytes")))
                .collect(),
        ))
    };
    let mut vecs = Vec::new();
    for _ in 0..9 {
        vecs.push(next()??);
    }
    let e_phi = next()?;
    let mut it = vecs.into_iter();
    let mut take = || it.next().expect("nine vectors");
    let l = Lensing {
        unlensed: Spectra {
            tt: take(),
            ee: take(),
            te: take(),
        },
        potential: LensingSpectra {
            pp: take(),
            tp: take(),
        },
        lensed: LensedSpectra {
            tt: take(),
            ee: take(),
            te: take(),
            bb: take(),
        },
        delensing,
        e_phi,
    };
    (at == body.len()).then_some(l)
}

fn read(path: &Path, key: u64, delensing: f64) -> Option<Lensing> {
    parse(&read_framed(path, MAGIC, key).ok()?, delensing)
}

fn write(path: &Path, key: u64, l: &Lensing) -> std::io::Result<()> {
    write_framed(path, MAGIC, "lensing", key, &payload(l))
}

/// Keeps at most [`MAX_FILES`] lensing files in `dir`, removing the oldest first.
fn prune(dir: &Path) {
    let Ok(entries) = std::fs::read_dir(dir) else {
        return;
    };
    let mut files: Vec<(std::time::SystemTime, PathBuf)> = entries
        .filter_map(|e| e.ok())
        .filter_map(|e| {
            let p = e.path();
            let name = p.file_name()?.to_str()?;
            if !(name.starts_with("lensing-") && name.ends_with(".bin")) {
                return None;
            }
            Some((e.metadata().ok()?.modified().ok()?, p))
        })
        .collect();
    if files.len() <= MAX_FILES {
        return;
    }
    files.sort_by_key(|f| f.0);
    let excess = files.len() - MAX_FILES;
    for (_, p) in files.into_iter().take(excess) {
        let _ = std::fs::remove_file(p);
    }
}

/// [`lensing_of`] through the cache of `cache` (the transfer tables' directory).
///
/// # Errors
/// As [`lensing_of`]; cache problems are not errors (the spectra are recomputed).
#[allow(clippy::too_many_arguments)] // lensing_of's arguments and the cache
pub fn cached_lensing(
    cosmo: &Cosmology,
    th: &ThermalHistory,
    bg: &Background,
    table: &TransferTable,
    lmax_out: usize,
    delensing: f64,
    precision: u32,
    parallel: bool,
    cache: &CacheOptions,
) -> Result<(Lensing, LensingCacheStatus)> {
    let Some(dir) = cache.resolve_dir() else {
        let l = lensing_of(
            cosmo, th, bg, table, lmax_out, delensing, precision, parallel,
        )?;
        return Ok((l, LensingCacheStatus::Computed));
    };
    let key = lensing_key(cosmo, table, lmax_out, delensing, precision);
    let path = file_of(&dir, key);
    if let Some(l) = read(&path, key, delensing) {
        return Ok((l, LensingCacheStatus::Hit));
    }
    let l = lensing_of(
        cosmo, th, bg, table, lmax_out, delensing, precision, parallel,
    )?;
    let status = if write(&path, key, &l).is_ok() {
        prune(&dir);
        LensingCacheStatus::Stored
    } else {
        LensingCacheStatus::Computed
    };
    Ok((l, status))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample() -> Lensing {
        let v = |a: f64, n: usize| (0..n).map(|i| a + i as f64 * 1e-3).collect::<Vec<_>>();
        Lensing {
            unlensed: Spectra {
                tt: v(1.0, 7),
                ee: v(2.0, 7),
                te: v(3.0, 7),
            },
            potential: LensingSpectra {
                pp: v(4.0, 7),
                tp: v(5.0, 7),
            },
            lensed: LensedSpectra {
                tt: v(6.0, 5),
                ee: v(7.0, 5),
                te: v(8.0, 5),
                bb: v(9.0, 5),
            },
            delensing: 0.25,
            e_phi: Some(v(10.0, 7)),
        }
    }

    #[test]
    fn round_trip_and_corruption() {
        let dir = std::env::temp_dir().join(format!("ngreach-lenscache-{}", std::process::id()));
        let path = file_of(&dir, 42);
        let mut l = sample();
        write(&path, 42, &l).unwrap();
        assert_eq!(read(&path, 42, 0.25), Some(l.clone()));
        // Another key, or a flipped byte, is not trusted.
        assert_eq!(read(&path, 43, 0.25), None);
        let mut bytes = std::fs::read(&path).unwrap();
        let n = bytes.len();
        bytes[n - 3] ^= 1;
        std::fs::write(&path, &bytes).unwrap();
        assert_eq!(read(&path, 42, 0.25), None);
        // No C^{E phi} survives the round trip as none; a truncated file is refused.
        l.e_phi = None;
        write(&path, 42, &l).unwrap();
        assert_eq!(read(&path, 42, 0.25), Some(l));
        let bytes = std::fs::read(&path).unwrap();
        std::fs::write(&path, &bytes[..bytes.len() - 8]).unwrap();
        assert_eq!(read(&path, 42, 0.25), None);
        std::fs::remove_dir_all(&dir).ok();
    }
}
