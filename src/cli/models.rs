//! Where the commands look for models, and `kiln models`.

use std::path::{Path, PathBuf};

use clap::Args;
use kiln::KilnError;
use kiln::model::shipped::{DEFAULT_ALIAS, DEFAULT_NAME, SHIPPED};
use kiln::model::store::{ARCHIVE_MODELS_DIR, ModelStore};
use kiln::model::{ModelFile, hex_prefix};
use serde_json::json;

/// Environment variable naming folders of models (separated like `PATH`), searched after
/// `--models`.
pub const MODELS_ENV: &str = "KILN_MODELS";

/// Folders of model files to search by fingerprint.
#[derive(Debug, Clone, Default, Args)]
pub struct LookupArgs {
    /// A folder of model files to search for the model a container names (repeatable; the
    /// folders in KILN_MODELS are searched after these).
    #[arg(long = "models", value_name = "DIR")]
    folders: Vec<PathBuf>,
}

impl LookupArgs {
    /// `--models` folders, then those of the environment variable.
    fn all_folders(&self) -> Vec<(String, PathBuf)> {
        let mut out: Vec<(String, PathBuf)> =
            self.folders.iter().map(|d| (format!("--models {}", d.display()), d.clone())).collect();
        if let Some(v) = std::env::var_os(MODELS_ENV) {
            out.extend(
                std::env::split_paths(&v)
                    .filter(|d| !d.as_os_str().is_empty())
                    .map(|d| (format!("{MODELS_ENV} {}", d.display()), d)),
            );
        }
        out
    }

    /// The store a decoding command searches: `explicit` (the `--model` value) first, then the
    /// folders, then the shipped models. Archive folders are added by the archive commands.
    pub fn store(&self, explicit: Option<&Path>) -> anyhow::Result<ModelStore> {
        let mut store = ModelStore::new();
        if let Some(spec) = explicit {
            store = store.with_model(ModelFile::load(Some(spec))?, format!("--model {}", spec.display()));
        }
        for (label, dir) in self.all_folders() {
            store = store.with_folder(dir, label);
        }
        Ok(store)
    }
}

/// `store` with the models folder of every archive the container at `path` lies in (nearest
/// first): decoding one container of an archive needs no option.
pub fn with_enclosing_archives(mut store: ModelStore, path: &Path) -> ModelStore {
    let Ok(abs) = path.canonicalize() else { return store };
    for dir in abs.ancestors().skip(1) {
        if dir.join(ARCHIVE_MODELS_DIR).is_dir() {
            store = store.with_archive(dir);
        }
    }
    store
}

/// The error of a failed lookup, with the options that would have found the model.
pub fn explain(e: KilnError) -> anyhow::Error {
    match e {
        KilnError::ModelNotFound { .. } => {
            let first = e.to_string().lines().next().unwrap_or("").to_string();
            anyhow::anyhow!(
                "{first}\nhint: pass the model file the container was written with (--model FILE), or a folder that holds it (--models DIR, or {MODELS_ENV}); `kiln models` lists the shipped models"
            )
        }
        other => other.into(),
    }
}

/// A one-line description of where the shipped model `name` comes from in this installation.
fn availability(m: &kiln::model::ShippedModel) -> String {
    match m.location() {
        Ok(None) => "embedded".into(),
        Ok(Some(p)) => p.display().to_string(),
        Err(_) => "MISSING from this installation".into(),
    }
}

/// `kiln models`: the shipped models (and those in the lookup folders).
pub fn list(lookup: LookupArgs, as_json: bool) -> anyhow::Result<()> {
    let folders = lookup.all_folders();
    let folder_models: Vec<(String, Vec<(PathBuf, String)>)> = folders
        .iter()
        .map(|(label, dir)| {
            let mut files: Vec<(PathBuf, String)> = std::fs::read_dir(dir)
                .into_iter()
                .flatten()
                .flatten()
                .map(|e| e.path())
                .filter(|p| p.extension().is_some_and(|x| x == "safetensors"))
                .filter_map(|p| ModelFile::read(&p).ok().map(|f| (p, hex_prefix(&f.fingerprint, 32))))
                .collect();
            files.sort();
            (label.clone(), files)
        })
        .collect();
    if as_json {
        let shipped: Vec<_> = SHIPPED
            .iter()
            .map(|m| {
                json!({"name": m.name, "fingerprint": m.fingerprint, "bytes": m.size, "shipped": m.shipped,
                       "default": m.name == DEFAULT_NAME, "available": availability(m), "note": m.note})
            })
            .collect();
        let user: Vec<_> = folder_models
            .iter()
            .flat_map(|(label, files)| {
                files.iter().map(move |(p, fp)| json!({"folder": label, "path": p, "fingerprint": fp}))
            })
            .collect();
        println!("{}", serde_json::to_string_pretty(&json!({"shipped": shipped, "folders": user}))?);
        return Ok(());
    }
    println!("Shipped models (`{DEFAULT_ALIAS}` = {DEFAULT_NAME}); containers record the fingerprint:");
    for m in SHIPPED {
        let mark = if m.name == DEFAULT_NAME { "*" } else { " " };
        println!("{mark} {:<18} {}  {}  {:>9} B  {}", m.name, &m.fingerprint[..16], m.shipped, m.size, availability(m));
        println!("    {}", m.note);
    }
    for (label, files) in &folder_models {
        println!("{label}: {} model file(s)", files.len());
        for (p, fp) in files {
            println!("  {}  {}", &fp[..16], p.display());
        }
    }
    Ok(())
}
