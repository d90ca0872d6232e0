//! Listing a source tree so that every entry under it is accounted for: an image to pack, or a
//! skipped entry with its reason.
//!
//! What holds: special files (FIFOs, sockets, devices) are never opened; symbolic links are not
//! followed unless asked, and when followed only to targets inside the source root, each folder
//! at most once (so loops and links to `/` cannot make the walk endless or leave the tree);
//! a name that is not valid UTF-8 is refused by name (two such names must never merge into
//! one catalog row); every file is sniffed by its first bytes, so images without a known
//! extension are packed and other files are listed as "not an image".

use std::collections::HashSet;
use std::io::Read;
use std::path::{Path, PathBuf};

use crate::error::{KilnError, Result};
use crate::files::display_name;

/// Extensions taken as images even when their first bytes are not recognised (the decoder
/// then names the problem, e.g. a truncated file).
pub const IMAGE_EXTENSIONS: [&str; 13] =
    ["png", "jpg", "jpeg", "jfif", "jpe", "bmp", "tif", "tiff", "webp", "ppm", "pgm", "pnm", "gif"];

/// An image found under the source root.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SourceFile {
    /// Where to read it.
    pub path: PathBuf,
    /// Its path relative to the root, `/`-separated (valid UTF-8 by construction).
    pub rel: String,
}

/// An entry that is not packed, and why.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Skipped {
    /// Its path relative to the root as shown to people (non-UTF-8 bytes as `\xNN`).
    pub rel: String,
    /// Why it is not packed.
    pub reason: String,
    /// Whether it is an error (an image or folder that should have been archived and was not),
    /// as opposed to a note (not an image, a link or special file left alone by policy).
    pub error: bool,
}

/// Everything under a source root.
#[derive(Debug, Clone, Default)]
pub struct Listing {
    /// Images to pack, sorted by relative path.
    pub files: Vec<SourceFile>,
    /// Entries not packed, sorted by relative path.
    pub skipped: Vec<Skipped>,
}

#[cfg(unix)]
fn dir_id(meta: &std::fs::Metadata) -> Option<(u64, u64)> {
    use std::os::unix::fs::MetadataExt;
    Some((meta.dev(), meta.ino()))
}

#[cfg(not(unix))]
fn dir_id(_: &std::fs::Metadata) -> Option<(u64, u64)> {
    None
}

/// Lists `root` (which must be canonical). With `follow_symlinks`, links whose target lies
/// inside `root` are followed; others are skipped with a note.
///
/// # Errors
/// Only when `root` itself cannot be read; unreadable folders below it are skipped as errors.
pub fn list_source(root: &Path, follow_symlinks: bool) -> Result<Listing> {
    let root_meta = std::fs::metadata(root).map_err(|e| KilnError::io(root, e))?;
    std::fs::read_dir(root).map_err(|e| KilnError::io(root, e))?;
    let mut out = Listing::default();
    let mut visited: HashSet<(u64, u64)> = dir_id(&root_meta).into_iter().collect();
    let mut stack = vec![root.to_path_buf()];
    while let Some(dir) = stack.pop() {
        let rel_of = |p: &Path| -> String {
            let rel = p.strip_prefix(root).unwrap_or(p);
            rel.components().map(|c| display_name(Path::new(c.as_os_str()))).collect::<Vec<_>>().join("/")
        };
        let entries = match std::fs::read_dir(&dir) {
            Ok(e) => e,
            Err(e) => {
                out.skipped.push(Skipped { rel: rel_of(&dir), reason: format!("folder unreadable: {e}"), error: true });
                continue;
            }
        };
        for entry in entries {
            let entry = match entry {
                Ok(e) => e,
                Err(e) => {
                    let reason = format!("folder listing failed: {e}");
                    out.skipped.push(Skipped { rel: rel_of(&dir), reason, error: true });
                    continue;
                }
            };
            let path = entry.path();
            let rel = rel_of(&path);
            let skip = |reason: &str, error: bool| Skipped { rel: rel.clone(), reason: reason.to_string(), error };
            let Ok(kind) = entry.file_type() else {
                out.skipped.push(skip("cannot tell what kind of file it is", true));
                continue;
            };
            let (meta, via_link) = if kind.is_symlink() {
                if !follow_symlinks {
                    out.skipped
                        .push(skip("symbolic link, not followed (--follow-symlinks follows links inside SRC)", false));
                    continue;
                }
                let Ok(target) = path.canonicalize() else {
                    out.skipped.push(skip("symbolic link to nothing (broken link)", false));
                    continue;
                };
                if !target.starts_with(root) {
                    out.skipped.push(skip("symbolic link to outside SRC, not followed", false));
                    continue;
                }
                match std::fs::metadata(&target) {
                    Ok(m) => (m, true),
                    Err(e) => {
                        out.skipped.push(skip(&format!("symbolic link target unreadable: {e}"), true));
                        continue;
                    }
                }
            } else {
                match entry.metadata() {
                    Ok(m) => (m, false),
                    Err(e) => {
                        out.skipped.push(skip(&format!("unreadable: {e}"), true));
                        continue;
                    }
                }
            };
            if meta.is_dir() {
                if dir_id(&meta).is_some_and(|id| !visited.insert(id)) {
                    let why = if via_link {
                        "symbolic link to a folder already visited (a loop)"
                    } else {
                        "folder already visited"
                    };
                    out.skipped.push(skip(why, false));
                } else {
                    stack.push(path);
                }
                continue;
            }
            if !meta.is_file() {
                out.skipped.push(skip("special file (FIFO, socket or device), not opened", false));
                continue;
            }
            let name_is_utf8 = path.strip_prefix(root).ok().and_then(|r| r.to_str()).is_some();
            match looks_like_image(&path) {
                Ok(false) => out.skipped.push(skip("not an image", false)),
                Err(e) => out.skipped.push(skip(&format!("unreadable: {e}"), true)),
                Ok(true) if !name_is_utf8 => out
                    .skipped
                    .push(skip("name is not valid UTF-8; rename it to archive it (names are stored as text)", true)),
                Ok(true) => out.files.push(SourceFile { path, rel }),
            }
        }
    }
    out.files.sort_by(|a, b| a.rel.cmp(&b.rel));
    out.skipped.sort_by(|a, b| a.rel.cmp(&b.rel));
    Ok(out)
}

/// Whether a regular file is an image: its first bytes name a format the image crate knows,
/// or its extension is one of [`IMAGE_EXTENSIONS`].
fn looks_like_image(path: &Path) -> std::io::Result<bool> {
    let mut head = [0u8; 64];
    let mut file = std::fs::File::open(path)?;
    let mut n = 0;
    while n < head.len() {
        match file.read(&mut head[n..])? {
            0 => break,
            k => n += k,
        }
    }
    if image::guess_format(&head[..n]).is_ok() {
        return Ok(true);
    }
    Ok(path
        .extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| IMAGE_EXTENSIONS.contains(&e.to_ascii_lowercase().as_str())))
}
