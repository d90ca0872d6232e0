//! Writing outputs without losing anything the user owns, and paths that cannot escape a folder.
//!
//! The rules every command follows when it writes a file:
//! 1. an existing file is replaced only when the caller says so ([`Overwrite::Replace`]), and
//!    never when it is one of the command's inputs;
//! 2. outputs are regular files: a folder, a symbolic link, a device, FIFO or socket at the
//!    output path is refused, never replaced or written through;
//! 3. the bytes go to a temporary file in the output's folder, created with mode `0666` minus
//!    the process umask (as `open(2)` would), synced, then renamed into place — without
//!    [`Overwrite::Replace`] by a rename that fails if the name appeared meanwhile — so the
//!    output is never half-written and a race cannot turn a refusal into an overwrite.

use std::io::Write;
use std::path::{Component, Path, PathBuf};

use crate::error::{KilnError, Result};

/// Whether an output may replace an existing regular file.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Overwrite {
    /// An existing file at the output path is an error (the default).
    #[default]
    Refuse,
    /// An existing regular file is replaced (atomically); other kinds of file are still refused.
    Replace,
}

impl Overwrite {
    /// `Replace` when `force` is set.
    pub fn from_force(force: bool) -> Self {
        if force { Overwrite::Replace } else { Overwrite::Refuse }
    }
}

#[cfg(unix)]
fn same_file(a: &std::fs::Metadata, b: &std::fs::Metadata) -> bool {
    use std::os::unix::fs::MetadataExt;
    a.dev() == b.dev() && a.ino() == b.ino()
}

#[cfg(not(unix))]
fn same_file(_: &std::fs::Metadata, _: &std::fs::Metadata) -> bool {
    false
}

fn refuse(path: &Path, why: &str) -> KilnError {
    KilnError::OutputRefused { path: path.to_path_buf(), reason: why.to_string() }
}

/// Checks that `path` may be written as an output (see the module rules); `inputs` are the
/// files the command reads. Nothing is created.
///
/// # Errors
/// [`KilnError::OutputRefused`] naming the path and the reason, or an I/O error.
pub fn check_output(path: &Path, overwrite: Overwrite, inputs: &[&Path]) -> Result<()> {
    if path.as_os_str().is_empty() {
        return Err(refuse(path, "the output name is empty"));
    }
    if path.as_os_str().to_string_lossy().ends_with('/') {
        return Err(refuse(path, "names a folder; name a file inside it"));
    }
    match std::fs::symlink_metadata(path) {
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            let dir = parent_dir(path);
            match std::fs::metadata(dir) {
                Ok(m) if m.is_dir() => Ok(()),
                Ok(_) => Err(refuse(path, &format!("{} is not a folder", dir.display()))),
                Err(e) => Err(KilnError::io(dir, e)),
            }
        }
        Err(e) => Err(KilnError::io(path, e)),
        Ok(meta) => {
            let kind = meta.file_type();
            if kind.is_dir() {
                return Err(refuse(path, "is a folder; name a file inside it"));
            }
            if kind.is_symlink() {
                return Err(refuse(
                    path,
                    "is a symbolic link; Kiln writes regular files only (name the link's target)",
                ));
            }
            if !kind.is_file() {
                return Err(refuse(
                    path,
                    "is not a regular file (a device, FIFO or socket); Kiln writes regular files only",
                ));
            }
            for input in inputs {
                if std::fs::metadata(input).is_ok_and(|m| same_file(&m, &meta)) {
                    return Err(refuse(path, "is one of this command's inputs; choose another output name"));
                }
            }
            match overwrite {
                Overwrite::Replace => Ok(()),
                Overwrite::Refuse => Err(KilnError::OutputExists(path.to_path_buf())),
            }
        }
    }
}

fn parent_dir(path: &Path) -> &Path {
    match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d,
        _ => Path::new("."),
    }
}

/// Writes `bytes` to `path` under the module's rules: checked with [`check_output`], written
/// through a temporary file in the same folder, renamed into place when complete.
///
/// # Errors
/// As [`check_output`]; [`KilnError::OutputExists`] if the name appeared while writing (without
/// [`Overwrite::Replace`]); I/O errors naming the path.
pub fn write_output(path: &Path, bytes: &[u8], overwrite: Overwrite, inputs: &[&Path]) -> Result<()> {
    check_output(path, overwrite, inputs)?;
    let dir = parent_dir(path);
    let mut builder = tempfile::Builder::new();
    builder.prefix(TEMP_PREFIX);
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        // The creation mode passes through the umask, as for any file created with open(2).
        builder.permissions(std::fs::Permissions::from_mode(0o666));
    }
    let mut tmp = builder.tempfile_in(dir).map_err(|e| KilnError::io(dir, e))?;
    tmp.write_all(bytes).map_err(|e| KilnError::io(path, e))?;
    tmp.as_file().sync_all().map_err(|e| KilnError::io(path, e))?;
    match overwrite {
        Overwrite::Refuse => tmp.persist_noclobber(path).map_err(|e| {
            if e.error.kind() == std::io::ErrorKind::AlreadyExists {
                KilnError::OutputExists(path.to_path_buf())
            } else {
                KilnError::io(path, e.error)
            }
        })?,
        Overwrite::Replace => {
            // Re-checked just before the rename: what appeared at the path meanwhile must also
            // be a regular file that is not an input.
            check_output(path, overwrite, inputs)?;
            tmp.persist(path).map_err(|e| KilnError::io(path, e.error))?
        }
    };
    Ok(())
}

/// Prefix of Kiln's temporary files (an archive removes stale ones at the start of a run).
pub const TEMP_PREFIX: &str = ".kiln-tmp-";

