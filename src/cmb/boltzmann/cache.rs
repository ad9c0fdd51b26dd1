//! On-disk cache of transfer tables.
//!
//! A table is stored under `transfer-<key>.bin`, where the key is a 64-bit FNV-1a hash
//! (Fowler, Noll & Vo; the public-domain FNV specification) of the format version, the
//! solver version, every cosmological parameter (bit patterns), the precision and l_max.
//! The file format (little endian):
//!
//! ```text
//! offset  size  content
//! 0       8     magic "NGRTRANS"
//! 8       4     format version (u32)
//! 12      4     reserved, 0
//! 16      8     key (u64)
//! 24      8     payload length in bytes (u64)
//! 32      8     FNV-1a 64 checksum of the payload (u64)
//! 40      ...   payload: lmax, n_k, n_fields (u64 each), field codes (u64 each: 0 = T,
//!               1 = E), label length (u64) and UTF-8 label, then k[n_k], w[n_k] and the
//!               data of each field, k-major (f64 each)
//! ```
//!
//! A file is trusted only if the magic, version, key, total length, checksum and every
//! internal length agree; otherwise the table is recomputed and the file replaced. Writes
//! go to a temporary file in the same directory that is then renamed over the target, so
//! a reader never sees a half-written table.
//!
//! Size: an every-l table to l_max = 3000 is about 240 MB, so a batch over many
//! cosmologies would fill a disk. After each store the directory's tables are pruned,
//! least recently used first (a hit refreshes a file's modification time), to at most
//! `NGREACH_CACHE_MAX_GB` gigabytes (default 4); the table just written is always kept.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};

use super::{BoltzmannSolver, Settings};
use crate::cmb::ThermalHistory;
use crate::cmb::transfer::{Field, TransferTable};
use crate::cosmology::{Background, Cosmology};
use crate::error::Result;

const MAGIC: &[u8; 8] = b"NGRTRANS";
const FORMAT_VERSION: u32 = 1;
/// Bumped whenever the solver's numerics change what it computes.
pub(crate) const SOLVER_VERSION: u64 = 6;
const HEADER_LEN: usize = 40;
/// Default size limit of the cache directory's tables, in GB.
const DEFAULT_MAX_GB: f64 = 4.0;

/// Where (and whether) to cache transfer tables.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct CacheOptions {
    /// Cache directory; `None` resolves to `$NGREACH_CACHE_DIR`, else
    /// `$XDG_CACHE_HOME/ngreach`, else `$HOME/.cache/ngreach`.
    pub dir: Option<PathBuf>,
    /// Skip the cache entirely (neither read nor write).
    pub disabled: bool,
}

impl CacheOptions {
    /// No caching.
    pub fn disabled() -> Self {
        Self {
            dir: None,
            disabled: true,
        }
    }

    /// Cache in an explicit directory.
    pub fn in_dir(dir: impl Into<PathBuf>) -> Self {
        Self {
            dir: Some(dir.into()),
            disabled: false,
        }
    }

    /// The directory that will be used, if any (see [`CacheOptions::dir`]).
    pub fn resolve_dir(&self) -> Option<PathBuf> {
        if self.disabled {
            return None;
        }
        if let Some(d) = &self.dir {
            return Some(d.clone());
        }
        let var = |name: &str| {
            std::env::var_os(name)
                .filter(|v| !v.is_empty())
                .map(PathBuf::from)
        };
        if let Some(d) = var("NGREACH_CACHE_DIR") {
            return Some(d);
        }
        if let Some(d) = var("XDG_CACHE_HOME").filter(|p| p.is_absolute()) {
            return Some(d.join("ngreach"));
        }
        var("HOME").map(|h| h.join(".cache").join("ngreach"))
    }
}

/// What the cache did.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum CacheStatus {
    /// Caching was switched off.
    Disabled,
    /// No cache directory could be determined (no `$HOME`); computed without caching.
    NoDirectory,
    /// The table was read from this file.
    Hit(PathBuf),
    /// Not cached before: computed and stored in this file.
    Stored(PathBuf),
    /// The file existed but was not trusted (`reason`); recomputed and replaced.
    Replaced {
        /// The file.
        path: PathBuf,
        /// Why it was rejected (corrupt, truncated, other key, ...).
        reason: String,
    },
    /// Computed, but storing failed (the table is still returned).
    StoreFailed {
        /// The file.
        path: PathBuf,
        /// The I/O error.
        reason: String,
    },
}

