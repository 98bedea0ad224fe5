//! Writing outputs so that a failure never leaves a partial result behind.
//!
//! A run's files are written into a staging folder beside the destination and
//! renamed into place only when every file is complete; an existing
//! destination is replaced only with `--force`. Single files (the lock record)
//! are written to a temporary sibling and renamed. This module knows nothing
//! about what the files contain.

use crate::error::{Error, ErrorKind, Location, Problem};
use std::path::{Path, PathBuf};

/// Write `bytes` to `path` through a temporary sibling file and a rename.
pub fn write_atomically(path: &Path, bytes: &[u8]) -> Result<(), Error> {
    let shown = path.display().to_string();
    let file_name = path
        .file_name()
        .map(|name| name.to_string_lossy().into_owned())
        .unwrap_or_default();
    let temporary = path.with_file_name(format!(".{file_name}.partial-{}", std::process::id()));
    std::fs::write(&temporary, bytes).map_err(|cause| Error::io(&shown, "write", &cause))?;
    std::fs::rename(&temporary, path).map_err(|cause| {
        let _ = std::fs::remove_file(&temporary);
        Error::io(&shown, "move into place", &cause)
    })
}

/// A set of output files, written together or not at all.
pub struct Staged {
    files: Vec<(String, Vec<u8>)>,
}

impl Staged {
    pub fn new() -> Staged {
        Staged { files: Vec::new() }
    }

    /// Add a file at a relative path (folders separated by `/`).
    pub fn add(&mut self, relative: impl Into<String>, bytes: Vec<u8>) {
        self.files.push((relative.into(), bytes));
    }

    pub fn files(&self) -> &[(String, Vec<u8>)] {
        &self.files
    }

    /// Write every file into `destination`. Refuses an existing destination
    /// unless `force`; on any failure removes what it wrote.
    pub fn commit(&self, destination: &Path, force: bool) -> Result<(), Error> {
        let shown = destination.display().to_string();
        if destination.exists() && !force {
            return Err(Error::one(
                Problem::new(ErrorKind::OutputExists, "the output folder already exists; give --force to replace it, or choose another folder")
                    .at(Location::file(shown)),
            ));
        }
        let staging = staging_path(destination);
        let result = self.write_into(&staging).and_then(|()| {
            if destination.exists() {
                if !destination.is_dir() {
                    return Err(Error::one(
                        Problem::new(
                            ErrorKind::OutputExists,
                            "the output path exists and is not a folder",
                        )
                        .at(Location::file(shown.clone())),
                    ));
                }
                std::fs::remove_dir_all(destination).map_err(|cause| {
                    Error::io(&shown, "remove the previous output folder", &cause)
                })?;
            }
            std::fs::rename(&staging, destination)
                .map_err(|cause| Error::io(&shown, "move the finished outputs into place", &cause))
        });
        if result.is_err() {
            let _ = std::fs::remove_dir_all(&staging);
        }
        result
    }

    fn write_into(&self, folder: &Path) -> Result<(), Error> {
        let shown = folder.display().to_string();
        if folder.exists() {
            std::fs::remove_dir_all(folder)
                .map_err(|cause| Error::io(&shown, "clear a stale staging folder", &cause))?;
        }
        std::fs::create_dir_all(folder)
            .map_err(|cause| Error::io(&shown, "create the staging folder", &cause))?;
        for (relative, bytes) in &self.files {
            let path = folder.join(relative);
            if let Some(parent) = path.parent() {
                std::fs::create_dir_all(parent)
                    .map_err(|cause| Error::io(&shown, "create an output folder", &cause))?;
            }
            std::fs::write(&path, bytes)
                .map_err(|cause| Error::io(&path.display().to_string(), "write", &cause))?;
        }
        Ok(())
    }
}

impl Default for Staged {
    fn default() -> Self {
        Staged::new()
    }
}

fn staging_path(destination: &Path) -> PathBuf {
    let name = destination
        .file_name()
        .map(|name| name.to_string_lossy().into_owned())
        .unwrap_or_else(|| "out".to_string());
    destination.with_file_name(format!(".{name}.partial-{}", std::process::id()))
}
