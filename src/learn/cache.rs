//! A cache of prepared clouds on disk, so a second training run on the same bin skips the
//! clean-up. One file per entry, keyed by the scan file's content and the recipe; what is stored
//! is opaque bytes chosen by the caller.

use std::ffi::OsString;
use std::fs;
use std::io::{self, Read};
use std::path::{Path, PathBuf};

use sha2::{Digest, Sha256};

use crate::fsutil::write_atomic;

/// Bump when the layout of an entry, or the meaning of what callers store, changes: old entries
/// then simply miss.
pub const CACHE_FORMAT_VERSION: u32 = 1;

/// Names the folder of cache entries, overriding the default location.
pub const CACHE_ENV: &str = "PARTSIFT_CACHE";

const MAGIC: &[u8; 8] = b"PSFTPREP";
const DIGEST_LEN: usize = 32;
/// magic, format version (u32 LE), key, payload length (u64 LE).
const HEADER_LEN: usize = MAGIC.len() + 4 + DIGEST_LEN + 8;
const ENTRY_EXTENSION: &str = "prep";

/// What an entry is found by: SHA-256 over the format version, the scan file's SHA-256 and the
/// recipe fingerprint.
#[derive(Clone, Debug, PartialEq, Eq, Hash)]
pub struct CacheKey([u8; DIGEST_LEN]);

impl CacheKey {
    /// The key of the scan file at `path` (read through once, not held in memory) prepared with
    /// the recipe whose fingerprint is `recipe_fingerprint` (any text that changes whenever the
    /// recipe's result would). Errors when the file cannot be read.
    pub fn for_file(path: &Path, recipe_fingerprint: &str) -> io::Result<CacheKey> {
        let mut content = Sha256::new();
        let mut file = fs::File::open(path)?;
        let mut buffer = [0u8; 64 * 1024];
        loop {
            match file.read(&mut buffer) {
                Ok(0) => break,
                Ok(n) => content.update(&buffer[..n]),
                Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
                Err(e) => return Err(e),
            }
        }
        let content: [u8; DIGEST_LEN] = content.finalize().into();
        Ok(CacheKey::new(&content, recipe_fingerprint))
    }

    fn new(content_digest: &[u8; DIGEST_LEN], recipe_fingerprint: &str) -> CacheKey {
        let mut key = Sha256::new();
        key.update(b"partsift prepared cloud\0");
        key.update(CACHE_FORMAT_VERSION.to_le_bytes());
        key.update(content_digest);
        // Length first, so no two (content, recipe) pairs hash the same bytes.
        key.update((recipe_fingerprint.len() as u64).to_le_bytes());
        key.update(recipe_fingerprint.as_bytes());
        CacheKey(key.finalize().into())
    }

    fn file_name(&self) -> String {
        let hex: String = self.0.iter().map(|b| format!("{b:02x}")).collect();
        format!("{hex}.{ENTRY_EXTENSION}")
    }
}

/// The cache folder and its entries. Reading never fails: an entry that is missing, truncated,
/// corrupt, of another format version or of another key is a miss, and the next [`put`] replaces it.
///
/// [`put`]: PreparedCache::put
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct PreparedCache {
    dir: PathBuf,
}

impl PreparedCache {
    /// A cache in `dir` (created on the first [`PreparedCache::put`]).
    pub fn new(dir: impl Into<PathBuf>) -> Self {
        PreparedCache { dir: dir.into() }
    }

