//! Finding the model a container names.
//!
//! A container records the SHA-256 of its model file (its *fingerprint*), never a name or a
//! path, so a decoder looks the model up by fingerprint, in this order:
//!
//! 1. the model given explicitly, if its fingerprint matches;
//! 2. archive model folders (`DEST/models/<fingerprint>.safetensors`, see
//!    [`crate::archive`]), looked up by file name;
//! 3. user folders of models: first by file name, then every `*.safetensors` file in the folder
//!    (not its subfolders), hashed once per store;
//! 4. the models that ship with Kiln ([`super::shipped`]).
//!
//! Whatever the place, a file is used only if the SHA-256 of its bytes is the fingerprint, so a
//! misnamed or damaged file can never decode a container to other pixels; such files are
//! remembered ([`ModelStore::problems`]) and the search goes on.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};

use super::shipped::{SHIPPED, ShippedModel};
use super::{MODEL_FILE_MAX_BYTES, ModelFile, fingerprint, hex_prefix};
use crate::error::{KilnError, Result};

/// The folder of an archive that holds the models its containers need.
pub const ARCHIVE_MODELS_DIR: &str = "models";

/// File extension of model files.
pub const MODEL_EXTENSION: &str = "safetensors";

/// The file name a model has in an archive's models folder: `<64 hex digits>.safetensors`.
pub fn stored_name(fingerprint: &[u8; 32]) -> String {
    format!("{}.{MODEL_EXTENSION}", hex_prefix(fingerprint, 32))
}

/// A model found by [`ModelStore::find`], with where it was found.
#[derive(Debug, Clone)]
pub struct Found {
    /// The model.
    pub file: Arc<ModelFile>,
    /// Where it was found, in words (the explicit model's label, a path, or a shipped name).
    pub place: String,
}

/// An ordered set of places to look for models by fingerprint (see the module docs).
///
/// Cloning shares the cache of loaded models; [`ModelStore::with_archive`] makes a store with
/// one more place and a cache of its own.
#[derive(Debug, Clone, Default)]
pub struct ModelStore {
    explicit: Option<(String, Arc<ModelFile>)>,
    archives: Vec<PathBuf>,
    folders: Vec<(String, PathBuf)>,
    cache: Arc<Mutex<Cache>>,
}

#[derive(Debug, Default)]
struct Cache {
    found: HashMap<[u8; 32], Found>,
    /// Per user folder: each model file in it with its fingerprint.
    folder_index: HashMap<PathBuf, Vec<(PathBuf, [u8; 32])>>,
    problems: Vec<String>,
}

impl ModelStore {
    /// A store that knows the shipped models only.
    pub fn new() -> Self {
        Self::default()
    }

    /// Looks at `file` first, described as `label` in messages (e.g. the option that gave it).
    pub fn with_model(mut self, file: ModelFile, label: impl Into<String>) -> Self {
        self.explicit = Some((label.into(), Arc::new(file)));
        self.cache = Arc::default();
        self
    }

    /// Also looks in the models folder of the archive at `dest` (after the explicit model and
    /// any archive folders already added).
    pub fn with_archive(&self, dest: &Path) -> Self {
        let mut s = self.clone();
        s.archives.push(dest.join(ARCHIVE_MODELS_DIR));
        s.cache = Arc::default();
        s
    }

    /// Also looks in the folder `dir` of model files, described as `label` in messages.
    pub fn with_folder(mut self, dir: impl Into<PathBuf>, label: impl Into<String>) -> Self {
        self.folders.push((label.into(), dir.into()));
        self.cache = Arc::default();
        self
    }

    /// Files met during lookups that were not what their place promised (a file named by one
    /// fingerprint holding another, an unreadable model), one line each.
    pub fn problems(&self) -> Vec<String> {
        self.lock().problems.clone()
    }

