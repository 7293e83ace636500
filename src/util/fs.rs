//! Files: whole-file reads with messages in words, and atomic writes.
//!
//! Every file the crate writes goes through [`AtomicFile`]: the bytes go to a temporary file
//! `.NAME.tmp-PID` in the destination's folder, which is flushed to disk and then renamed
//! over the destination, so a crash or kill leaves either the old file or the new one. A
//! destination that is a symbolic link is written through: the link stays and its target is
//! replaced. A destination that exists but is not a regular file (a folder, a device, a
//! pipe) is refused. Temporary files left by killed writers of the same destination are
//! removed at the next write, when their process is gone.

use std::io::Write;
use std::path::{Path, PathBuf};

use crate::error::{Error, Result};

/// Writes `bytes` to `path` atomically (see the module docs).
///
/// # Errors
/// [`Error::Io`] if the folder is not writable; [`Error::Data`] for a destination that is
/// not a regular file.
pub(crate) fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    let mut f = AtomicFile::create(path)?;
    f.write_all(bytes)?;
    f.commit()
}

/// The file a write to `path` really replaces: `path`, or the target of the symbolic link at
/// `path` (links followed to the end).
///
/// # Errors
/// [`Error::Data`] when `path` exists (after following links) and is not a regular file, or
/// is a dangling link.
pub(crate) fn destination(path: &Path) -> Result<PathBuf> {
    let refuse = |reason: String| Error::Data {
        path: path.to_path_buf(),
        reason,
    };
    match std::fs::symlink_metadata(path) {
        Err(_) => Ok(path.to_path_buf()),
        Ok(m) if m.file_type().is_symlink() => {
            let target = std::fs::canonicalize(path).map_err(|_| {
                refuse("is a symbolic link whose target does not exist; give a file name".into())
            })?;
            let tm = std::fs::metadata(&target)?;
            if !tm.is_file() {
                return Err(refuse(format!(
                    "links to {}, which is not a regular file; give a file name",
                    target.display()
                )));
            }
            Ok(target)
        }
        Ok(m) if m.is_file() => Ok(path.to_path_buf()),
        Ok(m) => Err(refuse(format!(
            "exists and is not a regular file ({}); give the name of a file to write",
            if m.is_dir() {
                "a folder"
            } else {
                "a device, pipe or socket"
            }
        ))),
    }
}

fn folder_of(path: &Path) -> PathBuf {
    match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    }
}

fn temp_prefix(path: &Path) -> String {
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "output".into());
    format!(".{name}.tmp-")
}

/// Whether process `pid` is running (Linux: `/proc/PID` exists; elsewhere assumed running,
/// so nothing is removed).
fn process_alive(pid: u32) -> bool {
    if cfg!(target_os = "linux") {
        Path::new(&format!("/proc/{pid}")).exists()
    } else {
        true
    }
}

/// Removes `.NAME.tmp-PID` files beside `path` whose process is gone (left by killed writes).
fn remove_stale_temporaries(path: &Path) {
    let dir = folder_of(path);
    let prefix = temp_prefix(path);
    let Ok(entries) = std::fs::read_dir(&dir) else {
        return;
    };
    for e in entries.flatten() {
        let name = e.file_name().to_string_lossy().into_owned();
        let Some(pid) = name
            .strip_prefix(&prefix)
            .and_then(|p| p.parse::<u32>().ok())
        else {
            continue;
        };
        let is_file = e.file_type().map(|t| t.is_file()).unwrap_or(false);
        if is_file && pid != std::process::id() && !process_alive(pid) {
            let _ = std::fs::remove_file(e.path());
        }
    }
}

/// A file being written atomically: write to it, then [`AtomicFile::commit`]. Dropped
/// without committing, it removes its temporary file and leaves the destination as it was.
#[derive(Debug)]
pub(crate) struct AtomicFile {
    target: PathBuf,
    tmp: PathBuf,
    file: Option<std::io::BufWriter<std::fs::File>>,
}

