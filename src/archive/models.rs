//! The models an archive carries: `DEST/models/<fingerprint>.safetensors`, one per model its
//! containers were written with, recorded in the catalog's `models` table.
//!
//! What must hold: a file in the models folder holds exactly the bytes whose SHA-256 its name
//! spells (it is written to a temporary file, synced, renamed, then read back and hashed); it is
//! stored before the first container that needs it is written, so no container of the archive
//! ever names a model the archive lacks (unless the folder is damaged later, which
//! [`check_carried`] reports).

use std::path::{Path, PathBuf};

use super::catalog::{Catalog, ModelRow};
use crate::error::{KilnError, Result};
use crate::files::{Overwrite, create_parents_within, write_output};
use crate::model::store::{ARCHIVE_MODELS_DIR, stored_name};
use crate::model::{ModelFile, fingerprint, hex_prefix};

/// Path of the model with fingerprint `fp` relative to the archive root.
pub fn carried_rel(fp: &[u8; 32]) -> String {
    format!("{ARCHIVE_MODELS_DIR}/{}", stored_name(fp))
}

/// Whether the file at `path` holds the bytes with SHA-256 `fp` (`Ok(false)` if absent).
fn holds(path: &Path, fp: &[u8; 32]) -> Result<bool> {
    match std::fs::symlink_metadata(path) {
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(false),
        Err(e) => Err(KilnError::io(path, e)),
        Ok(m) if !m.is_file() => Err(KilnError::OutputRefused {
            path: path.to_path_buf(),
            reason: "is not a regular file; the archive's model cannot be stored there".into(),
        }),
        Ok(_) => Ok(fingerprint(&crate::image_io::read_regular(path)?) == *fp),
    }
}

/// Stores `file` in the archive at `dest` (unless an intact copy is there: a damaged one is
/// replaced) and records it in `cat` under `name`. Returns the path of the stored file.
///
/// # Errors
/// Storage failures; a non-regular file or a link where the model or its folder goes; a copy
/// that does not read back with the right hash.
pub fn carry_model(dest: &Path, cat: &Catalog, file: &ModelFile, name: &str, now: i64) -> Result<PathBuf> {
    let rel = carried_rel(&file.fingerprint);
    let path = dest.join(&rel);
    create_parents_within(dest, Path::new(&rel))?;
    if !holds(&path, &file.fingerprint)? {
        let overwrite = if path.exists() { Overwrite::Replace } else { Overwrite::Refuse };
        match write_output(&path, file.bytes(), overwrite, &[]) {
            // Another shard of the same run stored it first: checked below like any copy.
            Err(KilnError::OutputExists(_)) | Ok(()) => {}
            Err(e) => return Err(e),
        }
        if !holds(&path, &file.fingerprint)? {
            return Err(KilnError::io(
                &path,
                std::io::Error::other("the stored model reads back with another SHA-256"),
            ));
        }
    }
    cat.put_model(&ModelRow {
        fingerprint: hex_prefix(&file.fingerprint, 32),
        size: file.size as u64,
        name: name.to_string(),
        added_at: now,
    })?;
    Ok(path)
}

/// What is wrong with the archive's copy of the model in `row`, if anything.
pub fn check_carried(dest: &Path, row: &ModelRow) -> Option<String> {
    let Some(fp) = parse_fingerprint(&row.fingerprint) else {
        return Some(format!("catalog lists a model with a malformed fingerprint {:?}", row.fingerprint));
    };
    let path = dest.join(carried_rel(&fp));
    match holds(&path, &fp) {
        Ok(true) => None,
        Ok(false) if !path.exists() => Some(format!("model {} ({}) is missing", &row.fingerprint[..16], row.name)),
        Ok(false) => Some(format!(
            "model {} ({}) is damaged: its SHA-256 is not its fingerprint",
            &row.fingerprint[..16],
            row.name
        )),
        Err(e) => Some(format!("model {} ({}): {}", &row.fingerprint[..16], row.name, e)),
    }
}

/// The 32 bytes of a 64-digit lowercase hex fingerprint.
pub fn parse_fingerprint(hex: &str) -> Option<[u8; 32]> {
    if hex.len() != 64 || !hex.bytes().all(|b| b.is_ascii_digit() || (b'a'..=b'f').contains(&b)) {
        return None;
    }
    let mut out = [0u8; 32];
    for (i, o) in out.iter_mut().enumerate() {
        *o = u8::from_str_radix(&hex[2 * i..2 * i + 2], 16).ok()?;
    }
    Some(out)
}
