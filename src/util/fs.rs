//! Files: whole-file reads with messages in words, and atomic writes.

use std::io::Write;
use std::path::{Path, PathBuf};

use crate::error::Result;

/// Writes `bytes` to `path` atomically: a temporary file in the same folder, flushed to
/// disk, then renamed over `path`. A crash or kill during the write leaves any previous file
/// intact.
///
/// # Errors
/// [`crate::Error::Io`] if the folder is not writable.
pub(crate) fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    let dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "output".into());
    let tmp = dir.join(format!(".{name}.tmp-{}", std::process::id()));
    let result = (|| -> std::io::Result<()> {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
        std::fs::rename(&tmp, path)
    })();
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    Ok(result?)
}

/// Reads a whole file, describing a failure in words for an error message.
pub(crate) fn read_file(path: &Path) -> std::result::Result<Vec<u8>, String> {
    std::fs::read(path).map_err(|e| match e.kind() {
        std::io::ErrorKind::NotFound => "file not found; check the path".to_string(),
        _ => format!("cannot read the file ({e}); check its permissions"),
    })
}