impl CacheStatus {
    /// A short name: `disabled`, `no-directory`, `hit`, `stored`, `replaced` or
    /// `store-failed`.
    pub fn label(&self) -> &'static str {
        match self {
            Self::Disabled => "disabled",
            Self::NoDirectory => "no-directory",
            Self::Hit(_) => "hit",
            Self::Stored(_) => "stored",
            Self::Replaced { .. } => "replaced",
            Self::StoreFailed { .. } => "store-failed",
        }
    }

    /// The cache file involved, if any.
    pub fn path(&self) -> Option<&Path> {
        match self {
            Self::Disabled | Self::NoDirectory => None,
            Self::Hit(p) | Self::Stored(p) => Some(p),
            Self::Replaced { path, .. } | Self::StoreFailed { path, .. } => Some(path),
        }
    }

    /// A warning for the user about the cache file of `what` (e.g. "radial-function"):
    /// a rejected (corrupt or mismatched) file, or a failed store; `None` otherwise.
    pub fn warning(&self, what: &str) -> Option<String> {
        match self {
            Self::Replaced { path, reason } => Some(format!(
                "{what} cache file {} was not trusted ({reason}); recomputed and replaced",
                path.display()
            )),
            Self::StoreFailed { path, reason } => Some(format!(
                "{what} cache file {} could not be written: {reason}",
                path.display()
            )),
            _ => None,
        }
    }

    /// As JSON for the outputs' `inputs`: `{"status", "file", "reason"}` (null where
    /// not applicable).
    pub fn to_json(&self) -> serde_json::Value {
        let reason = match self {
            Self::Replaced { reason, .. } | Self::StoreFailed { reason, .. } => Some(reason),
            _ => None,
        };
        serde_json::json!({
            "status": self.label(),
            "file": self.path().map(|p| p.display().to_string()),
            "reason": reason,
        })
    }
}

/// 64-bit FNV-1a.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Fnv1a(u64);

impl Fnv1a {
    pub fn new() -> Self {
        Self(0xcbf2_9ce4_8422_2325)
    }
    pub fn bytes(&mut self, b: &[u8]) {
        let mut h = self.0;
        for &x in b {
            h ^= x as u64;
            h = h.wrapping_mul(0x0000_0100_0000_01b3);
        }
        self.0 = h;
    }
    pub fn u64(&mut self, v: u64) {
        self.bytes(&v.to_le_bytes());
    }
    pub fn finish(self) -> u64 {
        self.0
    }
}

/// The cache key of a cosmology and settings (everything that changes the table).
pub fn cache_key(cosmo: &Cosmology, settings: &Settings) -> u64 {
    let p = cosmo.params();
    let mut h = Fnv1a::new();
    h.bytes(b"ngreach boltzmann transfer table");
    h.u64(FORMAT_VERSION as u64);
    h.u64(SOLVER_VERSION);
    for v in [
        p.omega_b,
        p.omega_c,
        p.h,
        p.n_s,
        p.a_s,
        p.k_pivot_mpc,
        p.tau_reio,
        p.t_cmb_k,
        p.n_eff,
        p.y_he,
        p.w0,
        p.wa,
    ] {
        h.u64(v.to_bits());
    }
    h.u64(settings.precision as u64);
    h.u64(settings.lmax as u64);
    h.finish()
}

/// The cache file of a key in a directory.
pub fn cache_file(dir: &Path, key: u64) -> PathBuf {
    dir.join(format!("transfer-{key:016x}.bin"))
}

fn payload(table: &TransferTable) -> Vec<u8> {
    let nk = table.k().len();
    let nl = table.lmax() + 1;
    let nf = table.fields().len();
    let label = table.label().as_bytes();
    let mut out = Vec::with_capacity(8 * (4 + nf + 2 * nk + nf * nk * nl) + label.len());
    let u = |v: u64, out: &mut Vec<u8>| out.extend_from_slice(&v.to_le_bytes());
    u(table.lmax() as u64, &mut out);
    u(nk as u64, &mut out);
    u(nf as u64, &mut out);
    for f in table.fields() {
        u(
            match f {
                Field::T => 0,
                Field::E => 1,
            },
            &mut out,
        );
    }
    u(label.len() as u64, &mut out);
    out.extend_from_slice(label);
    for v in table.k().iter().chain(table.weights()) {
        out.extend_from_slice(&v.to_le_bytes());
    }
    for f in 0..nf {
        for ik in 0..nk {
            for v in table.row(f, ik) {
                out.extend_from_slice(&v.to_le_bytes());
            }
        }
    }
    out
}

