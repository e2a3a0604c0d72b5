//! Atomic output folders and files: everything is written into a temporary folder beside
//! OUT and renamed into place at the end. A run that fails, is interrupted or is killed
//! leaves OUT as it was (or complete), and the next run cleans up after it.
//!
//! Beside OUT (`P/NAME`) a run keeps
//! - `P/.NAME.modalmap-lock`: a lock file, held (`flock`) for the whole run; it records the
//!   process id, the boot id and the process start time for a person reading it. A free
//!   lock means no live run (on this or, through the shared file system, another machine
//!   or PID namespace) is writing OUT, so its leftovers may be cleaned;
//! - `P/.NAME.modalmap-tmp-PID`: the new contents while they are written;
//! - `P/.NAME.modalmap-old-PID`: the old contents during the commit, between moving them
//!   aside and removing them.
//!
//! The commit is: OUT → aside, temp → OUT, remove aside. A run killed between the two
//! renames leaves OUT missing and the old results aside; the next run (holding the free
//! lock) moves them back before doing anything else.

use std::fs::File;
use std::path::{Path, PathBuf};

use crate::cleanup::registry;
use crate::error::{Error, Result};

const LOCK: &str = "modalmap-lock";
const TMP: &str = "modalmap-tmp-";
const OLD: &str = "modalmap-old-";
const SCRATCH: &str = "modalmap-scratch-";

/// Longest file name most file systems accept, in bytes.
const NAME_MAX: usize = 255;

/// A held lock on an output's name, released (and its file removed) on drop.
struct OutputLock {
    path: PathBuf,
    file: File,
    ticket: u64,
}

impl OutputLock {
    /// Takes the lock of `target`, or says which run holds it.
    fn take(target: &Path) -> Result<OutputLock> {
        let (parent, name) = split(target);
        let path = parent.join(format!(".{name}.{LOCK}"));
        for _ in 0..5 {
            let file = std::fs::OpenOptions::new()
                .read(true)
                .write(true)
                .create(true)
                .truncate(false)
                .open(&path)
                .map_err(|e| {
                    Error::output(
                        target,
                        format!(
                            "cannot be written: its lock file {} cannot be created ({e})",
                            path.display()
                        ),
                        "check that the output's parent folder exists and is writable",
                    )
                })?;
            match file.try_lock() {
                Ok(()) => {}
                Err(std::fs::TryLockError::WouldBlock) => {
                    let who = std::fs::read_to_string(&path).unwrap_or_default();
                    return Err(Error::output(
                        target,
                        format!(
                            "is being written by another modalmap run ({})",
                            who.lines().next().unwrap_or("unknown process")
                        ),
                        "wait for that run to finish, or choose another output",
                    ));
                }
                Err(std::fs::TryLockError::Error(e)) => {
                    return Err(Error::output(
                        target,
                        format!("cannot be locked ({e})"),
                        "write the outputs to a local folder whose file system supports locks",
                    ))
                }
            }
            // The file may have been removed by the run that held it just before we
            // locked it: then the lock is on a dead inode, and we try again.
            if same_file(&file, &path) {
                let ticket = registry().add(&path);
                let mut lock = OutputLock { path, file, ticket };
                lock.describe();
                return Ok(lock);
            }
        }
        Err(Error::output(
            target,
            "cannot be locked: its lock file keeps changing",
            "check that no other program is writing beside the output",
        ))
    }

    /// Writes who holds the lock, for a person who finds it.
    fn describe(&mut self) {
        use std::io::{Seek, Write};
        let boot = std::fs::read_to_string("/proc/sys/kernel/random/boot_id").unwrap_or_default();
        let start = std::fs::read_to_string("/proc/self/stat")
            .ok()
            .and_then(|s| {
                let after = s.rsplit_once(')')?.1.to_string();
                after.split_whitespace().nth(19).map(str::to_string)
            })
            .unwrap_or_default();
        let text = format!(
            "pid {} (boot {}, start {} ticks)\n",
            std::process::id(),
            boot.trim(),
            start
        );
        let _ = self.file.set_len(0);
        let _ = self.file.rewind();
        let _ = self.file.write_all(text.as_bytes());
    }
}

impl Drop for OutputLock {
    fn drop(&mut self) {
        let _ = std::fs::remove_file(&self.path);
        let _ = self.file.unlock();
        registry().remove(self.ticket);
    }
}

fn same_file(file: &File, path: &Path) -> bool {
    use std::os::unix::fs::MetadataExt;
    match (file.metadata(), std::fs::metadata(path)) {
        (Ok(a), Ok(b)) => a.dev() == b.dev() && a.ino() == b.ino(),
        _ => false,
    }
}

/// The parent folder and the name of an output path (already resolved).
fn split(target: &Path) -> (PathBuf, String) {
    let parent = target
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .map_or_else(|| PathBuf::from("."), Path::to_path_buf);
    let name = target
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "out".into());
    (parent, name)
}