    /// The cache at `$PARTSIFT_CACHE` if set, else `$XDG_CACHE_HOME/partsift/prepared`, else
    /// `$HOME/.cache/partsift/prepared`; `None` when none of these is set.
    pub fn at_default_location() -> Option<Self> {
        default_dir(|name| std::env::var_os(name)).map(PreparedCache::new)
    }

    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// The bytes stored under `key`, or `None` for a miss (never an error, see the type's doc).
    pub fn get(&self, key: &CacheKey) -> Option<Vec<u8>> {
        let entry = fs::read(self.dir.join(key.file_name())).ok()?;
        let (header, rest) = entry.split_at_checked(HEADER_LEN)?;
        let (magic, header) = header.split_at(MAGIC.len());
        let (version, header) = header.split_at(4);
        let (stored_key, length) = header.split_at(DIGEST_LEN);
        let length = usize::try_from(u64::from_le_bytes(length.try_into().ok()?)).ok()?;
        let fits = magic == MAGIC
            && version == CACHE_FORMAT_VERSION.to_le_bytes()
            && stored_key == key.0
            && rest.len() == length.checked_add(DIGEST_LEN)?;
        if !fits {
            return None;
        }
        let (payload, digest) = rest.split_at(length);
        (Sha256::digest(payload).as_slice() == digest).then(|| payload.to_vec())
    }

    /// Stores `value` under `key`, replacing what was there, atomically: a crash leaves the old
    /// entry or the new one, never half of one. Errors when the folder cannot be made or written
    /// (the caller may go on without the cache).
    pub fn put(&self, key: &CacheKey, value: &[u8]) -> io::Result<()> {
        fs::create_dir_all(&self.dir)?;
        write_atomic(&self.dir.join(key.file_name()), |out| {
            out.write_all(MAGIC)?;
            out.write_all(&CACHE_FORMAT_VERSION.to_le_bytes())?;
            out.write_all(&key.0)?;
            out.write_all(&(value.len() as u64).to_le_bytes())?;
            out.write_all(value)?;
            out.write_all(&Sha256::digest(value))
        })
    }
}

/// See [`PreparedCache::at_default_location`]; `var` reads an environment variable. Empty values
/// count as unset, and so does a relative `XDG_CACHE_HOME` (the XDG Base Directory
/// Specification says to ignore it).
fn default_dir(var: impl Fn(&str) -> Option<OsString>) -> Option<PathBuf> {
    let set = |name| var(name).filter(|v| !v.is_empty()).map(PathBuf::from);
    if let Some(dir) = set(CACHE_ENV) {
        return Some(dir);
    }
    let base = set("XDG_CACHE_HOME")
        .filter(|p| p.is_absolute())
        .or_else(|| set("HOME").map(|home| home.join(".cache")))?;
    Some(base.join("partsift").join("prepared"))
}

#[cfg(test)]
mod tests {
    use super::*;

    struct TempDir(PathBuf);
    impl TempDir {
        fn new(tag: &str) -> Self {
            let dir =
                std::env::temp_dir().join(format!("partsift-cache-{tag}-{}", std::process::id()));
            let _ = fs::remove_dir_all(&dir);
            fs::create_dir_all(&dir).unwrap();
            TempDir(dir)
        }
    }
    impl Drop for TempDir {
        fn drop(&mut self) {
            let _ = fs::remove_dir_all(&self.0);
        }
    }

    fn scan_file(dir: &Path, name: &str, content: &[u8]) -> PathBuf {
        let path = dir.join(name);
        fs::write(&path, content).unwrap();
        path
    }

    #[test]
    fn hit_after_put_and_miss_for_other_content_or_recipe() {
        let dir = TempDir::new("hit");
        let cache = PreparedCache::new(dir.0.join("cache"));
        let scan = scan_file(&dir.0, "a.ply", b"ply\nformat ascii 1.0\n");
        let key = CacheKey::for_file(&scan, "recipe v1").unwrap();
        assert_eq!(cache.get(&key), None);
        cache.put(&key, b"prepared points").unwrap();
        assert_eq!(cache.get(&key).as_deref(), Some(&b"prepared points"[..]));

        // The same bytes under another name hit; other bytes or another recipe miss.
        let copy = scan_file(&dir.0, "copy.ply", b"ply\nformat ascii 1.0\n");
        assert_eq!(CacheKey::for_file(&copy, "recipe v1").unwrap(), key);
        assert_ne!(CacheKey::for_file(&scan, "recipe v2").unwrap(), key);
        scan_file(&dir.0, "a.ply", b"ply\nformat ascii 1.0\n\n");
        assert_ne!(CacheKey::for_file(&scan, "recipe v1").unwrap(), key);

        cache.put(&key, b"").unwrap();
        assert_eq!(cache.get(&key), Some(vec![]));
        assert!(CacheKey::for_file(&dir.0.join("missing.ply"), "r").is_err());
    }

