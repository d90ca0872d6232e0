//! The archive catalog: one SQLite database per archive (or per shard), one row per packed file.

use std::path::{Path, PathBuf};

use rusqlite::{Connection, OptionalExtension, params};

use crate::error::{KilnError, Result};

/// File name of the merged catalog inside the archive folder.
pub const CATALOG_FILE: &str = "catalog.sqlite";

/// File name of shard `i` of `n`'s catalog.
pub fn shard_file(i: u32, n: u32) -> String {
    format!("catalog.shard-{i}-of-{n}.sqlite")
}

/// One packed file.
#[derive(Debug, Clone, PartialEq)]
pub struct Entry {
    /// Path relative to the source root, `/`-separated.
    pub rel_path: String,
    /// Source file size in bytes.
    pub source_size: u64,
    /// Source modification time, nanoseconds since the Unix epoch.
    pub source_mtime_ns: i64,
    /// SHA-256 (hex) of the decoded source pixels (see [`super::pixel_hash`]).
    pub pixel_sha256: String,
    /// Container path relative to the archive root.
    pub container_path: String,
    /// Container size in bytes.
    pub container_size: u64,
    /// Bytes of the same pixels as PNG (default compression).
    pub png_size: u64,
    /// Image width.
    pub width: u32,
    /// Image height.
    pub height: u32,
    /// Channels (1 or 3).
    pub channels: u8,
    /// Quality used.
    pub quality: f64,
    /// Bits per pixel of the container.
    pub bpp: f64,
    /// PSNR of the decoded result against the source, dB.
    pub psnr: f64,
    /// MS-SSIM of the decoded result against the source; `None` where it is undefined (images
    /// smaller than its five scales need: under 11 px on a side).
    pub ms_ssim: Option<f64>,
    /// Model fingerprint (hex).
    pub model_fingerprint: String,
    /// When it was packed (seconds since the Unix epoch).
    pub packed_at: i64,
    /// SHA-256 (hex) of the container's decoded pixels (see [`super::pixel_hash`]): the same on
    /// every CPU, so `verify` compares it exactly. `None` for rows packed before decoding was
    /// exact (a later `pack` run records it).
    pub decoded_sha256: Option<String>,
}

/// An open catalog.
#[derive(Debug)]
pub struct Catalog {
    conn: Connection,
    path: PathBuf,
}

fn db(path: &Path) -> impl Fn(rusqlite::Error) -> KilnError + '_ {
    move |e| {
        use rusqlite::ErrorCode as C;
        let code = match &e {
            rusqlite::Error::SqliteFailure(f, _) => Some(f.code),
            _ => None,
        };
        let plain = match code {
            Some(C::DiskFull) => Some("the disk is full"),
            Some(C::ReadOnly) => Some("the catalog or its folder is read-only"),
            Some(C::PermissionDenied) => Some("permission denied"),
            Some(C::CannotOpen) => Some("cannot open the file (missing folder or no permission)"),
            Some(C::SystemIoFailure) => Some("the storage failed (I/O error)"),
            _ => None,
        };
        KilnError::Catalog {
            path: path.to_path_buf(),
            message: match plain {
                Some(p) => format!("{p} (SQLite: {e})"),
                None => e.to_string(),
            },
            storage: plain.is_some(),
        }
    }
}

/// A file under the source root that a pack run did not archive, as recorded in the catalog.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SkippedRow {
    /// Path relative to the source root as shown to people.
    pub rel_path: String,
    /// Why it was not archived.
    pub reason: String,
    /// Whether it is an error (an image that should have been archived) or a note.
    pub error: bool,
}

/// A model the archive carries in its models folder, as recorded in the catalog.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ModelRow {
    /// SHA-256 of the model file (hex, 64 digits); the file is `models/<fingerprint>.safetensors`.
    pub fingerprint: String,
    /// Size of the model file in bytes.
    pub size: u64,
    /// What the model was called when it was stored: a shipped model's name, or the file name
    /// it was given as.
    pub name: String,
    /// When it was first stored (seconds since the Unix epoch).
    pub added_at: i64,
}

const COLUMNS: &str = "rel_path, source_size, source_mtime_ns, pixel_sha256, container_path, container_size, png_size, \
                       width, height, channels, quality, bpp, psnr, ms_ssim, model_fingerprint, packed_at, decoded_sha256";