/// Writes a table atomically (temporary file, then rename).
///
/// # Errors
/// The I/O error, as text.
pub fn write_table(
    path: &Path,
    key: u64,
    table: &TransferTable,
) -> std::result::Result<(), String> {
    static COUNTER: AtomicU64 = AtomicU64::new(0);
    let dir = path.parent().unwrap_or(Path::new("."));
    std::fs::create_dir_all(dir).map_err(|e| format!("creating {}: {e}", dir.display()))?;
    let body = payload(table);
    let mut sum = Fnv1a::new();
    sum.bytes(&body);
    let tmp = dir.join(format!(
        ".{}.tmp-{}-{}",
        path.file_name()
            .and_then(|n| n.to_str())
            .unwrap_or("transfer"),
        std::process::id(),
        COUNTER.fetch_add(1, Ordering::Relaxed)
    ));
    let write = || -> std::io::Result<()> {
        let mut f = std::io::BufWriter::new(std::fs::File::create(&tmp)?);
        f.write_all(MAGIC)?;
        f.write_all(&FORMAT_VERSION.to_le_bytes())?;
        f.write_all(&0u32.to_le_bytes())?;
        f.write_all(&key.to_le_bytes())?;
        f.write_all(&(body.len() as u64).to_le_bytes())?;
        f.write_all(&sum.finish().to_le_bytes())?;
        f.write_all(&body)?;
        let f = f.into_inner().map_err(|e| e.into_error())?;
        f.sync_all()?;
        drop(f);
        std::fs::rename(&tmp, path)
    };
    write().map_err(|e| {
        let _ = std::fs::remove_file(&tmp);
        format!("writing {}: {e}", path.display())
    })
}

/// Reads and verifies a table; `Err` carries the reason it is not trusted.
///
/// # Errors
/// A description of what is wrong with the file (missing, truncated, corrupt, other key,
/// other l_max).
pub fn read_table(
    path: &Path,
    key: u64,
    lmax: usize,
) -> std::result::Result<TransferTable, String> {
    let bytes = std::fs::read(path).map_err(|e| format!("reading {}: {e}", path.display()))?;
    if bytes.len() < HEADER_LEN {
        return Err(format!("truncated header ({} bytes)", bytes.len()));
    }
    if &bytes[0..8] != MAGIC {
        return Err("not a transfer-table file (bad magic)".into());
    }
    let u32_at = |o: usize| u32::from_le_bytes(bytes[o..o + 4].try_into().expect("4 bytes"));
    let u64_at = |o: usize| u64::from_le_bytes(bytes[o..o + 8].try_into().expect("8 bytes"));
    if u32_at(8) != FORMAT_VERSION {
        return Err(format!(
            "format version {} (expected {FORMAT_VERSION})",
            u32_at(8)
        ));
    }
    if u64_at(16) != key {
        return Err(format!("key {:016x} (expected {key:016x})", u64_at(16)));
    }
    let len = u64_at(24);
    if len != (bytes.len() - HEADER_LEN) as u64 {
        return Err(format!(
            "payload length {} but {} bytes present (truncated or padded)",
            len,
            bytes.len() - HEADER_LEN
        ));
    }
    let body = &bytes[HEADER_LEN..];
    let mut sum = Fnv1a::new();
    sum.bytes(body);
    if sum.finish() != u64_at(32) {
        return Err("checksum mismatch (corrupt file)".into());
    }
    // Parse; every length is checked against the payload size before use.
    let mut pos = 0usize;
    let take_u64 = |pos: &mut usize| -> std::result::Result<u64, String> {
        let v = body
            .get(*pos..*pos + 8)
            .ok_or("payload ends inside a length field")?;
        *pos += 8;
        Ok(u64::from_le_bytes(v.try_into().expect("8 bytes")))
    };
    let t_lmax = take_u64(&mut pos)? as usize;
    let nk = take_u64(&mut pos)? as usize;
    let nf = take_u64(&mut pos)? as usize;
    if t_lmax != lmax {
        return Err(format!("lmax {t_lmax} (expected {lmax})"));
    }
    if nf == 0 || nf > 2 || nk == 0 {
        return Err(format!("implausible sizes: {nk} k nodes, {nf} fields"));
    }
    let mut fields = Vec::with_capacity(nf);
    for _ in 0..nf {
        fields.push(match take_u64(&mut pos)? {
            0 => Field::T,
            1 => Field::E,
            c => return Err(format!("unknown field code {c}")),
        });
    }
    let lab_len = take_u64(&mut pos)? as usize;
    let label = body
        .get(pos..pos.saturating_add(lab_len))
        .ok_or("payload ends inside the label")?;
    let label = std::str::from_utf8(label)
        .map_err(|_| "label is not UTF-8")?
        .to_string();
    pos += lab_len;
    let n_vals = nk
        .checked_mul(lmax + 1)
        .and_then(|v| v.checked_mul(nf))
        .and_then(|v| v.checked_add(2 * nk))
        .ok_or("sizes overflow")?;
    if body.len() - pos != n_vals * 8 {
        return Err(format!(
            "payload holds {} bytes of values, {} expected",
            body.len() - pos,
            n_vals * 8
        ));
    }
    let vals: Vec<f64> = body[pos..]
        .chunks_exact(8)
        .map(|c| f64::from_le_bytes(c.try_into().expect("8 bytes")))
        .collect();
    let k = vals[..nk].to_vec();
    let w = vals[nk..2 * nk].to_vec();
    let per = nk * (lmax + 1);
    let data: Vec<Vec<f64>> = (0..nf)
        .map(|f| vals[2 * nk + f * per..2 * nk + (f + 1) * per].to_vec())
        .collect();
    if !k.windows(2).all(|p| p[0] < p[1]) || k[0] <= 0.0 {
        return Err("k grid is not positive and increasing".into());
    }
    // Only Boltzmann tables are cached: they end at k chi_* = 2.1 l_max + 600.
    Ok(TransferTable::new(&label, k, w, lmax, fields, data).mark_k_truncated())
}

