//! The models that ship with Kiln: stable names, fixed bytes, found without being asked.
//!
//! A container names the SHA-256 of the model file that wrote it, so a model that ever shipped
//! must stay available, byte for byte, to every later Kiln. What must hold:
//!
//! 1. An entry of [`SHIPPED`] is never removed, renamed or given other bytes; a new model is a
//!    new entry (a new name) appended at the end, and [`DEFAULT_NAME`] moves to it.
//! 2. The file `models/shipped/<name>.safetensors` in the repository holds exactly the bytes
//!    whose SHA-256 is the entry's fingerprint (`tests/model_store.rs` pins every fingerprint and
//!    fails if a file changes).
//! 3. The newest model is embedded in the binary; the others are read from the first shipped
//!    folder that holds them ([`shipped_folders`]), and their hash is checked before use.

use std::borrow::Cow;
use std::path::PathBuf;

use crate::error::{KilnError, Result};
use crate::model::hex_prefix;

/// A model that shipped with Kiln.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ShippedModel {
    /// Stable name (`photo-YYYY-MM-DD` and a letter in order of shipping that day).
    pub name: &'static str,
    /// SHA-256 of the model file, lowercase hex (what containers record).
    pub fingerprint: &'static str,
    /// Size of the model file in bytes.
    pub size: u64,
    /// Day it shipped.
    pub shipped: &'static str,
    /// What it is and how it measured when it shipped.
    pub note: &'static str,
}

/// Word that names the newest shipped model.
pub const DEFAULT_ALIAS: &str = "default";

/// Folder, relative to the repository (and to a shipped-models folder beside the binary), that
/// holds every shipped model as `<name>.safetensors`.
pub const SHIPPED_DIR: &str = "models/shipped";

/// Every model that ever shipped, oldest first. Append only (see the module docs).
pub const SHIPPED: &[ShippedModel] = &[
    ShippedModel {
        name: "photo-2026-12-02a",
        fingerprint: "4a5e71a36543b52c4f199b4eb69222d3e14b7e82312d078828671bceaa249bd5",
        size: 6_762_108,
        shipped: "2026-12-02",
        note: "N=64, M=96, stride 16; step 6000 of the first photo run; not yet better than JPEG",
    },
    ShippedModel {
        name: "photo-2026-12-02b",
        fingerprint: "0cbaae960caa91f689082a11afbcd38e91eeb6c1c070247156aa70017ce98d5b",
        size: 6_762_472,
        shipped: "2026-12-02",
        note: "N=64, M=96, stride 16; step 10800; BD-rate vs JPEG on the validation photos when shipped +29.7%",
    },
    ShippedModel {
        name: "photo-2026-12-02c",
        fingerprint: "cdb1ab042eac0de15785e4ed6eaf2a1b044bb395534e25211f1dde50b58ee6e8",
        size: 6_762_816,
        shipped: "2026-12-02",
        note: "N=64, M=96, stride 16; step 20864; BD-rate vs JPEG on the validation photos when shipped +24.9%",
    },
    ShippedModel {
        name: "photo-2026-12-02d",
        fingerprint: "f0526dfacbc15c11390ecbbfc71b5e5ba093eb053835858bf8baa2443246690e",
        size: 6_762_420,
        shipped: "2026-12-02",
        note: "N=64, M=96, stride 16; step 32047; BD-rate vs JPEG on the validation photos when shipped +13.8%",
    },
    ShippedModel {
        name: "photo-2026-12-02e",
        fingerprint: "600b984a4c1db2b7f1bbaaf54e6d81f634f66820a3e0509214dcb071ba0c1896",
        size: 6_762_496,
        shipped: "2026-12-02",
        note: "N=64, M=96, stride 16; step 48087; BD-rate vs libjpeg (rd_check) when shipped +24.8%",
    },
    ShippedModel {
        name: "photo-2026-12-02f",
        fingerprint: "e0c437d795b4507fc6afd3aa6e1e63eb06dad8b6ff6f7aa3594d427a74de62c7",
        size: 6_762_504,
        shipped: "2026-12-02",
        note: "N=64, M=96, stride 16; step 54000; BD-rate vs libjpeg (rd_check) when shipped +22.8%",
    },
    ShippedModel {
        name: "photo-2026-12-02g",
        fingerprint: "7a32abd4e7a60ff513cd39906d6bc2608134ab5c9c2c0d8b8ad8d01663ce4e4a",
        size: 6_762_648,
        shipped: "2026-12-02",
        note: "N=64, M=96, stride 16; step 72000; BD-rate vs libjpeg (rd_check) when shipped +17.3%",
    },
    ShippedModel {
        name: "photo-2026-12-03a",
        fingerprint: "9c799b23b813962d31d3a4241d7f0fdb4ce974cd4d328766be7fb5ad0d6dfcd0",
        size: 8_930_864,
        shipped: "2026-12-03",
        note: "N=64, M=192, stride 16; step 88000; BD-rate vs libjpeg (rd_check) when shipped +10.6%",
    },
    ShippedModel {
        name: "photo-2026-12-03b",
        fingerprint: "9b779777478a33de55653f7134975781114170d885a6b72d9a303e5218b4b1c2",
        size: 8_930_872,
        shipped: "2026-12-03",
        note: "N=64, M=192, stride 16; step 94000; BD-rate vs libjpeg (rd_check) when shipped +8.4%",
    },
    ShippedModel {
        name: "photo-2026-12-03c",
        fingerprint: "f7f855be0a8c37730d8cd045aabce90f85553c52857325a5cf6fbd551f2ee3cc",
        size: 7_896_900,
        shipped: "2026-12-03",
        note: "N=64, M=192, stride 8; step 110946; BD-rate vs libjpeg (rd_check) when shipped -28.1%",
    },
];

