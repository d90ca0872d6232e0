//! Argument definitions (clap) and dispatch; one file per command.

mod archive;
mod compress;
mod evaluate;
mod inspect;
mod models;
mod refine_args;
mod train;

use std::path::PathBuf;

use clap::{Parser, Subcommand};

/// Kiln: a learned image codec for single-domain image archives.
#[derive(Debug, Parser)]
#[command(name = "kiln", version, about)]
pub struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Compress an image into a .kiln container.
    Compress(compress::CompressArgs),
    /// Decompress a .kiln container to PNG.
    Decompress(compress::DecompressArgs),
    /// Describe a container or a model (a file, `default`, or a shipped model's name).
    Inspect {
        /// A .kiln container, a model file, `default`, or a shipped model's name.
        file: PathBuf,
        /// Print JSON instead of text.
        #[arg(long)]
        json: bool,
        #[command(flatten)]
        lookup: models::LookupArgs,
    },
    /// List the shipped models (name, fingerprint, date, figures) and those in model folders.
    Models {
        #[command(flatten)]
        lookup: models::LookupArgs,
        /// Print JSON.
        #[arg(long)]
        json: bool,
    },
    /// Measure rate–distortion against JPEG and PNG on folders of images.
    Evaluate(evaluate::EvaluateArgs),
    /// Compress a whole image tree into an archive with a SQLite catalog (resumable).
    Pack(archive::PackArgs),
    /// Decode every container of an archive and check it against the catalog and the sources.
    Verify(archive::ArchiveArgs),
    /// Decode an archive back to PNG files, mirroring paths.
    Unpack {
        #[command(flatten)]
        archive: archive::ArchiveArgs,
        /// Output folder.
        out: PathBuf,
        /// PNG writer effort: `fast`, or `smallest` (several times slower, files about a quarter smaller).
        #[arg(long, value_enum, default_value = "fast")]
        png: kiln::PngEffort,
        /// Replace files that already exist in the output folder (regular files only).
        #[arg(long)]
        force: bool,
    },
    /// Totals of an archive.
    Stats {
        /// Archive folder.
        dest: PathBuf,
        /// Print JSON.
        #[arg(long)]
        json: bool,
    },
    /// Catalog maintenance.
    #[command(subcommand)]
    Catalog(archive::CatalogCommand),
    /// Train, resume or fine-tune a model on folders of images.
    Train(Box<train::TrainArgs>),
}

/// Runs the parsed command.
pub fn run(cli: Cli) -> anyhow::Result<()> {
    match cli.command {
        Command::Compress(a) => compress::compress(a),
        Command::Decompress(a) => compress::decompress(a),
        Command::Inspect { file, json, lookup } => inspect::inspect(&file, json, &lookup),
        Command::Models { lookup, json } => models::list(lookup, json),
        Command::Evaluate(a) => evaluate::evaluate(a),
        Command::Pack(a) => archive::pack(a),
        Command::Verify(a) => archive::verify(a),
        Command::Unpack { archive: a, out, png, force } => archive::unpack(a, out, png, force),
        Command::Stats { dest, json } => archive::stats(dest, json),
        Command::Catalog(c) => archive::catalog(c),
        Command::Train(a) => train::train(*a),
    }
}
