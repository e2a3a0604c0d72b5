//! Atomic output folders: everything is written into a temporary folder beside OUT and
//! renamed into place at the end. A run that fails or is killed leaves OUT as it was.

use std::path::{Path, PathBuf};

use crate::error::{Error, Result};

/// A temporary folder that becomes OUT on [`commit`](OutputDir::commit) and is removed
/// otherwise.
pub struct OutputDir {
    tmp: PathBuf,
    target: PathBuf,
    force: bool,
    committed: bool,
}

/// Checks OUT before any work is done, and creates the temporary folder beside it.
///
/// OUT may be missing or an empty folder; a non-empty folder needs `force`; a file is
/// refused.
pub fn prepare_output(target: &Path, force: bool) -> Result<OutputDir> {
    if target.is_file() {
        return Err(Error::output(
            target,
            "is a file, not a folder",
            "give a folder name for the outputs (-o DIR)",
        ));
    }
    if target.is_dir() {
        let non_empty = std::fs::read_dir(target)
            .map_err(|e| {
                Error::output(
                    target,
                    format!("cannot be read: {e}"),
                    "check the folder's permissions",
                )
            })?
            .next()
            .is_some();
        if non_empty && !force {
            return Err(Error::output(
                target,
                "already holds files",
                "choose another output folder, or add --force to replace its contents",
            ));
        }
    }
    let parent = match target.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    if !parent.is_dir() {
        return Err(Error::output(
            target,
            "cannot be created: its parent folder does not exist",
            "create the parent folder first",
        ));
    }
    let name = target
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "out".into());
    remove_stale(&parent, &name);
    let tmp = parent.join(format!(".{name}.modalmap-tmp-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&tmp);
    std::fs::create_dir(&tmp).map_err(|e| {
        Error::output(
            &tmp,
            format!("cannot be created: {e}"),
            "check that the output's parent folder is writable",
        )
    })?;
    Ok(OutputDir {
        tmp,
        target: target.to_path_buf(),
        force,
        committed: false,
    })
}

/// Removes temporary folders that a killed run left beside OUT: those of our naming
/// pattern whose process no longer exists (checked through /proc, so only on Linux;
/// elsewhere they are left alone).
fn remove_stale(parent: &Path, name: &str) {
    let prefix = format!(".{name}.modalmap-tmp-");
    let Ok(entries) = std::fs::read_dir(parent) else {
        return;
    };
    for e in entries.flatten() {
        let file = e.file_name().to_string_lossy().into_owned();
        let Some(rest) = file.strip_prefix(&prefix) else {
            continue;
        };
        let pid = rest.trim_end_matches(".old");
        let alive = Path::new("/proc").join(pid).exists();
        if pid.parse::<u32>().is_ok() && Path::new("/proc/self").exists() && !alive {
            let _ = std::fs::remove_dir_all(e.path());
        }
    }
}

impl OutputDir {
    /// Path of a file inside the temporary folder.
    pub fn path(&self, name: &str) -> PathBuf {
        self.tmp.join(name)
    }

    /// Writes a whole file inside the temporary folder.
    pub fn write(&self, name: &str, bytes: &[u8]) -> Result<()> {
        let p = self.path(name);
        std::fs::write(&p, bytes).map_err(|e| {
            Error::output(
                &p,
                format!("could not be written: {e}"),
                "check free disk space",
            )
        })
    }

    /// Moves the finished folder into place. With `force`, the old contents are moved
    /// aside first and deleted only after the new folder is in place.
    pub fn commit(mut self) -> Result<PathBuf> {
        let err = |e: std::io::Error| {
            Error::output(
                &self.target,
                format!("could not be replaced: {e}"),
                "check permissions of the output folder and its parent",
            )
        };
        let mut old = None;
        if self.target.is_dir() {
            let empty = std::fs::read_dir(&self.target)
                .map_err(err)?
                .next()
                .is_none();
            if empty {
                std::fs::remove_dir(&self.target).map_err(err)?;
            } else if self.force {
                let aside = self.tmp.with_extension("old");
                std::fs::rename(&self.target, &aside).map_err(err)?;
                old = Some(aside);
            } else {
                return Err(Error::output(
                    &self.target,
                    "appeared while modalmap was running",
                    "run again with another output folder",
                ));
            }
        }
        if let Err(e) = std::fs::rename(&self.tmp, &self.target) {
            if let Some(a) = &old {
                let _ = std::fs::rename(a, &self.target);
            }
            return Err(err(e));
        }
        self.committed = true;
        if let Some(a) = old {
            let _ = std::fs::remove_dir_all(a);
        }
        Ok(self.target.clone())
    }
}

impl Drop for OutputDir {
    fn drop(&mut self) {
        if !self.committed {
            let _ = std::fs::remove_dir_all(&self.tmp);
        }
    }
}
