//! The local review page of a trained collection: search by tags, look at a picture and
//! the tags suggested for it, work through the review queue, and accept or reject tags.
//!
//! People judge pictures by looking at them, so this shows the pictures themselves. It is a
//! small HTTP server on the loopback interface with pages made on the server (no scripts,
//! no fonts or styles from elsewhere: everything is inside the binary).
//!
//! Promises:
//! - **Pictures only by id.** Pictures and their reduced copies are served by the 16-digit
//!   id of an indexed item and read from the item's indexed path; nothing in a request is
//!   ever used as a file path. Anything else is 404.
//! - **Changes only from our own pages.** Every change (a POST) must carry the run's
//!   token written into our pages' forms; requests naming another host, or saying they
//!   come from another site, are refused too. `read_only` refuses every change.
//! - **The same safe write as `tagweave apply`.** Accepted tags are planned, read back and
//!   written atomically by `tagweave-writeback`, originals kept as `NAME.orig`; the index
//!   is not rescanned (the page says so), and the server holds the store, and so its lock,
//!   for as long as it runs.

mod app;
mod guard;
mod http;
mod pages;
pub mod renditions;
mod text;

use std::net::{Ipv4Addr, SocketAddr, TcpListener};
use std::path::PathBuf;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Arc;

use tagweave_query::{Queries, QueryError};
use tagweave_store::{Store, StoreError};
use tagweave_writeback::WritebackError;

use app::App;
pub use app::{Incoming, Method, Reply};

/// Connections served at once; more are answered 503 at once. A page with a grid asks
/// for a few dozen thumbnails, a browser opens six connections.
const MAX_CONNECTIONS: usize = 32;

#[derive(Debug, thiserror::Error)]
pub enum ServeError {
    #[error(
        "cannot listen on {address}: {source}; pick another port with --port N \
         (0 takes any free port)"
    )]
    Bind {
        address: SocketAddr,
        #[source]
        source: std::io::Error,
    },
    #[error("cannot read the picture {path}: {source}; run `tagweave scan` if it changed")]
    Picture {
        path: PathBuf,
        #[source]
        source: image::ImageError,
    },
    #[error(
        "the picture {path} is no longer there; run `tagweave scan` to bring the index up \
         to date"
    )]
    PictureGone { path: PathBuf },
    #[error(
        "cannot keep a reduced copy in {path}: {source}; check that the store folder is \
         writable (the copies can be deleted at any time)"
    )]
    Cache {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("the review page stopped accepting connections: {0}")]
    Accept(#[source] std::io::Error),
    #[error(transparent)]
    Query(#[from] QueryError),
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error(transparent)]
    Writeback(#[from] WritebackError),
}

/// How to serve.
#[derive(Debug, Clone, Copy, Default)]
pub struct ServeOptions {
    /// Port on 127.0.0.1; 0 takes any free one (see [`ReviewServer::url`]).
    pub port: u16,
    /// Refuse every change; the pages show no buttons that would write.
    pub read_only: bool,
}

/// A bound review server, not yet answering.
pub struct ReviewServer {
    listener: TcpListener,
    app: Arc<App>,
    address: SocketAddr,
}

impl ReviewServer {
    /// Opens the trained model of `store` (which stays open, and locked, while the server
    /// lives), then binds 127.0.0.1 on the chosen port.
    pub fn start(store: Store, options: &ServeOptions) -> Result<ReviewServer, ServeError> {
        let queries = Queries::open(&store)?;
        let wanted = SocketAddr::from((Ipv4Addr::LOCALHOST, options.port));
        let bind_error = |source| ServeError::Bind {
            address: wanted,
            source,
        };
        let listener = TcpListener::bind(wanted).map_err(bind_error)?;
        let address = listener.local_addr().map_err(bind_error)?;
        let app = App::new(store, queries, address.port(), options.read_only);
        Ok(ReviewServer {
            listener,
            app: Arc::new(app),
            address,
        })
    }

    pub fn address(&self) -> SocketAddr {
        self.address
    }

    /// The search page's address, for printing.
    pub fn url(&self) -> String {
        format!("http://{}/", self.address)
    }

    /// Answers requests for as long as the process runs (Ctrl-C ends it; the kernel then
    /// releases the store's lock). Each connection gets its own thread, at most
    /// [`MAX_CONNECTIONS`] at once.
    pub fn run(self) -> Result<(), ServeError> {
        let active = Arc::new(AtomicUsize::new(0));
        for stream in self.listener.incoming() {
            let stream = match stream {
                Ok(stream) => stream,
                // A connection that failed while being set up concerns only its client.
                Err(e) if is_per_connection(&e) => continue,
                Err(e) => return Err(ServeError::Accept(e)),
            };
            let app = Arc::clone(&self.app);
            if active.fetch_add(1, Ordering::SeqCst) >= MAX_CONNECTIONS {
                active.fetch_sub(1, Ordering::SeqCst);
                http::refuse_now(stream, &app.refused(503));
                continue;
            }
            let counter = Arc::clone(&active);
            let spawned = std::thread::Builder::new()
                .name("tagweave-serve".into())
                .spawn(move || {
                    http::serve_connection(stream, &|r| app.respond(r), &|s| app.refused(s));
                    counter.fetch_sub(1, Ordering::SeqCst);
                });
            if spawned.is_err() {
                // No thread to be had: this connection is dropped, the next may fare better.
                active.fetch_sub(1, Ordering::SeqCst);
            }
        }
        Ok(())
    }
}

fn is_per_connection(error: &std::io::Error) -> bool {
    use std::io::ErrorKind::*;
    matches!(
        error.kind(),
        ConnectionAborted | ConnectionReset | Interrupted | WouldBlock | TimedOut
    )
}
