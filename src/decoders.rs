//! Decoding containers written with any model: each container's model is found by its
//! fingerprint in a [`ModelStore`], and one [`Codec`] per model is built and kept.

use std::collections::HashMap;
use std::sync::{Arc, Mutex};

use crate::codec::Codec;
use crate::container;
use crate::error::Result;
use crate::image_io::Picture;
use crate::model::ModelFile;
use crate::model::store::{Found, ModelStore};

/// A codec and where its model was found.
type Placed = (Arc<Codec>, String);

/// Codecs for whatever models the containers it is given name.
#[derive(Debug)]
pub struct Decoders {
    store: ModelStore,
    codecs: Mutex<HashMap<[u8; 32], Placed>>,
}

impl Decoders {
    /// Decoders that find models in `store`.
    pub fn new(store: ModelStore) -> Self {
        Decoders { store, codecs: Mutex::default() }
    }

    /// Where models are looked up.
    pub fn store(&self) -> &ModelStore {
        &self.store
    }

    /// The codec for the model with fingerprint `fp`, and where that model was found.
    ///
    /// # Errors
    /// [`crate::KilnError::ModelNotFound`] when no place holds it.
    pub fn codec_for(&self, fp: &[u8; 32]) -> Result<Placed> {
        let mut codecs = self.codecs.lock().unwrap_or_else(|e| e.into_inner());
        if let Some(c) = codecs.get(fp) {
            return Ok(c.clone());
        }
        let Found { file, place } = self.store.find(fp)?;
        let codec = (Arc::new(Codec::new(ModelFile::clone(&file))?), place);
        codecs.insert(*fp, codec.clone());
        Ok(codec)
    }

    /// Decodes a container with the model it names.
    ///
    /// # Errors
    /// A malformed container ([`crate::KilnError::Corrupt`] and the like), or no model found.
    pub fn decode(&self, bytes: &[u8]) -> Result<Picture> {
        let header = container::read_header(bytes)?;
        self.codec_for(&header.model_fingerprint)?.0.decode(bytes)
    }
}
