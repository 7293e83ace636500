//! The files a command reads and writes, checked together before any work: no output may be
//! an input or another output (compared by file identity, not by name), and every output
//! must be writable where it is.

use std::path::{Path, PathBuf};

use super::Failure;

/// What identifies a file: device and inode when it exists, else its canonical folder and
/// name.
#[derive(Debug, PartialEq, Eq)]
enum Identity {
    Inode(u64, u64),
    Name(PathBuf),
}

fn identity(path: &Path) -> Option<Identity> {
    if let Ok(m) = std::fs::metadata(path) {
        #[cfg(unix)]
        {
            use std::os::unix::fs::MetadataExt;
            return Some(Identity::Inode(m.dev(), m.ino()));
        }
        #[cfg(not(unix))]
        {
            let _ = m;
            return std::fs::canonicalize(path).ok().map(Identity::Name);
        }
    }
    let dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    };
    let name = path.file_name()?;
    std::fs::canonicalize(dir)
        .ok()
        .map(|d| Identity::Name(d.join(name)))
}

/// The inputs and outputs of one command.
#[derive(Debug, Default)]
pub struct Files {
    inputs: Vec<(&'static str, PathBuf)>,
    outputs: Vec<(&'static str, PathBuf)>,
}

impl Files {
    /// A file the command reads (`what` names it in messages).
    pub fn input(&mut self, what: &'static str, path: Option<&Path>) -> &mut Self {
        if let Some(p) = path {
            self.inputs.push((what, p.to_path_buf()));
        }
        self
    }

    /// A file the command writes, given by option `option`.
    pub fn output(&mut self, option: &'static str, path: Option<&Path>) -> &mut Self {
        if let Some(p) = path {
            self.outputs.push((option, p.to_path_buf()));
        }
        self
    }

    /// Refuses an output that is an input or another output, or that cannot be written.
    pub fn check(&self) -> Result<(), Failure> {
        for (i, (opt, out)) in self.outputs.iter().enumerate() {
            let id = identity(out);
            for (what, input) in &self.inputs {
                if id.is_some() && id == identity(input) {
                    return Err(Failure::input(format!(
                        "{opt} {} is the same file as the {what} {}; writing it would destroy the {what}: choose another output name",
                        out.display(),
                        input.display()
                    )));
                }
            }
            for (other_opt, other) in &self.outputs[..i] {
                if id.is_some() && id == identity(other) {
                    return Err(Failure::input(format!(
                        "{opt} {} and {other_opt} {} are the same file; give each output its own name",
                        out.display(),
                        other.display()
                    )));
                }
            }
            neural_sde::writable_destination(out).map_err(|e| {
                Failure::input(format!("{opt}: {}", super::first_line(&e.to_string())))
            })?;
        }
        Ok(())
    }
}
