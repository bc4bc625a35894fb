//! The `tagweave` command: parses arguments, calls the library crates, prints results.

mod apply;
mod ask;
mod curve;
mod demo;
mod eval;
mod exit;
mod progress;
mod scan;
mod serve;
mod store_path;
mod tags;
mod train;

use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand};

/// Learns one shared code for your pictures and their keyword tags, on your own machine.
#[derive(Parser)]
#[command(name = "tagweave", version, about, propagate_version = true)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Index a photo folder: pictures, their sidecar tags, and what changed since last time.
    Scan(scan::ScanArgs),
    /// List the collection's tags, most used first.
    Tags(tags::TagsArgs),
    /// Learn the shared picture–tag code from the tagged pictures of a scanned folder,
    /// and give every picture its code.
    Train(train::TrainArgs),
    /// Measure how well tags are predicted on a tagged folder: hold some back, score them
    /// blind, compare with simple baselines.
    Eval(eval::EvalArgs),
    /// Pictures that fit the given tags, tagged or not, best first.
    Find(ask::FindArgs),
    /// Tags for pictures (in the collection or not); with --untagged, a review sheet for
    /// every untagged picture.
    Suggest(ask::SuggestArgs),
    /// Pictures like one picture, but moved away from some tags and toward others.
    Shift(ask::ShiftArgs),
    /// Tagged pictures whose tags do not fit them, worst first, and a review sheet.
    Audit(ask::AuditArgs),
    /// Write the accepted rows of a filled-in review sheet into the sidecars.
    Apply(apply::ApplyArgs),
    /// Run the whole job on the bundled invented archive (demo-collection/).
    Demo(demo::DemoArgs),
    /// A review page in your browser: search, look at pictures, accept or reject tags.
    Serve(serve::ServeArgs),
}

/// Options every command that reads a store shares.
#[derive(clap::Args, Clone)]
pub struct StoreArgs {
    /// Store folder. Default: FOLDER/.tagweave when scanning a folder, otherwise the nearest
    /// .tagweave/ in the current folder or above.
    #[arg(long, value_name = "PATH")]
    pub store: Option<PathBuf>,
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    let result = match cli.command {
        Command::Scan(args) => scan::run(&args),
        Command::Tags(args) => tags::run(&args),
        Command::Train(args) => train::run(&args),
        Command::Find(args) => ask::find(&args),
        Command::Suggest(args) => ask::suggest(&args),
        Command::Shift(args) => ask::shift(&args),
        Command::Audit(args) => ask::audit(&args),
        Command::Apply(args) => apply::run(&args),
        Command::Eval(args) => eval::run(&args),
        Command::Demo(args) => demo::run(&args),
        Command::Serve(args) => serve::run(&args),
    };
    match result {
        Ok(code) => code.into(),
        Err(error) => {
            eprintln!("tagweave: {error:#}");
            exit::Outcome::Failed.into()
        }
    }
}