impl Catalog {
    /// Opens (creating if needed) the catalog at `path`.
    pub fn open(path: &Path) -> Result<Self> {
        let conn = Connection::open(path).map_err(db(path))?;
        conn.execute_batch(
            "PRAGMA journal_mode=WAL; PRAGMA synchronous=FULL;
             CREATE TABLE IF NOT EXISTS files (
               rel_path TEXT PRIMARY KEY, source_size INTEGER NOT NULL, source_mtime_ns INTEGER NOT NULL,
               pixel_sha256 TEXT NOT NULL, container_path TEXT NOT NULL, container_size INTEGER NOT NULL,
               png_size INTEGER NOT NULL, width INTEGER NOT NULL, height INTEGER NOT NULL, channels INTEGER NOT NULL,
               quality REAL NOT NULL, bpp REAL NOT NULL, psnr REAL NOT NULL, ms_ssim REAL,
               model_fingerprint TEXT NOT NULL, packed_at INTEGER NOT NULL, decoded_sha256 TEXT);
             CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
             CREATE TABLE IF NOT EXISTS skipped (
               rel_path TEXT PRIMARY KEY, reason TEXT NOT NULL, is_error INTEGER NOT NULL);
             CREATE TABLE IF NOT EXISTS models (
               fingerprint TEXT PRIMARY KEY, size INTEGER NOT NULL, name TEXT NOT NULL, added_at INTEGER NOT NULL);",
        )
        .map_err(db(path))?;
        let mut cat = Catalog { conn, path: path.to_path_buf() };
        cat.allow_undefined_ms_ssim()?;
        cat.add_decoded_checksum()?;
        Ok(cat)
    }

    /// Catalogs written before decoding was exact have no `decoded_sha256` column: it is added
    /// (empty for their rows).
    fn add_decoded_checksum(&mut self) -> Result<()> {
        let present: i64 = self
            .conn
            .query_row("SELECT COUNT(*) FROM pragma_table_info('files') WHERE name = 'decoded_sha256'", [], |r| {
                r.get(0)
            })
            .map_err(db(&self.path))?;
        if present == 0 {
            self.conn.execute_batch("ALTER TABLE files ADD COLUMN decoded_sha256 TEXT").map_err(db(&self.path))?;
        }
        Ok(())
    }

    /// Catalogs written before MS-SSIM could be undefined declared it `NOT NULL`; SQLite cannot
    /// drop a constraint in place, so the table is rebuilt once (one transaction, rows unchanged).
    fn allow_undefined_ms_ssim(&mut self) -> Result<()> {
        let not_null: i64 = self
            .conn
            .query_row("SELECT \"notnull\" FROM pragma_table_info('files') WHERE name = 'ms_ssim'", [], |r| r.get(0))
            .map_err(db(&self.path))?;
        if not_null == 0 {
            return Ok(());
        }
        let tx = self.conn.transaction().map_err(db(&self.path))?;
        let create: String = tx
            .query_row("SELECT sql FROM sqlite_master WHERE type = 'table' AND name = 'files'", [], |r| r.get(0))
            .map_err(db(&self.path))?;
        let create = create.replace("ms_ssim REAL NOT NULL", "ms_ssim REAL").replacen("files", "files_new", 1);
        tx.execute_batch(&format!(
            "{create}; INSERT INTO files_new SELECT * FROM files; DROP TABLE files; ALTER TABLE files_new RENAME TO files;"
        ))
        .map_err(db(&self.path))?;
        tx.commit().map_err(db(&self.path))
    }

    /// Replaces the list of skipped files with `rows` (one transaction).
    pub fn set_skipped(&mut self, rows: &[SkippedRow]) -> Result<()> {
        let tx = self.conn.transaction().map_err(db(&self.path))?;
        tx.execute("DELETE FROM skipped", []).map_err(db(&self.path))?;
        for r in rows {
            tx.execute(
                "INSERT OR REPLACE INTO skipped (rel_path, reason, is_error) VALUES (?1, ?2, ?3)",
                params![r.rel_path, r.reason, r.error as i64],
            )
            .map_err(db(&self.path))?;
        }
        tx.commit().map_err(db(&self.path))
    }

    /// Files the last pack run did not archive, ordered by path.
    pub fn skipped(&self) -> Result<Vec<SkippedRow>> {
        let mut st = self
            .conn
            .prepare("SELECT rel_path, reason, is_error FROM skipped ORDER BY rel_path")
            .map_err(db(&self.path))?;
        let rows = st
            .query_map([], |r| {
                Ok(SkippedRow { rel_path: r.get(0)?, reason: r.get(1)?, error: r.get::<_, i64>(2)? != 0 })
            })
            .map_err(db(&self.path))?;
        rows.collect::<std::result::Result<Vec<_>, _>>().map_err(db(&self.path))
    }