/// A `/`-separated relative path read from a catalog, container or shard, checked so that
/// joining it to a folder can only name something inside that folder: not empty, not absolute,
/// no `..`, `.` or empty component, no NUL, no backslash (a separator elsewhere).
///
/// # Errors
/// [`KilnError::UnsafePath`] naming the path and what is wrong with it.
pub fn safe_relative(rel: &str) -> Result<PathBuf> {
    let bad = |why: &str| Err(KilnError::UnsafePath { path: rel.to_string(), reason: why.to_string() });
    if rel.is_empty() {
        return bad("empty");
    }
    if rel.contains('\0') {
        return bad("contains a NUL byte");
    }
    if rel.contains('\\') {
        return bad("contains a backslash");
    }
    if rel.starts_with('/') {
        return bad("is absolute");
    }
    let mut out = PathBuf::new();
    for part in rel.split('/') {
        match part {
            "" => return bad("has an empty component"),
            "." | ".." => return bad("has a `.` or `..` component"),
            _ => {}
        }
        let mut comps = Path::new(part).components();
        if !matches!((comps.next(), comps.next()), (Some(Component::Normal(_)), None)) {
            return bad("has a component that is not a plain name");
        }
        out.push(part);
    }
    Ok(out)
}

/// Creates the folders of `rel`'s parent under `root` one level at a time, refusing any
/// existing component that is not a real folder (a symbolic link could lead outside `root`).
///
/// # Errors
/// [`KilnError::UnsafePath`] if a component is a link or a file; I/O errors naming the folder.
pub fn create_parents_within(root: &Path, rel: &Path) -> Result<()> {
    let Some(parent) = rel.parent() else { return Ok(()) };
    let mut dir = root.to_path_buf();
    for comp in parent.components() {
        dir.push(comp);
        match std::fs::symlink_metadata(&dir) {
            Ok(m) if m.file_type().is_dir() => {}
            Ok(_) => {
                return Err(KilnError::UnsafePath {
                    path: rel.display().to_string(),
                    reason: format!("{} is not a folder (a link or a file)", dir.display()),
                });
            }
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => match std::fs::create_dir(&dir) {
                Ok(()) => {}
                Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => {
                    if !std::fs::symlink_metadata(&dir).is_ok_and(|m| m.file_type().is_dir()) {
                        return Err(KilnError::UnsafePath {
                            path: rel.display().to_string(),
                            reason: format!("{} is not a folder", dir.display()),
                        });
                    }
                }
                Err(e) => return Err(KilnError::io(&dir, e)),
            },
            Err(e) => return Err(KilnError::io(&dir, e)),
        }
    }
    Ok(())
}

/// A file name shown to people: valid UTF-8 as it is, other bytes as `\xNN`, so that two
/// different names never display alike.
pub fn display_name(path: &Path) -> String {
    let bytes = path.as_os_str().as_encoded_bytes();
    let mut out = String::new();
    for chunk in bytes.utf8_chunks() {
        out.push_str(chunk.valid());
        for b in chunk.invalid() {
            out.push_str(&format!("\\x{b:02x}"));
        }
    }
    out
}

/// The name `kiln decompress` and `kiln unpack` give a decoded image: the container's name
/// without `.kiln`, then `.png` unless it already ends so (`a.png.kiln` → `a.png`,
/// `a.jpg.kiln` → `a.jpg.png`, `a.kiln` → `a.png`). Distinct sources keep distinct names.
pub fn restored_name(rel: &str) -> String {
    let base = rel.strip_suffix(".kiln").unwrap_or(rel);
    if base.to_ascii_lowercase().ends_with(".png") { base.to_string() } else { format!("{base}.png") }
}

/// [`restored_name`] for a file name that need not be UTF-8 (its bytes are kept as they are).
pub fn restored_os_name(name: &std::ffi::OsStr) -> std::ffi::OsString {
    let bytes = name.as_encoded_bytes();
    let base = bytes.strip_suffix(b".kiln").unwrap_or(bytes);
    let is_png = base.len() >= 4 && base[base.len() - 4..].eq_ignore_ascii_case(b".png");
    let mut out = base.to_vec();
    if !is_png {
        out.extend_from_slice(b".png");
    }
    // SAFETY: `out` is `name`'s encoded bytes with an ASCII suffix removed or appended, which
    // splits or joins them only at ASCII characters, as `from_encoded_bytes_unchecked` requires.
    unsafe { std::ffi::OsString::from_encoded_bytes_unchecked(out) }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn relative_paths_that_could_leave_the_folder_are_refused() {
        for bad in ["", "/etc/x.png", "../x.png", "a/../../x.png", "a//b.png", "./a.png", "a/./b", "a\\..\\b", "a\0b"] {
            assert!(safe_relative(bad).is_err(), "{bad:?} accepted");
        }
        assert_eq!(safe_relative("a/b c/d.png").unwrap(), PathBuf::from("a/b c/d.png"));
    }

    #[test]
    fn restored_names_keep_distinct_sources_distinct() {
        assert_eq!(restored_name("x.png"), "x.png");
        assert_eq!(restored_name("x.jpg"), "x.jpg.png");
        assert_eq!(restored_name("x.tif.kiln"), "x.tif.png");
        assert_eq!(restored_name("x.kiln"), "x.png");
    }

    #[test]
    fn display_names_of_different_bytes_differ() {
        #[cfg(unix)]
        {
            use std::os::unix::ffi::OsStrExt;
            let a = display_name(Path::new(std::ffi::OsStr::from_bytes(b"\xff.png")));
            let b = display_name(Path::new(std::ffi::OsStr::from_bytes(b"\xfe.png")));
            assert_eq!(a, "\\xff.png");
            assert_ne!(a, b);
        }
    }
}