/// The transfer table of a cosmology, from the cache when a trusted file exists,
/// otherwise computed (background, thermal history, mode integrations, every-l
/// projection) and stored.
///
/// # Errors
/// As [`BoltzmannSolver::new`] and [`ThermalHistory::new`]. Cache I/O problems are never
/// errors: they are reported in the [`CacheStatus`].
pub fn cached_transfer(
    cosmo: &Cosmology,
    settings: &Settings,
    cache: &CacheOptions,
) -> Result<(TransferTable, CacheStatus)> {
    settings.validate()?;
    let compute = || -> Result<TransferTable> {
        let bg = Background::new(cosmo);
        let th = ThermalHistory::new(cosmo, &bg)?;
        Ok(BoltzmannSolver::new(cosmo, &th, &bg, settings.clone())?.transfer_table())
    };
    if cache.disabled {
        return Ok((compute()?, CacheStatus::Disabled));
    }
    let Some(dir) = cache.resolve_dir() else {
        return Ok((compute()?, CacheStatus::NoDirectory));
    };
    let key = cache_key(cosmo, settings);
    let path = cache_file(&dir, key);
    let previous = if path.exists() {
        match read_table(&path, key, settings.lmax) {
            Ok(t) => {
                // Least-recently-used order for pruning (best effort).
                if let Ok(f) = std::fs::File::options().append(true).open(&path) {
                    let _ = f.set_modified(std::time::SystemTime::now());
                }
                return Ok((t, CacheStatus::Hit(path)));
            }
            Err(reason) => Some(reason),
        }
    } else {
        None
    };
    let table = compute()?;
    let status = match write_table(&path, key, &table) {
        Err(reason) => CacheStatus::StoreFailed { path, reason },
        Ok(()) => {
            prune(&dir, &path, max_bytes());
            match previous {
                Some(reason) => CacheStatus::Replaced { path, reason },
                None => CacheStatus::Stored(path),
            }
        }
    };
    Ok((table, status))
}

/// The size limit: `NGREACH_CACHE_MAX_GB` (a positive number) or the default.
fn max_bytes() -> u64 {
    let gb = std::env::var("NGREACH_CACHE_MAX_GB")
        .ok()
        .and_then(|v| v.trim().parse::<f64>().ok())
        .filter(|v| v.is_finite() && *v > 0.0)
        .unwrap_or(DEFAULT_MAX_GB);
    (gb * 1e9) as u64
}

