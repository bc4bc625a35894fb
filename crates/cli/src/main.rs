//! The `tagweave` command: parses arguments, calls the library crates, prints results.

// Every `println!`/`print!` of the crate goes through `output::write`, so a closed pipe
// ends the command quietly instead of panicking. Defined before the modules that use them.
macro_rules! println {
    () => {
        $crate::output::write(format_args!(""), true)
    };
    ($($arg:tt)*) => {
        $crate::output::write(format_args!($($arg)*), true)
    };
}
macro_rules! print {
    ($($arg:tt)*) => {
        $crate::output::write(format_args!($($arg)*), false)
    };
}

mod apply;
mod ask;
mod curve;
mod demo;
mod eval;
mod exit;
mod output;
mod progress;
mod scan;
mod serve;
mod shard;
mod store_path;
mod tags;
mod to_tag;
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
    /// Untagged pictures worth tagging by hand next, with a reason each, and a sheet to
    /// type their tags into.
    ToTag(to_tag::ToTagArgs),
    /// Write the accepted rows of a filled-in review sheet into the sidecars.
    Apply(apply::ApplyArgs),
    /// Run the whole job on the bundled invented archive (demo-collection/).
    Demo(demo::DemoArgs),
    /// A review page in your browser: search, look at pictures, accept or reject tags.
    Serve(serve::ServeArgs),
    /// For collections too large for one machine: learn the feature extractor once,
    /// describe and code the pictures in parts (Parquet files), merge them into the store.
    Shard(shard::ShardArgs),
}

impl Command {
    /// Whether the command was asked for JSON: then an error is printed as JSON too.
    fn json(&self) -> bool {
        match self {
            Command::Scan(a) => a.json,
            Command::Tags(a) => a.json,
            Command::Train(a) => a.json,
            Command::Eval(a) => a.json,
            Command::Find(a) => a.common.json,
            Command::Suggest(a) => a.json,
            Command::Shift(a) => a.common.json,
            Command::Audit(a) => a.json,
            Command::Apply(a) => a.json,
            Command::ToTag(a) => a.json,
            Command::Shard(a) => a.json(),
            Command::Demo(_) | Command::Serve(_) => false,
        }
    }
}

/// Options every command that reads a store shares.
#[derive(clap::Args, Clone)]
pub struct StoreArgs {
    /// Store folder, or the collection folder holding it in .tagweave/. Default:
    /// FOLDER/.tagweave when scanning a folder, otherwise the nearest .tagweave/ in the
    /// current folder or above.
    #[arg(long, value_name = "PATH")]
    pub store: Option<PathBuf>,
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    let json = cli.command.json();
    let result = match cli.command {
        Command::Scan(args) => scan::run(&args),
        Command::Tags(args) => tags::run(&args),
        Command::Train(args) => train::run(&args),
        Command::Find(args) => ask::find(&args),
        Command::Suggest(args) => ask::suggest(&args),
        Command::Shift(args) => ask::shift(&args),
        Command::Audit(args) => ask::audit(&args),
        Command::Apply(args) => apply::run(&args),
        Command::ToTag(args) => to_tag::run(&args),
        Command::Eval(args) => eval::run(&args),
        Command::Demo(args) => demo::run(&args),
        Command::Serve(args) => serve::run(&args),
        Command::Shard(args) => shard::run(&args),
    };
    match result {
        Ok(code) => code.into(),
        Err(error) => {
            // Under --json, standard output holds one JSON object whatever happens: the
            // answer, or this. People still read the message on standard error.
            let message = output::describe(&error);
            if json {
                println!("{}", output::error_json(&message));
            }
            eprintln!("tagweave: {message}");
            exit::Outcome::Failed.into()
        }
    }
}
