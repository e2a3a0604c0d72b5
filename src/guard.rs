//! What a command may touch: reading only regular files, with a size cap, and refusing an
//! output that would overwrite or replace one of the command's own inputs.
//!
//! Every command checks its paths here before any work is done, so a clumsy `--force`
//! can never delete the maps, a named pipe can never hang a run, and `/dev/zero` can never
//! be read until memory runs out.

use std::fs::File;
use std::io::Read;
use std::path::{Component, Path, PathBuf};

use crate::error::{Error, Result};

/// Largest configuration, sidecar, k-factor or library file read (text files a person
/// writes; common practice, no source).
pub const MAX_TEXT_BYTES: u64 = 4 << 20;

/// Largest model or report file read (a model holds at most 64 phases of 64 elements; a
/// report lists particles and can be larger; common practice, no source).
pub const MAX_JSON_BYTES: u64 = 256 << 20;

/// What kind of thing a non-regular path is, for messages.
fn kind_of(ft: std::fs::FileType) -> &'static str {
    use std::os::unix::fs::FileTypeExt;
    if ft.is_dir() {
        "a folder"
    } else if ft.is_fifo() {
        "a named pipe (FIFO)"
    } else if ft.is_char_device() || ft.is_block_device() {
        "a device"
    } else if ft.is_socket() {
        "a socket"
    } else {
        "not a regular file"
    }
}

/// Opens a regular file for reading. Named pipes, devices and sockets are refused without
/// blocking (the file is opened non-blocking, then checked on the open handle).
pub fn open_regular(path: &Path, what: &str) -> Result<File> {
    use std::os::unix::fs::OpenOptionsExt;
    let file = std::fs::OpenOptions::new()
        .read(true)
        .custom_flags(libc::O_NONBLOCK | libc::O_NOCTTY)
        .open(path)
        .map_err(|e| {
            Error::input(
                path,
                format!("cannot be opened: {e}"),
                format!("check the path and permissions of the {what}"),
            )
        })?;
    let meta = file.metadata().map_err(|e| {
        Error::input(
            path,
            format!("cannot be read: {e}"),
            format!("check the {what}"),
        )
    })?;
    if !meta.is_file() {
        return Err(Error::input(
            path,
            format!("is {}, not a regular file", kind_of(meta.file_type())),
            format!("give the {what} as an ordinary file on disk"),
        ));
    }
    Ok(file)
}

/// Reads a whole regular file of at most `max_bytes`.
pub fn read_regular(path: &Path, what: &str, max_bytes: u64) -> Result<Vec<u8>> {
    let file = open_regular(path, what)?;
    let mut bytes = Vec::new();
    file.take(max_bytes.saturating_add(1))
        .read_to_end(&mut bytes)
        .map_err(|e| {
            Error::input(
                path,
                format!("cannot be read: {e}"),
                format!("check the {what}"),
            )
        })?;
    if bytes.len() as u64 > max_bytes {
        return Err(Error::input(
            path,
            format!("is larger than {max_bytes} bytes, far more than any {what}"),
            format!("give the right file as the {what}"),
        ));
    }
    Ok(bytes)
}

/// Reads a whole regular text file (UTF-8) of at most `max_bytes`.
pub fn read_text(path: &Path, what: &str, max_bytes: u64) -> Result<String> {
    let bytes = read_regular(path, what, max_bytes)?;
    String::from_utf8(bytes).map_err(|_| {
        Error::input(
            path,
            "is not UTF-8 text",
            format!("save the {what} as UTF-8 text"),
        )
    })
}

/// An output path made absolute: its parent resolved through the file system (symbolic
/// links included), its own name kept as given. Refuses names that are not a plain name
/// (`..`, `/`).
pub fn resolve_output(out: &Path) -> Result<PathBuf> {
    let comps: Vec<Component> = out.components().collect();
    let name = match comps.last() {
        Some(Component::Normal(n)) => n.to_os_string(),
        _ => {
            return Err(Error::output(
                out,
                "does not end in a folder or file name",
                "give the output a plain name, e.g. -o results",
            ))
        }
    };
    let parent: PathBuf = comps[..comps.len() - 1].iter().collect();
    let parent = if parent.as_os_str().is_empty() {
        PathBuf::from(".")
    } else {
        parent
    };
    let parent = std::fs::canonicalize(&parent).map_err(|e| {
        Error::output(
            out,
            format!("cannot be created: its parent folder cannot be used ({e})"),
            "create the parent folder first, or give an output in an existing folder",
        )
    })?;
    if !parent.is_dir() {
        return Err(Error::output(
            out,
            "cannot be created: its parent is not a folder",
            "give an output inside an existing folder",
        ));
    }
    Ok(parent.join(name))
}

/// An input the command reads, for the overlap check.
#[derive(Debug, Clone)]
pub struct Input<'a> {
    /// What it is, for the message ("field", "configuration file", ...).
    pub what: &'static str,
    /// The path as given.
    pub path: &'a Path,
}

