//! `tagweave serve`: the local review page of a trained collection.

use std::io::Write;

use tagweave_serve::{ReviewServer, ServeOptions};

use crate::exit::Outcome;
use crate::{store_path, StoreArgs};

/// The port when none is given: fixed, so the address can be bookmarked.
pub const DEFAULT_PORT: u16 = 7471;

#[derive(clap::Args)]
pub struct ServeArgs {
    #[command(flatten)]
    pub store: StoreArgs,
    /// Port on 127.0.0.1 (0 takes any free port; the address is printed).
    #[arg(long, default_value_t = DEFAULT_PORT)]
    pub port: u16,
    /// Show pictures and suggestions, but change no sidecar.
    #[arg(long)]
    pub read_only: bool,
}

pub fn run(args: &ServeArgs) -> anyhow::Result<Outcome> {
    // The store stays open (and locked) while serving, so no scan reads a sidecar mid-change.
    let store = store_path::open_existing(args.store.store.as_deref())?;
    let root = store.collection_root().to_path_buf();
    let options = ServeOptions {
        port: args.port,
        read_only: args.read_only,
    };
    let server = ReviewServer::start(store, &options)?;
    println!("Review page: {}", server.url());
    println!(
        "Open that address once, in the browser you will use: it lets that browser in and \
         then stops working (keep it to yourself until then). For another browser, start \
         `tagweave serve` again."
    );
    println!(
        "Serving {} on this machine only{}. Stop with Ctrl-C.",
        root.display(),
        if args.read_only { ", read-only" } else { "" }
    );
    std::io::stdout().flush()?;
    server.run()?;
    Ok(Outcome::Done)
}
