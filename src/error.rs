//! The library's error type: every user-facing failure names the problem and, after a newline,
//! what to do about it.

use std::path::PathBuf;

/// Everything that can go wrong in Kiln's library code.
#[derive(Debug, thiserror::Error)]
pub enum KilnError {
    /// A container file is malformed, truncated or corrupted.
    #[error(
        "corrupt container: {0}\nhint: the file was damaged or is not a Kiln container; re-create it from the source image"
    )]
    Corrupt(String),
    /// A container written by a format version this build does not read.
    #[error(
        "unsupported container version {found} (this build reads version {supported})\nhint: decode it with the Kiln release that wrote it"
    )]
    UnsupportedVersion {
        /// Version found in the file.
        found: u16,
        /// Version this build reads.
        supported: u16,
    },
    /// The container was written with a different model than the one given.
    #[error(
        "model mismatch: the container was written with model {expected}, but model {given} was given\nhint: pass the model it was written with via --model"
    )]
    ModelMismatch {
        /// Fingerprint recorded in the container (hex prefix).
        expected: String,
        /// Fingerprint of the model that was given (hex prefix).
        given: String,
    },
    /// No place searched holds the model a container was written with.
    #[error(
        "no model with fingerprint {fingerprint} found; searched: {}\nhint: supply the model file the container was written with, or a folder that holds it",
        searched.join("; ")
    )]
    ModelNotFound {
        /// The fingerprint the container names (hex prefix).
        fingerprint: String,
        /// Every place searched, in order, in words.
        searched: Vec<String>,
    },
    /// An input image the codec cannot take as it is.
    #[error("unsupported image: {0}")]
    UnsupportedImage(String),
    /// A model file that cannot be used.
    #[error("bad model file: {0}\nhint: export a model with `kiln train`, or omit --model to use the embedded default")]
    BadModel(String),
    /// A value outside the range an argument accepts.
    #[error("invalid argument: {0}")]
    InvalidArgument(String),
    /// An I/O failure, with the path involved.
    #[error("{}: {cause}", path.display())]
    Io {
        /// The file or folder involved.
        path: PathBuf,
        /// The underlying error (shown in the message, not chained, so it prints once).
        cause: std::io::Error,
    },
    /// An output path that must not be written (a folder, link, special file or an input).
    #[error("{}: {reason}", path.display())]
    OutputRefused {
        /// The output path.
        path: PathBuf,
        /// Why it is refused.
        reason: String,
    },
    /// An output path that already holds a file, and replacing it was not asked for.
    #[error("{} already exists\nhint: choose another output name, or ask for it to be replaced (--force)", .0.display())]
    OutputExists(PathBuf),
    /// A stored relative path (catalog row, shard) that could name something outside its folder.
    #[error("unsafe path {path:?}: {reason}; refused")]
    UnsafePath {
        /// The path as stored.
        path: String,
        /// What is wrong with it.
        reason: String,
    },
    /// The archive catalog (SQLite) failed.
    #[error("catalog {}: {message}", path.display())]
    Catalog {
        /// The catalog file.
        path: PathBuf,
        /// What went wrong, in plain words.
        message: String,
        /// Whether the cause is the storage itself (disk full, read-only, no permission).
        storage: bool,
    },
    /// A tensor computation failed (a bug or an out-of-memory condition).
    #[error("tensor computation failed: {0}")]
    Tensor(#[from] candle_core::Error),
    /// Training stopped because the loss became NaN or infinite.
    #[error(
        "training diverged at step {step}: loss is {loss}\nhint: the last good checkpoint was kept; resume from it with a lower --lr"
    )]
    Diverged {
        /// The step at which the loss was not finite.
        step: u64,
        /// The loss value.
        loss: f32,
    },
}

/// Result type of the Kiln library.
pub type Result<T> = std::result::Result<T, KilnError>;

impl KilnError {
    /// Wraps an I/O error with the path it concerns.
    pub fn io(path: impl Into<PathBuf>, source: std::io::Error) -> Self {
        KilnError::Io { path: path.into(), cause: source }
    }

    /// Whether this error comes from the storage being unusable (disk full, quota exceeded, file
    /// size limit, read-only file system, no permission): retrying other files cannot succeed, so a batch
    /// job must stop.
    pub fn is_storage_failure(&self) -> bool {
        use std::io::ErrorKind as K;
        match self {
            KilnError::Io { cause, .. } => {
                matches!(
                    cause.kind(),
                    K::StorageFull | K::QuotaExceeded | K::FileTooLarge | K::ReadOnlyFilesystem | K::PermissionDenied
                )
            }
            KilnError::Catalog { storage, .. } => *storage,
            _ => false,
        }
    }
}
