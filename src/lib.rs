//! Kiln: a learned image codec for single-domain image archives.
//!
//! The codec is a variational autoencoder with a mean-scale hyperprior: an analysis transform
//! maps the image to a latent, which is rounded and entropy-coded under a Gaussian whose mean and
//! scale a hyper-latent predicts; the synthesis transform reconstructs the image. See
//! `DEVELOPERS.md` for the data flow and [`container`] for the file format.

pub mod allocator;
pub mod archive;
pub mod codec;
pub mod container;
pub mod decoders;
pub mod entropy;
pub mod error;
pub mod eval;
pub mod files;
pub mod image_io;
pub mod kernels;
pub mod metrics;
pub mod model;
pub mod refine;
pub mod source_tree;
pub mod train;

pub use codec::{Codec, EncodeStats, Encoded};
pub use error::{KilnError, Result};
pub use image_io::{AlphaPolicy, Picture, PngEffort};
pub use model::{Model, ModelConfig, ModelFile};