    #[test]
    fn damaged_entries_are_misses_and_get_replaced() {
        let dir = TempDir::new("damaged");
        let cache = PreparedCache::new(&dir.0);
        let scan = scan_file(&dir.0, "a.xyz", b"1 2 3\n");
        let key = CacheKey::for_file(&scan, "r").unwrap();
        let other = CacheKey::for_file(&scan, "other").unwrap();
        cache.put(&key, &[7u8; 1000]).unwrap();
        let entry = dir.0.join(key.file_name());
        let good = fs::read(&entry).unwrap();

        let mut damaged: Vec<Vec<u8>> = vec![
            vec![],
            good[..10].to_vec(),
            good[..HEADER_LEN].to_vec(),
            good[..good.len() - 1].to_vec(),
            [good.as_slice(), b"x"].concat(),
        ];
        for at in [0, 9, 20, HEADER_LEN + 500, good.len() - 3] {
            let mut flipped = good.clone();
            flipped[at] ^= 0x40;
            damaged.push(flipped);
        }
        let mut huge_length = good.clone();
        huge_length[HEADER_LEN - 8..HEADER_LEN].copy_from_slice(&u64::MAX.to_le_bytes());
        damaged.push(huge_length);
        for (i, bytes) in damaged.iter().enumerate() {
            fs::write(&entry, bytes).unwrap();
            assert_eq!(cache.get(&key), None, "damaged entry {i} read as a hit");
        }
        // An entry moved under another key's name is not that key's.
        fs::write(dir.0.join(other.file_name()), &good).unwrap();
        assert_eq!(cache.get(&other), None);

        cache.put(&key, b"fresh").unwrap();
        assert_eq!(cache.get(&key).as_deref(), Some(&b"fresh"[..]));
    }

    #[test]
    fn an_unwritable_cache_is_an_error_not_a_panic() {
        let dir = TempDir::new("unwritable");
        let not_a_folder = scan_file(&dir.0, "file", b"");
        let cache = PreparedCache::new(not_a_folder.join("cache"));
        let key = CacheKey::for_file(&not_a_folder, "r").unwrap();
        assert!(cache.put(&key, b"x").is_err());
        assert_eq!(cache.get(&key), None);
    }

    #[test]
    fn default_location_follows_the_environment() {
        let env = |pairs: &'static [(&'static str, &'static str)]| {
            move |name: &str| {
                pairs
                    .iter()
                    .find(|(k, _)| *k == name)
                    .map(|(_, v)| OsString::from(v))
            }
        };
        assert_eq!(
            default_dir(env(&[("PARTSIFT_CACHE", "/tmp/c"), ("HOME", "/home/q")])),
            Some(PathBuf::from("/tmp/c"))
        );
        assert_eq!(
            default_dir(env(&[("XDG_CACHE_HOME", "/var/x"), ("HOME", "/home/q")])),
            Some(PathBuf::from("/var/x/partsift/prepared"))
        );
        assert_eq!(
            default_dir(env(&[("XDG_CACHE_HOME", "rel"), ("HOME", "/home/q")])),
            Some(PathBuf::from("/home/q/.cache/partsift/prepared"))
        );
        assert_eq!(
            default_dir(env(&[("PARTSIFT_CACHE", ""), ("HOME", "/home/q")])),
            Some(PathBuf::from("/home/q/.cache/partsift/prepared"))
        );
        assert_eq!(default_dir(env(&[])), None);
    }
}