    fn lock(&self) -> std::sync::MutexGuard<'_, Cache> {
        // A panic while holding the lock leaves only a cache behind: still usable.
        self.cache.lock().unwrap_or_else(|e| e.into_inner())
    }

    /// The places searched, in order, in words.
    pub fn places(&self) -> Vec<String> {
        let mut out = Vec::new();
        if let Some((label, f)) = &self.explicit {
            out.push(format!("{label} (model {})", hex_prefix(&f.fingerprint, 8)));
        }
        out.extend(self.archives.iter().map(|d| d.display().to_string()));
        out.extend(self.folders.iter().map(|(label, _)| label.clone()));
        out.push(format!(
            "the {} models shipped with Kiln ({} … {})",
            SHIPPED.len(),
            SHIPPED[0].name,
            SHIPPED[SHIPPED.len() - 1].name
        ));
        out
    }

    /// The model whose file has SHA-256 `fp`.
    ///
    /// # Errors
    /// [`KilnError::ModelNotFound`] naming the fingerprint and every place searched.
    pub fn find(&self, fp: &[u8; 32]) -> Result<Found> {
        let mut cache = self.lock();
        if let Some(f) = cache.found.get(fp) {
            return Ok(f.clone());
        }
        let found = self
            .search(fp, &mut cache)
            .ok_or_else(|| KilnError::ModelNotFound { fingerprint: hex_prefix(fp, 8), searched: self.places() })?;
        cache.found.insert(*fp, found.clone());
        Ok(found)
    }

    fn search(&self, fp: &[u8; 32], cache: &mut Cache) -> Option<Found> {
        if let Some((label, f)) = &self.explicit
            && &f.fingerprint == fp
        {
            return Some(Found { file: f.clone(), place: label.clone() });
        }
        let name = stored_name(fp);
        for dir in self.archives.iter().chain(self.folders.iter().map(|(_, d)| d)) {
            if let Some(found) = load_checked(&dir.join(&name), fp, cache) {
                return Some(found);
            }
        }
        for (_, dir) in &self.folders {
            let index = cache.folder_index.entry(dir.clone()).or_insert_with(|| index_folder(dir)).clone();
            for (path, _) in index.iter().filter(|(_, f)| f == fp) {
                if let Some(found) = load_checked(path, fp, cache) {
                    return Some(found);
                }
            }
        }
        let shipped = ShippedModel::by_fingerprint(fp)?;
        match shipped.bytes().and_then(|b| ModelFile::from_bytes(&b)) {
            Ok(file) => Some(Found { file: Arc::new(file), place: format!("shipped model {}", shipped.name) }),
            Err(e) => {
                cache.problems.push(first_line(&e));
                None
            }
        }
    }
}

/// Loads `path` if it is a regular file whose SHA-256 is `fp`; a file there that is not is
/// recorded as a problem.
fn load_checked(path: &Path, fp: &[u8; 32], cache: &mut Cache) -> Option<Found> {
    let meta = std::fs::symlink_metadata(path).ok()?;
    let problem = |cache: &mut Cache, what: String| {
        cache.problems.push(format!("{}: {what}", path.display()));
        None
    };
    if !meta.is_file() {
        return problem(cache, "not a regular file; ignored".into());
    }
    let file = match ModelFile::read(path) {
        Ok(f) => f,
        Err(e) => return problem(cache, format!("unusable ({}); ignored", first_line(&e))),
    };
    if &file.fingerprint != fp {
        return problem(
            cache,
            format!(
                "its SHA-256 is {}…, not the {}… it is looked up for (damaged or replaced); ignored",
                hex_prefix(&file.fingerprint, 8),
                hex_prefix(fp, 8)
            ),
        );
    }
    Some(Found { file: Arc::new(file), place: path.display().to_string() })
}

/// Every regular `*.safetensors` file directly in `dir` (no larger than a model file may be),
/// with the SHA-256 of its bytes. An unreadable folder or file is left out.
fn index_folder(dir: &Path) -> Vec<(PathBuf, [u8; 32])> {
    let Ok(entries) = std::fs::read_dir(dir) else { return Vec::new() };
    let mut paths: Vec<PathBuf> = entries
        .flatten()
        .filter(|e| e.file_type().is_ok_and(|t| t.is_file()))
        .filter(|e| e.metadata().is_ok_and(|m| m.len() <= MODEL_FILE_MAX_BYTES))
        .map(|e| e.path())
        .filter(|p| p.extension().is_some_and(|x| x == MODEL_EXTENSION))
        .collect();
    paths.sort();
    paths.into_iter().filter_map(|p| crate::image_io::read_regular(&p).ok().map(|b| (p, fingerprint(&b)))).collect()
}

fn first_line(e: &KilnError) -> String {
    e.to_string().lines().next().unwrap_or("").to_string()
}
