//! The local review page of a trained collection: search by tags, look at a picture and
//! the tags suggested for it, work through the review queue, and accept or reject tags.
//!
//! People judge pictures by looking at them, so this shows the pictures themselves. It is a
//! small HTTP server on the loopback interface with pages made on the server (no scripts,
//! no fonts or styles from elsewhere: everything is inside the binary).
//!
//! Promises:
//! - **Nothing without this run's pass.** `serve` prints one address with a one-time key;
//!   the browser that opens it gets a pass (an `HttpOnly; SameSite=Strict` cookie) and the
//!   key is spent. Every request without the pass is refused, reads included, so other
//!   users of the machine and other web pages learn nothing (see `guard.rs`).
//! - **Pictures only by id.** Pictures and their reduced copies are served by the 16-digit
//!   page id of an indexed item (a hash keyed with a secret of the store, see [`ids`]) and
//!   read from the item's indexed path; nothing in a request is ever used as a file path.
//!   Anything else is 404.
//! - **Changes only from our own pages.** Every change (a POST) must be a form, carry the
//!   run's token written into our pages' forms, and say it comes from this server
//!   (`Origin`, or `Referer` when there is no `Origin`); requests naming another host, or
//!   saying another site started them, are refused. `read_only` refuses every change.
//! - **The same safe write as `tagweave apply`.** Accepted tags are planned, read back and
//!   written atomically by `tagweave-writeback`, originals kept beside them with `.orig` added (`NAME.txt.orig`); a sidecar
//!   that became a link since the scan is refused by name; the index is not rescanned (the
//!   page says so), and the server holds the store, and so its lock, for as long as it runs.
//! - **Slow clients lock no one out.** Each connection has a total deadline, the input
//!   read after an answer is capped, and when too many connections are still sending their
//!   request the oldest of them is let go (see `connections.rs`).

mod app;
mod connections;
mod guard;
mod http;
pub mod ids;
mod pages;
pub mod renditions;
mod text;

use std::net::{Ipv4Addr, SocketAddr, TcpListener};
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Instant;

use tagweave_query::{Queries, QueryError};
use tagweave_store::{Store, StoreError};
use tagweave_writeback::WritebackError;

use app::App;
pub use app::{Incoming, Method, Reply};
use connections::Connections;
pub use ids::PageIds;

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
    #[error(transparent)]
    Preview(#[from] tagweave_vision::VisionError),
    #[error(
        "cannot keep a reduced copy in {path}: {source}; check that the store folder is \
         writable (the copies can be deleted at any time)"
    )]
    Cache {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error(
        "cannot keep the review page's key in {path}: {source}; check that the store \
         folder is writable"
    )]
    Key {
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
    /// Opens the trained model of `store`, then lets the store go (so other tagweave
    /// commands work beside the page; each decision written takes it again for a moment)
    /// and binds 127.0.0.1 on the chosen port.
    pub fn start(store: Store, options: &ServeOptions) -> Result<ReviewServer, ServeError> {
        let queries = Queries::open_to_keep(&store)?;
        let wanted = SocketAddr::from((Ipv4Addr::LOCALHOST, options.port));
        let bind_error = |source| ServeError::Bind {
            address: wanted,
            source,
        };
        let listener = TcpListener::bind(wanted).map_err(bind_error)?;
        let address = listener.local_addr().map_err(bind_error)?;
        let ids = PageIds::open(store.dir())?;
        let app = App::new(&store, queries, ids, address.port(), options.read_only)?;
        drop(store);
        Ok(ReviewServer {
            listener,
            app: Arc::new(app),
            address,
        })
    }

    pub fn address(&self) -> SocketAddr {
        self.address
    }

    /// The address to open, for printing: it carries this run's one-time key, and the
    /// first browser to open it is let in (see `guard.rs`).
    pub fn url(&self) -> String {
        format!("http://{}{}", self.address, self.app.entry_path())
    }

    /// Answers requests for as long as the process runs (Ctrl-C ends it; the kernel then
    /// releases the store's lock). Each connection gets its own thread, at most
    /// 64 at once (see `connections.rs`).
    pub fn run(self) -> Result<(), ServeError> {
        let connections = Arc::new(Connections::default());
        App::work_out_in_background(&self.app);
        for stream in self.listener.incoming() {
            let stream = match stream {
                Ok(stream) => stream,
                // A connection that failed while being set up concerns only its client.
                Err(e) if is_per_connection(&e) => continue,
                Err(e) => return Err(ServeError::Accept(e)),
            };
            let started = Instant::now();
            let app = Arc::clone(&self.app);
            let Some(ticket) = connections.admit(&stream) else {
                http::refuse_now(stream, &app.refused(503));
                continue;
            };
            let admitted = Admitted {
                connections: Arc::clone(&connections),
                ticket: Some(ticket),
            };
            // With no thread to be had, the closure is dropped (and with it the
            // connection and its admission): the next connection may fare better.
            let _ = std::thread::Builder::new()
                .name("tagweave-serve".into())
                .spawn(move || {
                    http::serve_connection(
                        stream,
                        &http::LIMITS,
                        started,
                        &|| admitted.request_read(),
                        &|r| app.respond(r),
                        &|s| app.refused(s),
                    );
                    drop(admitted);
                });
        }
        Ok(())
    }
}

/// A connection's place among those served; handed back when dropped.
struct Admitted {
    connections: Arc<Connections>,
    ticket: Option<connections::Ticket>,
}

impl Admitted {
    fn request_read(&self) {
        if let Some(ticket) = &self.ticket {
            self.connections.request_read(ticket);
        }
    }
}

impl Drop for Admitted {
    fn drop(&mut self) {
        if let Some(ticket) = self.ticket.take() {
            self.connections.closed(ticket);
        }
    }
}

fn is_per_connection(error: &std::io::Error) -> bool {
    use std::io::ErrorKind::*;
    matches!(
        error.kind(),
        ConnectionAborted | ConnectionReset | Interrupted | WouldBlock | TimedOut
    )
}
