//! Whole-file writes that a reader (or a crash) never sees half done.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};

use crate::error::{Error, Result};

/// Writes `bytes` to `path` through a temporary file in the same folder (named by the
/// process and a counter, so threads writing at once never share one), fsync, rename,
/// then fsync of the folder. On failure the temporary file is removed and `path` is
/// left as it was.
///
/// # Errors
/// [`Error::Io`] naming the file at fault; [`Error::NotAFile`] for a path without a
/// file name.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    static COUNTER: AtomicUsize = AtomicUsize::new(0);
    let dir = path
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    let name = path.file_name().ok_or_else(|| Error::NotAFile {
        path: path.to_path_buf(),
    })?;
    let tmp: PathBuf = dir.join(format!(
        ".{}.tmp-{}-{}",
        name.to_string_lossy(),
        std::process::id(),
        COUNTER.fetch_add(1, Ordering::Relaxed)
    ));
    let result = (|| {
        let mut f = std::fs::File::create(&tmp).map_err(|e| Error::io(&tmp, e))?;
        f.write_all(bytes).map_err(|e| Error::io(&tmp, e))?;
        f.sync_all().map_err(|e| Error::io(&tmp, e))?;
        std::fs::rename(&tmp, path).map_err(|e| Error::io(path, e))?;
        if let Ok(d) = std::fs::File::open(dir) {
            let _ = d.sync_all();
        }
        Ok(())
    })();
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    result
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn replaces_the_file_and_leaves_no_temporary() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("a.txt");
        write_atomic(&path, b"first").unwrap();
        write_atomic(&path, b"second").unwrap();
        assert_eq!(std::fs::read(&path).unwrap(), b"second");
        let names: Vec<_> = std::fs::read_dir(dir.path())
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .collect();
        assert_eq!(names.len(), 1, "{names:?}");
    }

    #[test]
    fn a_failed_write_names_the_path_and_keeps_nothing() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("no-such-folder").join("a.txt");
        let err = write_atomic(&path, b"x").unwrap_err();
        assert!(matches!(err, Error::Io { .. }));
        assert!(err.to_string().contains("no-such-folder"), "{err}");
        assert!(matches!(
            write_atomic(Path::new("/"), b"x"),
            Err(Error::NotAFile { .. })
        ));
    }
}