impl AtomicFile {
    /// Starts writing `path` (see the module docs).
    ///
    /// # Errors
    /// As [`write_atomic`].
    pub(crate) fn create(path: &Path) -> Result<Self> {
        let target = destination(path)?;
        let folder = folder_of(&target);
        if !folder.is_dir() {
            return Err(Error::Data {
                path: path.to_path_buf(),
                reason: format!(
                    "the folder {} does not exist; create it first",
                    folder.display()
                ),
            });
        }
        remove_stale_temporaries(&target);
        let tmp = folder.join(format!("{}{}", temp_prefix(&target), std::process::id()));
        let file = std::fs::File::create(&tmp).map_err(|e| Error::Data {
            path: path.to_path_buf(),
            reason: format!(
                "cannot write in the folder {} ({e}); choose a writable folder",
                folder.display()
            ),
        })?;
        Ok(Self {
            target,
            tmp,
            file: Some(std::io::BufWriter::new(file)),
        })
    }

    /// Flushes to disk and renames the temporary file over the destination.
    ///
    /// # Errors
    /// [`Error::Io`] if the data cannot be written or the rename fails.
    pub(crate) fn commit(mut self) -> Result<()> {
        let result = (|| -> std::io::Result<()> {
            if let Some(f) = self.file.take() {
                let f = f.into_inner().map_err(|e| e.into_error())?;
                f.sync_all()?;
            }
            std::fs::rename(&self.tmp, &self.target)
        })();
        if result.is_err() {
            let _ = std::fs::remove_file(&self.tmp);
        }
        Ok(result?)
    }
}

impl Write for AtomicFile {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        match &mut self.file {
            Some(f) => f.write(buf),
            None => Err(std::io::Error::other("the file was already committed")),
        }
    }

    fn flush(&mut self) -> std::io::Result<()> {
        match &mut self.file {
            Some(f) => f.flush(),
            None => Ok(()),
        }
    }
}

impl Drop for AtomicFile {
    fn drop(&mut self) {
        if self.file.take().is_some() {
            let _ = std::fs::remove_file(&self.tmp);
        }
    }
}

/// Checks, before any work, that the crate can write `path` the way it writes every output
/// (atomically: a temporary file in the same folder, renamed over the destination), and
/// returns the file such a write replaces: `path`, or the target of the symbolic link at
/// `path` (writes go through links). Call it before a long fit so that an unwritable output
/// is found first.
///
/// # Errors
/// [`Error::Data`] naming the path when it exists and is not a regular file (a folder, a
/// device, a pipe), is a dangling link, or its folder is missing or not writable.
///
/// # Example
/// ```
/// let dir = std::env::temp_dir();
/// assert!(neural_sde::writable_destination(&dir.join("model.safetensors")).is_ok());
/// assert!(neural_sde::writable_destination(&dir).is_err()); // a folder
/// ```
pub fn writable_destination(path: &Path) -> Result<PathBuf> {
    let f = AtomicFile::create(path)?;
    let target = f.target.clone();
    drop(f);
    Ok(target)
}

/// Reads a whole file, describing a failure in words for an error message.
pub(crate) fn read_file(path: &Path) -> std::result::Result<Vec<u8>, String> {
    let mut file = open_file(path)?;
    let mut bytes = Vec::new();
    std::io::Read::read_to_end(&mut file, &mut bytes)
        .map_err(|e| format!("cannot read the file ({e}); check its permissions"))?;
    Ok(bytes)
}

/// Opens a file for reading, with the reason in words when it cannot be read (missing, a
/// folder, no permission).
pub(crate) fn open_file(path: &Path) -> std::result::Result<std::fs::File, String> {
    if path.is_dir() {
        return Err("this is a folder, not a file; give the path of a file".to_string());
    }
    std::fs::File::open(path).map_err(|e| match e.kind() {
        std::io::ErrorKind::NotFound => "file not found; check the path".to_string(),
        _ => format!("cannot read the file ({e}); check its permissions"),
    })
}