/// Name of the newest shipped model, the one [`DEFAULT_ALIAS`] stands for.
pub const DEFAULT_NAME: &str = "photo-2026-12-03c";

/// The newest shipped model's bytes, embedded in the binary.
pub static DEFAULT_MODEL_BYTES: &[u8] = include_bytes!("../../models/shipped/photo-2026-12-03c.safetensors");

impl ShippedModel {
    /// The entry [`DEFAULT_ALIAS`] stands for.
    pub fn newest() -> &'static ShippedModel {
        Self::by_name(DEFAULT_NAME).expect("DEFAULT_NAME is an entry of SHIPPED")
    }

    /// The entry called `name`, or the newest for [`DEFAULT_ALIAS`].
    pub fn by_name(name: &str) -> Option<&'static ShippedModel> {
        let name = if name == DEFAULT_ALIAS { DEFAULT_NAME } else { name };
        SHIPPED.iter().find(|m| m.name == name)
    }

    /// The entry whose fingerprint is `fingerprint`.
    pub fn by_fingerprint(fingerprint: &[u8; 32]) -> Option<&'static ShippedModel> {
        let hex = hex_prefix(fingerprint, 32);
        SHIPPED.iter().find(|m| m.fingerprint == hex)
    }

    /// Whether its bytes are embedded in this binary.
    pub fn is_embedded(&self) -> bool {
        self.name == DEFAULT_NAME
    }

    /// Where this binary finds its bytes: `None` when embedded, else the first shipped folder
    /// that holds the file (hash not yet checked), or `Err` listing the folders searched.
    pub fn location(&self) -> std::result::Result<Option<PathBuf>, Vec<PathBuf>> {
        if self.is_embedded() {
            return Ok(None);
        }
        let folders = shipped_folders();
        let file = format!("{}.safetensors", self.name);
        folders.iter().map(|d| d.join(&file)).find(|p| p.is_file()).map(Some).ok_or(folders)
    }

    /// The model file's bytes, checked against the fingerprint.
    ///
    /// # Errors
    /// [`KilnError::BadModel`] when no shipped folder holds the file, or the file found there
    /// has other bytes (the folder was damaged or edited).
    pub fn bytes(&self) -> Result<Cow<'static, [u8]>> {
        let path = match self.location() {
            Ok(None) => return Ok(Cow::Borrowed(DEFAULT_MODEL_BYTES)),
            Ok(Some(p)) => p,
            Err(folders) => {
                let list: Vec<String> = folders.iter().map(|p| p.display().to_string()).collect();
                return Err(KilnError::BadModel(format!(
                    "shipped model {} is not embedded in this binary and is in none of {}",
                    self.name,
                    list.join(", ")
                )));
            }
        };
        let bytes = crate::image_io::read_regular(&path)?;
        if hex_prefix(&super::fingerprint(&bytes), 32) != self.fingerprint {
            return Err(KilnError::BadModel(format!(
                "{} does not hold shipped model {} (its SHA-256 differs from {}); the file was changed",
                path.display(),
                self.name,
                &self.fingerprint[..16]
            )));
        }
        Ok(Cow::Owned(bytes))
    }
}

/// Folders searched for shipped models that are not embedded, in order: `kiln-models` beside
/// the executable, `../share/kiln/models` from the executable's folder (packaged installs), and
/// `models/shipped` of the source tree this binary was built from (running from the repository,
/// or `cargo install`, which builds from a kept copy of the sources).
pub fn shipped_folders() -> Vec<PathBuf> {
    let mut out = Vec::new();
    if let Some(dir) = std::env::current_exe().ok().and_then(|e| e.parent().map(PathBuf::from)) {
        out.push(dir.join("kiln-models"));
        out.push(dir.join("../share/kiln/models"));
    }
    out.push(PathBuf::from(env!("CARGO_MANIFEST_DIR")).join(SHIPPED_DIR));
    out
}
