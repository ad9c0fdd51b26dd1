//! The framed files of the derived-quantity caches (lensed spectra, radial functions):
//! an 8-byte magic, then the key, the body length and a checksum of the body (each a
//! little-endian u64), then the body. Files are written to a unique temporary name and
//! renamed into place, so a reader never sees a partial file; a reader trusts a file only
//! when magic, key, length and checksum all agree.

use std::io::Write;
use std::path::{Path, PathBuf};

/// Bytes before the body.
pub(crate) const HEADER_LEN: usize = 32;

/// FNV-1a over 64-bit little-endian words, the last partial word zero-padded (a changed
/// word always changes the sum: each step is a bijection of the state).
pub(crate) fn checksum(bytes: &[u8]) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    let mut step = |w: u64| {
        h ^= w;
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    };
    let words = bytes.chunks_exact(8);
    let tail = words.remainder();
    for w in words {
        step(u64::from_le_bytes(w.try_into().expect("8 bytes")));
    }
    if !tail.is_empty() {
        let mut last = [0u8; 8];
        last[..tail.len()].copy_from_slice(tail);
        step(u64::from_le_bytes(last));
    }
    h
}

/// Writes `body` framed with `magic` and `key` to `path` (its folder created if needed),
/// through a temporary file named after `stem`, the process and a counter (two threads
/// writing the same key never share one).
pub(crate) fn write_framed(
    path: &Path,
    magic: &[u8; 8],
    stem: &str,
    key: u64,
    body: &[u8],
) -> std::io::Result<()> {
    static COUNTER: std::sync::atomic::AtomicU64 = std::sync::atomic::AtomicU64::new(0);
    let dir = path.parent().unwrap_or(Path::new("."));
    std::fs::create_dir_all(dir)?;
    let tmp = dir.join(format!(
        ".{stem}-{key:016x}.tmp-{}-{}",
        std::process::id(),
        COUNTER.fetch_add(1, std::sync::atomic::Ordering::Relaxed)
    ));
    let result = (|| {
        let mut f = std::io::BufWriter::new(std::fs::File::create(&tmp)?);
        f.write_all(magic)?;
        f.write_all(&key.to_le_bytes())?;
        f.write_all(&(body.len() as u64).to_le_bytes())?;
        f.write_all(&checksum(body).to_le_bytes())?;
        f.write_all(body)?;
        f.into_inner().map_err(|e| e.into_error())?.sync_all()?;
        std::fs::rename(&tmp, path)
    })();
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    result
}

/// The body of a framed file, or why the file is not trusted.
pub(crate) fn read_framed(path: &Path, magic: &[u8; 8], key: u64) -> Result<Vec<u8>, String> {
    let mut bytes = std::fs::read(path).map_err(|e| e.to_string())?;
    if bytes.len() < HEADER_LEN || &bytes[0..8] != magic {
        return Err("not a cache file of this kind and version".into());
    }
    let u64_at = |o: usize| u64::from_le_bytes(bytes[o..o + 8].try_into().expect("8 bytes"));
    if u64_at(8) != key {
        return Err("written for other inputs (key differs)".into());
    }
    if u64_at(16) != (bytes.len() - HEADER_LEN) as u64 {
        return Err("length differs from its header (truncated?)".into());
    }
    let sum = u64_at(24);
    let body = bytes.split_off(HEADER_LEN);
    if checksum(&body) != sum {
        return Err("checksum mismatch (corrupt)".into());
    }
    Ok(body)
}

/// Deletes the least recently modified `<prefix>*.bin` files in `dir` until they total
/// at most `limit` bytes, never `keep`. Returns the files removed. Best effort: errors
/// are ignored.
pub(crate) fn prune_by_size(dir: &Path, prefix: &str, keep: &Path, limit: u64) -> Vec<PathBuf> {
    let Ok(entries) = std::fs::read_dir(dir) else {
        return Vec::new();
    };
    let mut files: Vec<(std::time::SystemTime, u64, PathBuf)> = entries
        .filter_map(|e| e.ok())
        .filter_map(|e| {
            let p = e.path();
            let name = p.file_name()?.to_str()?;
            if !(name.starts_with(prefix) && name.ends_with(".bin")) {
                return None;
            }
            let m = e.metadata().ok()?;
            Some((m.modified().ok()?, m.len(), p))
        })
        .collect();
    let mut total: u64 = files.iter().map(|f| f.1).sum();
    files.sort_by_key(|f| f.0);
    let mut removed = Vec::new();
    for (_, len, p) in files {
        if total <= limit {
            break;
        }
        if p != keep && std::fs::remove_file(&p).is_ok() {
            total = total.saturating_sub(len);
            removed.push(p);
        }
    }
    removed
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn framed_round_trip_and_every_defect_is_caught() {
        let dir = std::env::temp_dir().join(format!("ngreach-framed-{}", std::process::id()));
        let path = dir.join("x.bin");
        let body: Vec<u8> = (0..37u8).collect();
        write_framed(&path, b"NGRTEST1", "x", 7, &body).unwrap();
        assert_eq!(read_framed(&path, b"NGRTEST1", 7).unwrap(), body);
        assert!(read_framed(&path, b"NGRTEST2", 7).is_err());
        assert!(
            read_framed(&path, b"NGRTEST1", 8)
                .unwrap_err()
                .contains("key")
        );
        let mut bytes = std::fs::read(&path).unwrap();
        // A flipped byte in the partial last word is caught too.
        *bytes.last_mut().unwrap() ^= 1;
        std::fs::write(&path, &bytes).unwrap();
        assert!(
            read_framed(&path, b"NGRTEST1", 7)
                .unwrap_err()
                .contains("checksum")
        );
        bytes.pop();
        std::fs::write(&path, &bytes).unwrap();
        assert!(
            read_framed(&path, b"NGRTEST1", 7)
                .unwrap_err()
                .contains("length")
        );
        std::fs::remove_dir_all(&dir).ok();
    }
}
