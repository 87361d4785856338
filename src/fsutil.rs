//! Writing files so that a crash or a full disk never leaves a half-written file behind.

use std::fs;
use std::io::{self, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};

/// Writes a file atomically: the bytes go to a temporary file beside `path`, which is
/// flushed to disk and then renamed over `path`. On any error the temporary file is removed
/// and `path` is left as it was.
pub fn write_atomic(
    path: &Path,
    write: impl FnOnce(&mut dyn Write) -> io::Result<()>,
) -> io::Result<()> {
    let tmp = temporary_sibling(path);
    let result = (|| {
        let file = fs::File::create(&tmp)?;
        let mut out = io::BufWriter::new(file);
        write(&mut out)?;
        let file = out.into_inner().map_err(|e| e.into_error())?;
        file.sync_all()?;
        fs::rename(&tmp, path)
    })();
    if result.is_err() {
        let _ = fs::remove_file(&tmp);
    }
    result
}

/// `dir/.name.partsift-tmp-<pid>-<n>`: hidden, in the same folder (so rename stays on one file
/// system), and unique per call so two threads writing the same path never share one.
fn temporary_sibling(path: &Path) -> PathBuf {
    static NEXT: AtomicU64 = AtomicU64::new(0);
    let n = NEXT.fetch_add(1, Ordering::Relaxed);
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    path.with_file_name(format!(".{name}.partsift-tmp-{}-{n}", std::process::id()))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn failed_write_leaves_old_file_and_no_temporary() {
        let dir = std::env::temp_dir().join(format!("partsift-fsutil-{}", std::process::id()));
        fs::create_dir_all(&dir).unwrap();
        let path = dir.join("model.bin");
        fs::write(&path, b"old").unwrap();
        let err = write_atomic(&path, |out| {
            out.write_all(b"half")?;
            Err(io::Error::other("disk full"))
        });
        assert!(err.is_err());
        assert_eq!(fs::read(&path).unwrap(), b"old");
        assert_eq!(
            fs::read_dir(&dir).unwrap().count(),
            1,
            "temporary file left behind"
        );
        write_atomic(&path, |out| out.write_all(b"new")).unwrap();
        assert_eq!(fs::read(&path).unwrap(), b"new");
        fs::remove_dir_all(&dir).unwrap();
    }
}