/// Refuses an output whose helper names would not fit in a file name.
fn check_name_length(target: &Path, name: &str) -> Result<()> {
    let longest = format!(".{name}.{TMP}{}", u32::MAX).len();
    if longest > NAME_MAX {
        return Err(Error::output(
            target,
            format!(
                "has a name of {} bytes; modalmap needs {} bytes more for its temporary names, over the limit of {NAME_MAX}",
                name.len(),
                longest - name.len()
            ),
            "give the output a shorter name",
        ));
    }
    Ok(())
}

/// Cleans what dead runs left beside `target` (the caller holds its lock): an aside
/// folder is moved back when OUT is missing, otherwise removed; temporary folders and
/// files are removed. Returns what was done, for the user.
fn recover(target: &Path) -> Vec<String> {
    let (parent, name) = split(target);
    let mut notes = Vec::new();
    let Ok(entries) = std::fs::read_dir(&parent) else {
        return notes;
    };
    let mut leftovers: Vec<(String, PathBuf)> = entries
        .flatten()
        .map(|e| (e.file_name().to_string_lossy().into_owned(), e.path()))
        .collect();
    leftovers.sort();
    let tmp = format!(".{name}.{TMP}");
    let old = format!(".{name}.{OLD}");
    let scratch = format!(".{name}.{SCRATCH}");
    let own_scratch = format!("{scratch}{}", std::process::id());
    for (file, path) in leftovers {
        if file.starts_with(&scratch) && file != own_scratch {
            crate::cleanup::remove_path(&path);
            continue;
        }
        if file.starts_with(&old) {
            if std::fs::symlink_metadata(target).is_err() && std::fs::rename(&path, target).is_ok()
            {
                notes.push(format!(
                    "an earlier run was killed while replacing {}: its previous contents were put back",
                    target.display()
                ));
            } else {
                crate::cleanup::remove_path(&path);
            }
        } else if file.starts_with(&tmp) {
            crate::cleanup::remove_path(&path);
        }
    }
    notes
}

/// Creates the empty folder `parent/PREFIXPID` (removing one a run of the same pid left),
/// registered for removal on a signal; `given` names the output in messages.
fn fresh_folder(given: &Path, parent: &Path, prefix: &str) -> Result<(PathBuf, u64)> {
    let path = parent.join(format!("{prefix}{}", std::process::id()));
    let ticket = registry().add(&path);
    crate::cleanup::remove_path(&path);
    std::fs::create_dir(&path).map_err(|e| {
        registry().remove(ticket);
        Error::output(
            given,
            format!("cannot be written: a folder beside it cannot be created ({e})"),
            "check that the output's parent folder is writable and has free space",
        )
    })?;
    Ok((path, ticket))
}

/// A working folder beside an output (`.NAME.modalmap-scratch-PID`), removed when dropped,
/// on a signal, or by the next run onto that output if this one is killed.
pub struct Scratch {
    path: PathBuf,
    ticket: u64,
}

impl Scratch {
    /// Creates the working folder beside `target`.
    pub fn beside(target: &Path) -> Result<Scratch> {
        let resolved = crate::guard::resolve_output(target)?;
        let (parent, name) = split(&resolved);
        check_name_length(target, &name)?;
        let (path, ticket) = fresh_folder(target, &parent, &format!(".{name}.{SCRATCH}"))?;
        Ok(Scratch { path, ticket })
    }

    /// The folder.
    pub fn path(&self) -> &Path {
        &self.path
    }
}

impl Drop for Scratch {
    fn drop(&mut self) {
        crate::cleanup::remove_path(&self.path);
        registry().remove(self.ticket);
    }
}

/// A temporary folder that becomes OUT on [`commit`](OutputDir::commit) and is removed
/// otherwise.
pub struct OutputDir {
    tmp: PathBuf,
    target: PathBuf,
    force: bool,
    committed: bool,
    ticket: u64,
    _lock: OutputLock,
    /// What was cleaned up after earlier runs, for the user.
    pub recovered: Vec<String>,
}

/// Checks OUT before any work is done, takes its lock, cleans up after killed runs and
/// creates the temporary folder beside it.
///
/// OUT may be missing or an empty folder; a non-empty folder needs `force`; a file, a
/// symbolic link and a mount point are refused.
pub fn prepare_output(target: &Path, force: bool) -> Result<OutputDir> {
    let given = target;
    let target = crate::guard::resolve_output(target)?;
    let (parent, name) = split(&target);
    check_name_length(given, &name)?;
    check_kind(given, &target)?;
    let lock = OutputLock::take(&target)?;
    let recovered = recover(&target);
    if target.is_dir() {
        check_not_mount_point(given, &target, &parent)?;
        let non_empty = std::fs::read_dir(&target)
            .map_err(|e| {
                Error::output(
                    given,
                    format!("cannot be read: {e}"),
                    "check the folder's permissions",
                )
            })?
            .next()
            .is_some();
        if non_empty && !force {
            return Err(Error::output(
                given,
                "already holds files",
                "choose another output folder, or add --force to replace its contents",
            ));
        }
        if let Some(file) = crate::io::folder::field_file_in(&target) {
            return Err(Error::output(
                given,
                format!("holds a field's files ({file}); modalmap never replaces a field, even with --force"),
                "write the outputs to a new folder",
            ));
        }
    }
    let (tmp, ticket) = fresh_folder(given, &parent, &format!(".{name}.{TMP}"))?;
    Ok(OutputDir {
        tmp,
        target,
        force,
        committed: false,
        ticket,
        _lock: lock,
        recovered,
    })
}