/// Refuses (exit code 2, naming both) when writing or replacing any of `outputs` could
/// touch one of `inputs`: an input that is an output, or lies inside one. An output inside
/// an input folder is allowed (nothing of the input is replaced). Inputs that do not exist
/// are left to the loaders to report.
pub fn check_no_overlap(outputs: &[PathBuf], inputs: &[Input<'_>]) -> Result<()> {
    // Each output as named, and where it leads if it is a symbolic link.
    let resolved: Vec<(PathBuf, PathBuf, &PathBuf)> = outputs
        .iter()
        .map(|o| {
            let real = resolve_output(o)?;
            let target = std::fs::canonicalize(&real).unwrap_or_else(|_| real.clone());
            Ok((real, target, o))
        })
        .collect::<Result<_>>()?;
    for input in inputs {
        let Ok(real) = std::fs::canonicalize(input.path) else {
            continue;
        };
        for (out_real, out_target, out) in &resolved {
            if real.starts_with(out_real) || real.starts_with(out_target) {
                return Err(Error::options(
                    format!(
                        "the output {} would replace the {} {}, which lies in it",
                        out.display(),
                        input.what,
                        input.path.display()
                    ),
                    "write the outputs to a new folder that holds none of the inputs, e.g. -o results",
                ));
            }
        }
    }
    Ok(())
}

/// [`check_no_overlap`] for an output file, which also may not replace an existing file
/// inside an input folder (a map, a field's metadata).
pub fn check_file_output(out: &Path, inputs: &[Input<'_>]) -> Result<()> {
    check_no_overlap(&[out.to_path_buf()], inputs)?;
    let real = resolve_output(out)?;
    if std::fs::symlink_metadata(&real).is_err() {
        return Ok(());
    }
    for input in inputs {
        let Ok(folder) = std::fs::canonicalize(input.path) else {
            continue;
        };
        if folder.is_dir() && real.starts_with(&folder) {
            return Err(Error::options(
                format!(
                    "the output {} would replace a file of the {} {}",
                    out.display(),
                    input.what,
                    input.path.display()
                ),
                "write the output outside the input folder, e.g. -o model.json",
            ));
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn inputs_inside_the_output_are_refused() {
        let t = tempfile::tempdir().unwrap();
        let field = t.path().join("top/f");
        std::fs::create_dir_all(&field).unwrap();
        std::fs::write(field.join("Fe.png"), b"x").unwrap();
        fn inp(p: &Path) -> Vec<Input<'_>> {
            vec![Input {
                what: "field",
                path: p,
            }]
        }
        let same = check_no_overlap(std::slice::from_ref(&field), &inp(&field)).unwrap_err();
        assert_eq!(same.kind.exit_code(), 2);
        assert!(same.problem.contains("field") && same.problem.contains("top/f"));
        assert!(check_no_overlap(&[t.path().join("top")], &inp(&field)).is_err());
        // A single map as the output file.
        assert!(check_no_overlap(&[field.join("Fe.png")], &inp(&field.join("Fe.png"))).is_err());
        // Through "." and "..": the same folder.
        let dotted = t.path().join("top/f/../f");
        assert!(check_no_overlap(&[dotted], &inp(&field)).is_err());
        // An output beside or inside the field is fine.
        assert!(check_no_overlap(&[t.path().join("top/g")], &inp(&field)).is_ok());
        assert!(check_no_overlap(&[field.join("out")], &inp(&field)).is_ok());
        // A symbolic link to the field as the output.
        let link = t.path().join("link");
        std::os::unix::fs::symlink(&field, &link).unwrap();
        assert!(check_no_overlap(&[link], &inp(&field)).is_err());
    }

    #[test]
    fn an_output_file_never_replaces_a_file_of_an_input_folder() {
        let t = tempfile::tempdir().unwrap();
        let field = t.path().join("f");
        std::fs::create_dir(&field).unwrap();
        std::fs::write(field.join("Cu_Ka.png"), b"x").unwrap();
        let inputs = [Input {
            what: "field",
            path: &field,
        }];
        let e = check_file_output(&field.join("Cu_Ka.png"), &inputs).unwrap_err();
        assert!(e.problem.contains("replace a file of the field"), "{e}");
        assert!(check_file_output(&field.join("model.json"), &inputs).is_ok());
        assert!(check_file_output(&t.path().join("model.json"), &inputs).is_ok());
    }

    #[test]
    fn output_names_must_be_plain() {
        assert!(resolve_output(Path::new("..")).is_err());
        assert!(resolve_output(Path::new("/")).is_err());
        assert!(resolve_output(Path::new("no/such/parent/out")).is_err());
        let t = tempfile::tempdir().unwrap();
        let real = std::fs::canonicalize(t.path()).unwrap();
        // `-o new/.` names the folder `new`.
        assert_eq!(
            resolve_output(&t.path().join("new/.")).unwrap(),
            real.join("new")
        );
        assert_eq!(
            resolve_output(&t.path().join("a/../b"))
                .unwrap_err()
                .kind
                .exit_code(),
            4
        );
    }

    #[test]
    fn only_regular_files_are_read() {
        let t = tempfile::tempdir().unwrap();
        let fifo = t.path().join("Cu_Ka.png");
        let c = std::ffi::CString::new(fifo.to_str().unwrap()).unwrap();
        // SAFETY: mkfifo with a valid NUL-terminated path.
        assert_eq!(unsafe { libc::mkfifo(c.as_ptr(), 0o600) }, 0);
        let e = read_regular(&fifo, "element map", 100).unwrap_err();
        assert!(e.problem.contains("named pipe"), "{e}");
        let e = read_regular(Path::new("/dev/zero"), "model", 100).unwrap_err();
        assert!(e.problem.contains("device"), "{e}");
        let e = read_regular(t.path(), "model", 100).unwrap_err();
        assert!(e.problem.contains("folder"), "{e}");
        let big = t.path().join("big.json");
        std::fs::write(&big, vec![b' '; 101]).unwrap();
        assert!(read_regular(&big, "model", 100)
            .unwrap_err()
            .problem
            .contains("larger than 100 bytes"));
        assert_eq!(read_regular(&big, "model", 101).unwrap().len(), 101);
    }
}