    /// Records a model the archive carries (a row already there for its fingerprint is kept).
    pub fn put_model(&self, m: &ModelRow) -> Result<()> {
        self.conn
            .execute(
                "INSERT OR IGNORE INTO models (fingerprint, size, name, added_at) VALUES (?1, ?2, ?3, ?4)",
                params![m.fingerprint, m.size as i64, m.name, m.added_at],
            )
            .map_err(db(&self.path))?;
        Ok(())
    }

    /// The models the archive carries, by fingerprint.
    pub fn models(&self) -> Result<Vec<ModelRow>> {
        let mut st = self
            .conn
            .prepare("SELECT fingerprint, size, name, added_at FROM models ORDER BY fingerprint")
            .map_err(db(&self.path))?;
        let rows = st
            .query_map([], |r| {
                Ok(ModelRow {
                    fingerprint: r.get(0)?,
                    size: r.get::<_, i64>(1)? as u64,
                    name: r.get(2)?,
                    added_at: r.get(3)?,
                })
            })
            .map_err(db(&self.path))?;
        rows.collect::<std::result::Result<Vec<_>, _>>().map_err(db(&self.path))
    }

    /// Opens an existing catalog, failing with a hint if there is none.
    pub fn open_existing(path: &Path) -> Result<Self> {
        if !path.is_file() {
            return Err(KilnError::InvalidArgument(format!(
                "no catalog at {}\nhint: run `kiln pack` first, or `kiln catalog merge` after sharded runs",
                path.display()
            )));
        }
        Self::open(path)
    }

    /// Sets a metadata value.
    pub fn set_meta(&self, key: &str, value: &str) -> Result<()> {
        self.conn
            .execute(
                "INSERT INTO meta(key, value) VALUES (?1, ?2) ON CONFLICT(key) DO UPDATE SET value = ?2",
                params![key, value],
            )
            .map_err(db(&self.path))?;
        Ok(())
    }

    /// Reads a metadata value.
    pub fn meta(&self, key: &str) -> Result<Option<String>> {
        self.conn
            .query_row("SELECT value FROM meta WHERE key = ?1", [key], |r| r.get(0))
            .optional()
            .map_err(db(&self.path))
    }

    /// Inserts or replaces an entry (one transaction).
    pub fn put(&mut self, e: &Entry) -> Result<()> {
        let tx = self.conn.transaction().map_err(db(&self.path))?;
        tx.execute(
            &format!(
                "INSERT OR REPLACE INTO files ({COLUMNS}) VALUES (?1,?2,?3,?4,?5,?6,?7,?8,?9,?10,?11,?12,?13,?14,?15,?16,?17)"
            ),
            params![
                e.rel_path,
                e.source_size as i64,
                e.source_mtime_ns,
                e.pixel_sha256,
                e.container_path,
                e.container_size as i64,
                e.png_size as i64,
                e.width,
                e.height,
                e.channels,
                e.quality,
                e.bpp,
                e.psnr,
                e.ms_ssim,
                e.model_fingerprint,
                e.packed_at,
                e.decoded_sha256
            ],
        )
        .map_err(db(&self.path))?;
        tx.commit().map_err(db(&self.path))
    }

    /// The entry for `rel_path`, if any.
    pub fn get(&self, rel_path: &str) -> Result<Option<Entry>> {
        self.conn
            .query_row(&format!("SELECT {COLUMNS} FROM files WHERE rel_path = ?1"), [rel_path], row_to_entry)
            .optional()
            .map_err(db(&self.path))
    }

    /// Every entry, ordered by path.
    pub fn all(&self) -> Result<Vec<Entry>> {
        let mut st =
            self.conn.prepare(&format!("SELECT {COLUMNS} FROM files ORDER BY rel_path")).map_err(db(&self.path))?;
        let rows = st.query_map([], row_to_entry).map_err(db(&self.path))?;
        rows.collect::<std::result::Result<Vec<_>, _>>().map_err(db(&self.path))
    }
}

fn row_to_entry(r: &rusqlite::Row) -> rusqlite::Result<Entry> {
    Ok(Entry {
        rel_path: r.get(0)?,
        source_size: r.get::<_, i64>(1)? as u64,
        source_mtime_ns: r.get(2)?,
        pixel_sha256: r.get(3)?,
        container_path: r.get(4)?,
        container_size: r.get::<_, i64>(5)? as u64,
        png_size: r.get::<_, i64>(6)? as u64,
        width: r.get(7)?,
        height: r.get(8)?,
        channels: r.get(9)?,
        quality: r.get(10)?,
        bpp: r.get(11)?,
        psnr: r.get(12)?,
        ms_ssim: r.get(13)?,
        model_fingerprint: r.get(14)?,
        packed_at: r.get(15)?,
        decoded_sha256: r.get(16)?,
    })
}