/// Refuses an output that is a file or a symbolic link.
fn check_kind(given: &Path, target: &Path) -> Result<()> {
    let Ok(meta) = std::fs::symlink_metadata(target) else {
        return Ok(());
    };
    if meta.file_type().is_symlink() {
        return Err(Error::output(
            given,
            "is a symbolic link; modalmap replaces the output folder as a whole",
            "give the real folder the link points to, or a new folder name",
        ));
    }
    if !meta.is_dir() {
        return Err(Error::output(
            given,
            "is a file, not a folder",
            "give a folder name for the outputs (-o DIR)",
        ));
    }
    Ok(())
}

/// Refuses a mount point: it cannot be renamed, so it cannot be replaced atomically.
fn check_not_mount_point(given: &Path, target: &Path, parent: &Path) -> Result<()> {
    use std::os::unix::fs::MetadataExt;
    if let (Ok(a), Ok(b)) = (std::fs::metadata(target), std::fs::metadata(parent)) {
        if a.dev() != b.dev() {
            return Err(Error::output(
                given,
                "is a mount point; modalmap replaces the output folder by renaming, which a mount point does not allow",
                "give a folder inside it, e.g. -o OUT/results",
            ));
        }
    }
    Ok(())
}

impl OutputDir {
    /// The temporary folder itself (it becomes OUT on commit).
    pub fn folder(&self) -> &Path {
        &self.tmp
    }

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
        let (parent, name) = split(&self.target);
        let aside = parent.join(format!(".{name}.{OLD}{}", std::process::id()));
        // Registered before it exists: interrupted after the renames, the old contents go.
        let aside_ticket = registry().add(&aside);
        let held = registry().hold();
        let mut moved_aside = false;
        if self.target.is_dir() {
            let empty = std::fs::read_dir(&self.target)
                .map_err(err)?
                .next()
                .is_none();
            if empty {
                std::fs::remove_dir(&self.target).map_err(err)?;
            } else if self.force {
                std::fs::rename(&self.target, &aside).map_err(err)?;
                moved_aside = true;
            } else {
                return Err(Error::output(
                    &self.target,
                    "appeared while modalmap was running",
                    "run again with another output folder",
                ));
            }
        }
        if let Err(e) = std::fs::rename(&self.tmp, &self.target) {
            if moved_aside {
                let _ = std::fs::rename(&aside, &self.target);
            }
            drop(held);
            registry().remove(aside_ticket);
            return Err(err(e));
        }
        self.committed = true;
        drop(held);
        registry().remove(self.ticket);
        if moved_aside {
            crate::cleanup::remove_path(&aside);
        }
        registry().remove(aside_ticket);
        Ok(self.target.clone())
    }
}

impl Drop for OutputDir {
    fn drop(&mut self) {
        if !self.committed {
            crate::cleanup::remove_path(&self.tmp);
        }
        registry().remove(self.ticket);
    }
}

/// Writes a file through a temporary file beside it and a rename; the temporary file is
/// removed on failure or interruption.
pub fn write_file_atomically(path: &Path, bytes: &[u8]) -> Result<()> {
    let target = crate::guard::resolve_output(path)?;
    let (parent, name) = split(&target);
    check_name_length(path, &name)?;
    let _lock = OutputLock::take(&target)?;
    recover_files(&target);
    let tmp = parent.join(format!(".{name}.{TMP}{}", std::process::id()));
    let err = |e: std::io::Error| {
        Error::output(
            path,
            format!("could not be written: {e}"),
            "check that the folder exists, is writable and has free space",
        )
    };
    let ticket = registry().add(&tmp);
    let result = std::fs::write(&tmp, bytes).map_err(err).and_then(|()| {
        let _held = registry().hold();
        std::fs::rename(&tmp, &target).map_err(err)
    });
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    registry().remove(ticket);
    result
}

/// Removes temporary files dead runs left beside a file output (the caller holds its lock).
fn recover_files(target: &Path) {
    let (parent, name) = split(target);
    let tmp = format!(".{name}.{TMP}");
    if let Ok(entries) = std::fs::read_dir(&parent) {
        for e in entries.flatten() {
            if e.file_name().to_string_lossy().starts_with(&tmp) {
                crate::cleanup::remove_path(&e.path());
            }
        }
    }
}