/// Deletes the oldest `transfer-*.bin` tables in `dir` until they total at most `limit`
/// bytes, never `keep`. Returns the files removed. Best effort: errors are ignored.
pub fn prune(dir: &Path, keep: &Path, limit: u64) -> Vec<PathBuf> {
    crate::cmb::cache_file::prune_by_size(dir, "transfer-", keep, limit)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn small_table() -> TransferTable {
        let k = vec![0.01, 0.02, 0.05];
        let w = vec![0.005, 0.02, 0.015];
        let lmax = 4;
        let t: Vec<f64> = (0..15).map(|i| (i as f64 * 0.37).sin()).collect();
        let e: Vec<f64> = (0..15).map(|i| -(i as f64) * 1e-3).collect();
        TransferTable::new("test", k, w, lmax, vec![Field::T, Field::E], vec![t, e])
    }

    fn same(a: &TransferTable, b: &TransferTable) -> bool {
        a.k() == b.k()
            && a.weights() == b.weights()
            && a.lmax() == b.lmax()
            && a.fields() == b.fields()
            && a.label() == b.label()
            && (0..a.fields().len()).all(|f| (0..a.k().len()).all(|i| a.row(f, i) == b.row(f, i)))
    }

    fn tmpdir(name: &str) -> PathBuf {
        let d =
            std::env::temp_dir().join(format!("ngreach-cache-test-{name}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        d
    }

    /// Pruning removes the least recently modified tables first, keeps the named one and
    /// leaves other files alone.
    #[test]
    fn prune_removes_oldest_tables_first() {
        let d = tmpdir("prune");
        std::fs::create_dir_all(&d).unwrap();
        let t0 = std::time::SystemTime::now() - std::time::Duration::from_secs(1000);
        let mut paths = Vec::new();
        for i in 0..4u64 {
            let p = d.join(format!("transfer-{i:016x}.bin"));
            std::fs::write(&p, vec![0u8; 100]).unwrap();
            let f = std::fs::File::options().append(true).open(&p).unwrap();
            f.set_modified(t0 + std::time::Duration::from_secs(10 * i))
                .unwrap();
            paths.push(p);
        }
        std::fs::write(d.join("notes.txt"), vec![0u8; 500]).unwrap();
        // Keep the oldest explicitly; limit 200 bytes: the next two oldest go.
        let removed = prune(&d, &paths[0], 200);
        assert_eq!(removed, vec![paths[1].clone(), paths[2].clone()]);
        assert!(paths[0].exists() && paths[3].exists() && d.join("notes.txt").exists());
        assert!(prune(&d, &paths[0], 1000).is_empty());
        std::fs::remove_dir_all(&d).ok();
    }

    #[test]
    fn fnv1a_known_values() {
        // FNV-1a 64 test vectors (FNV specification): "" and "a".
        assert_eq!(Fnv1a::new().finish(), 0xcbf2_9ce4_8422_2325);
        let mut h = Fnv1a::new();
        h.bytes(b"a");
        assert_eq!(h.finish(), 0xaf63_dc4c_8601_ec8c);
    }

    #[test]
    fn round_trip_corruption_truncation() {
        let dir = tmpdir("unit");
        let t = small_table();
        let path = cache_file(&dir, 42);
        write_table(&path, 42, &t).unwrap();
        let back = read_table(&path, 42, 4).unwrap();
        assert!(same(&t, &back));
        // Wrong key and wrong lmax are refused.
        assert!(read_table(&path, 43, 4).unwrap_err().contains("key"));
        assert!(read_table(&path, 42, 5).unwrap_err().contains("lmax"));
        // One flipped byte in the payload: checksum.
        let mut bytes = std::fs::read(&path).unwrap();
        let n = bytes.len();
        bytes[n - 3] ^= 0x10;
        std::fs::write(&path, &bytes).unwrap();
        assert!(read_table(&path, 42, 4).unwrap_err().contains("checksum"));
        // Truncated: length.
        bytes[n - 3] ^= 0x10;
        std::fs::write(&path, &bytes[..n - 8]).unwrap();
        assert!(read_table(&path, 42, 4).unwrap_err().contains("length"));
        std::fs::write(&path, &bytes[..20]).unwrap();
        assert!(read_table(&path, 42, 4).unwrap_err().contains("truncated"));
        // No temporary files left behind.
        let left: Vec<_> = std::fs::read_dir(&dir)
            .unwrap()
            .filter_map(|e| e.ok())
            .filter(|e| e.file_name().to_string_lossy().contains(".tmp-"))
            .collect();
        assert!(left.is_empty());
        let _ = std::fs::remove_dir_all(&dir);
    }

    #[test]
    fn key_depends_on_inputs() {
        let c = Cosmology::planck2018();
        let s = Settings::default();
        let k0 = cache_key(&c, &s);
        let mut s2 = s.clone();
        s2.lmax += 1;
        assert_ne!(k0, cache_key(&c, &s2));
        let mut s3 = s.clone();
        s3.precision = 2;
        assert_ne!(k0, cache_key(&c, &s3));
        let mut p = *c.params();
        p.tau_reio = 0.06;
        assert_ne!(k0, cache_key(&Cosmology::new(p).unwrap(), &s));
        // The thread count does not change the table, so not the key either.
        let mut s4 = s.clone();
        s4.parallel = false;
        assert_eq!(k0, cache_key(&c, &s4));
    }

    #[test]
    fn directory_resolution() {
        assert_eq!(CacheOptions::disabled().resolve_dir(), None);
        assert_eq!(
            CacheOptions::in_dir("/tmp/x").resolve_dir(),
            Some(PathBuf::from("/tmp/x"))
        );
    }
}
