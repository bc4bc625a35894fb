//! How many connections the server holds, and which to let go first.
//!
//! Two caps:
//! - [`MAX_WAITING`] connections still sending their request. When one more arrives, the
//!   oldest of them is closed: a browser sends its request within microseconds of
//!   connecting, so the ones that wait are the slow ones, and a client that holds many
//!   open only pushes out its own. A new request always gets in.
//! - [`MAX_OPEN`] connections in all; more are answered 503 at once.
//!
//! Why not a cap per client: on the loopback interface every connection comes from
//! 127.0.0.1, so the address tells no two clients apart. The local user at the other end
//! can be read from `/proc/net/tcp`, but that read cost 9 ms per connection with 2,000
//! closed connections in the table (measured while 1,000 requests ran: 19.7 s instead of
//! 2.8 s), and the oldest-first rule already keeps every quick client served.

use std::collections::VecDeque;
use std::net::{Shutdown, TcpStream};
use std::sync::Mutex;

/// Connections still sending their request, all clients together.
pub const MAX_WAITING: usize = 16;
/// Connections served at once; more are answered 503 at once. A page with a grid asks
/// for a few dozen thumbnails, a browser opens six connections.
pub const MAX_OPEN: usize = 64;

#[derive(Default)]
struct Held {
    open: usize,
    /// Connections still sending their request, oldest first: their number and a handle
    /// to close them by.
    waiting: VecDeque<(u64, TcpStream)>,
    next: u64,
}

/// The connections being served.
#[derive(Default)]
pub struct Connections {
    held: Mutex<Held>,
}

/// One admitted connection; give it back with [`Connections::request_read`] and
/// [`Connections::closed`].
#[derive(Debug)]
pub struct Ticket {
    number: u64,
}

impl Connections {
    fn held(&self) -> std::sync::MutexGuard<'_, Held> {
        self.held.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// Admits a new connection, closing the oldest connection still sending its request
    /// if [`MAX_WAITING`] are. `None`: [`MAX_OPEN`] are open; answer 503.
    pub fn admit(&self, stream: &TcpStream) -> Option<Ticket> {
        let mut held = self.held();
        if held.open >= MAX_OPEN {
            return None;
        }
        held.open += 1;
        held.next += 1;
        let number = held.next;
        if let Ok(handle) = stream.try_clone() {
            held.waiting.push_back((number, handle));
        }
        while held.waiting.len() > MAX_WAITING {
            if let Some((_, oldest)) = held.waiting.pop_front() {
                // Its thread's read returns at once, and the thread ends.
                let _ = oldest.shutdown(Shutdown::Both);
            }
        }
        Some(Ticket { number })
    }

    /// The connection's request is in (or it gave up): it no longer waits.
    pub fn request_read(&self, ticket: &Ticket) {
        self.held().waiting.retain(|(n, _)| *n != ticket.number);
    }

    /// The connection is closed.
    pub fn closed(&self, ticket: Ticket) {
        let mut held = self.held();
        held.waiting.retain(|(n, _)| *n != ticket.number);
        held.open = held.open.saturating_sub(1);
    }

    /// Connections open now.
    #[cfg(test)]
    pub fn open(&self) -> usize {
        self.held().open
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::io::Read;
    use std::net::TcpListener;
    use std::time::Duration;

    fn pair(listener: &TcpListener) -> (TcpStream, TcpStream) {
        let client = TcpStream::connect(listener.local_addr().unwrap()).unwrap();
        let (server, _) = listener.accept().unwrap();
        (client, server)
    }

    fn still_open(client: &mut TcpStream) -> bool {
        client
            .set_read_timeout(Some(Duration::from_millis(100)))
            .unwrap();
        let mut buf = [0u8; 8];
        client.read(&mut buf).is_err_and(|e| {
            matches!(
                e.kind(),
                std::io::ErrorKind::WouldBlock | std::io::ErrorKind::TimedOut
            )
        })
    }

    #[test]
    fn when_too_many_wait_the_oldest_waiting_is_let_go() {
        let listener = TcpListener::bind("127.0.0.1:0").unwrap();
        let connections = Connections::default();
        let mut sides = Vec::new();
        let mut tickets = Vec::new();
        for _ in 0..=MAX_WAITING {
            let (client, server) = pair(&listener);
            tickets.push(connections.admit(&server).unwrap());
            sides.push((client, server));
        }
        // The first connection was closed by the server: its client reads the end.
        let (first, _) = &mut sides[0];
        first
            .set_read_timeout(Some(Duration::from_secs(2)))
            .unwrap();
        let mut buf = [0u8; 8];
        assert!(matches!(first.read(&mut buf), Ok(0) | Err(_)), "closed");
        assert!(still_open(&mut sides[1].0), "the others stay");
        assert!(still_open(&mut sides[MAX_WAITING].0), "the newest stays");
        // A connection whose request is in no longer counts as waiting, and is never
        // closed for a newcomer.
        for ticket in &tickets {
            connections.request_read(ticket);
        }
        let (_extra, extra_server) = pair(&listener);
        let t = connections.admit(&extra_server).unwrap();
        assert!(still_open(&mut sides[1].0), "not closed for the newcomer");
        assert_eq!(connections.open(), MAX_WAITING + 2);
        connections.closed(t);
        for ticket in tickets {
            connections.closed(ticket);
        }
        assert_eq!(connections.open(), 0);
    }

    #[test]
    fn only_so_many_connections_are_open_at_once() {
        let listener = TcpListener::bind("127.0.0.1:0").unwrap();
        let connections = Connections::default();
        let mut kept = Vec::new();
        for _ in 0..MAX_OPEN {
            let (client, server) = pair(&listener);
            let ticket = connections.admit(&server).unwrap();
            connections.request_read(&ticket);
            kept.push((client, server, ticket));
        }
        let (_c, s) = pair(&listener);
        assert!(connections.admit(&s).is_none(), "one too many");
        let (_, _, ticket) = kept.pop().unwrap();
        connections.closed(ticket);
        assert!(
            connections.admit(&s).is_some(),
            "room again after one closed"
        );
    }
}
