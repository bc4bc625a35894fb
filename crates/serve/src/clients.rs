//! Who is connected, and how many connections each may hold.
//!
//! On the loopback interface every connection comes from 127.0.0.1, so the address says
//! nothing about who connects. The kernel knows which user owns the other end, though: on
//! Linux its socket is listed in `/proc/net/tcp` with its owner's uid. A client is that
//! user (or, where the list cannot be read, the address).
//!
//! Two caps per client:
//! - [`WAITING_PER_CLIENT`] connections still sending their request. When a client opens
//!   one more, its oldest such connection is closed: a browser sends its request within
//!   microseconds of connecting, so the ones that wait are the slow ones, and a client
//!   that holds many open can only push out its own.
//! - [`OPEN_PER_CLIENT`] connections in all; more are answered 503 at once.

use std::collections::{HashMap, VecDeque};
use std::net::{IpAddr, Ipv4Addr, Shutdown, SocketAddr, TcpStream};
use std::sync::Mutex;

/// Connections one client may have still sending their request.
pub const WAITING_PER_CLIENT: usize = 8;
/// Connections one client may have open.
pub const OPEN_PER_CLIENT: usize = 48;

/// Who is at the other end of a connection.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub enum Client {
    /// The local user owning the connecting socket.
    User(u32),
    /// Where the owner cannot be told.
    Address(IpAddr),
}

/// Which client a connection comes from.
pub fn client_of(stream: &TcpStream) -> Client {
    match (stream.peer_addr(), stream.local_addr()) {
        (Ok(peer), Ok(local)) => owner_of(peer, local)
            .map(Client::User)
            .unwrap_or(Client::Address(peer.ip())),
        _ => Client::Address(IpAddr::V4(Ipv4Addr::UNSPECIFIED)),
    }
}

/// The uid owning the socket at `peer` connected to our `local` address, from the
/// kernel's table of IPv4 TCP sockets.
#[cfg(target_os = "linux")]
fn owner_of(peer: SocketAddr, local: SocketAddr) -> Option<u32> {
    let (SocketAddr::V4(peer), SocketAddr::V4(local)) = (peer, local) else {
        return None;
    };
    // source: Linux Documentation/networking/proc_net_tcp.rst — addresses are printed as
    // the 32-bit word in host order (`%08X`), then `:` and the port (`%04X`); the 8th
    // column is the owner's uid.
    let hex = |a: std::net::SocketAddrV4| {
        format!(
            "{:08X}:{:04X}",
            u32::from_ne_bytes(a.ip().octets()),
            a.port()
        )
    };
    let (theirs, ours) = (hex(peer), hex(local));
    let table = std::fs::read_to_string("/proc/net/tcp").ok()?;
    table.lines().skip(1).find_map(|line| {
        let fields: Vec<&str> = line.split_whitespace().collect();
        if fields.get(1) == Some(&theirs.as_str()) && fields.get(2) == Some(&ours.as_str()) {
            fields.get(7)?.parse().ok()
        } else {
            None
        }
    })
}

#[cfg(not(target_os = "linux"))]
fn owner_of(_peer: SocketAddr, _local: SocketAddr) -> Option<u32> {
    None
}

#[derive(Default)]
struct Held {
    open: usize,
    /// Connections still sending their request, oldest first: their number and a handle
    /// to close them by.
    waiting: VecDeque<(u64, TcpStream)>,
}

/// The connections of every client.
#[derive(Default)]
pub struct Clients {
    held: Mutex<HashMap<Client, Held>>,
    next: Mutex<u64>,
}

/// One admitted connection; give it back with [`Clients::request_read`] and
/// [`Clients::closed`].
#[derive(Debug)]
pub struct Ticket {
    client: Client,
    number: u64,
}

impl Clients {
    fn held(&self) -> std::sync::MutexGuard<'_, HashMap<Client, Held>> {
        self.held.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// Admits a new connection of `client`, closing that client's oldest connection still
    /// sending its request if it has [`WAITING_PER_CLIENT`] already. `None`: the client
    /// has [`OPEN_PER_CLIENT`] open; answer 503.
    pub fn admit(&self, client: Client, stream: &TcpStream) -> Option<Ticket> {
        let number = {
            let mut next = self.next.lock().unwrap_or_else(|p| p.into_inner());
            *next += 1;
            *next
        };
        let mut held = self.held();
        let entry = held.entry(client.clone()).or_default();
        if entry.open >= OPEN_PER_CLIENT {
            return None;
        }
        entry.open += 1;
        if let Ok(handle) = stream.try_clone() {
            entry.waiting.push_back((number, handle));
        }
        while entry.waiting.len() > WAITING_PER_CLIENT {
            if let Some((_, oldest)) = entry.waiting.pop_front() {
                // Its thread's read returns at once, and the thread ends.
                let _ = oldest.shutdown(Shutdown::Both);
            }
        }
        Some(Ticket { client, number })
    }

    /// The connection's request is in (or it gave up): it no longer waits.
    pub fn request_read(&self, ticket: &Ticket) {
        if let Some(entry) = self.held().get_mut(&ticket.client) {
            entry.waiting.retain(|(n, _)| *n != ticket.number);
        }
    }

    /// The connection is closed.
    pub fn closed(&self, ticket: Ticket) {
        let mut held = self.held();
        if let Some(entry) = held.get_mut(&ticket.client) {
            entry.waiting.retain(|(n, _)| *n != ticket.number);
            entry.open = entry.open.saturating_sub(1);
            if entry.open == 0 && entry.waiting.is_empty() {
                held.remove(&ticket.client);
            }
        }
    }

    /// Connections open now (all clients).
    pub fn open(&self) -> usize {
        self.held().values().map(|h| h.open).sum()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::io::Read;
    use std::net::TcpListener;
    use std::time::Duration;

    #[test]
    #[cfg(target_os = "linux")]
    fn a_loopback_client_is_known_by_its_user() {
        let listener = TcpListener::bind("127.0.0.1:0").unwrap();
        let _client = TcpStream::connect(listener.local_addr().unwrap()).unwrap();
        let (server_side, _) = listener.accept().unwrap();
        // Our own uid, as the kernel shows it for this process.
        let status = std::fs::read_to_string("/proc/self/status").unwrap();
        let uid: u32 = status
            .lines()
            .find_map(|l| l.strip_prefix("Uid:"))
            .and_then(|l| l.split_whitespace().next())
            .and_then(|u| u.parse().ok())
            .unwrap();
        assert_eq!(client_of(&server_side), Client::User(uid));
    }

    #[test]
    fn a_client_holding_too_many_waiting_connections_loses_its_oldest() {
        let listener = TcpListener::bind("127.0.0.1:0").unwrap();
        let address = listener.local_addr().unwrap();
        let clients = Clients::default();
        let me = Client::Address(IpAddr::V4(Ipv4Addr::LOCALHOST));
        let mut sides = Vec::new();
        let mut tickets = Vec::new();
        for _ in 0..=WAITING_PER_CLIENT {
            let client_side = TcpStream::connect(address).unwrap();
            let (server_side, _) = listener.accept().unwrap();
            tickets.push(clients.admit(me.clone(), &server_side).unwrap());
            sides.push((client_side, server_side));
        }
        // The first connection was closed by the server: its client reads the end.
        let (first, _) = &mut sides[0];
        first
            .set_read_timeout(Some(Duration::from_secs(2)))
            .unwrap();
        let mut buf = [0u8; 8];
        assert!(matches!(first.read(&mut buf), Ok(0) | Err(_)), "closed");
        // The others are still open (nothing to read yet, no end).
        let (second, _) = &mut sides[1];
        second
            .set_read_timeout(Some(Duration::from_millis(100)))
            .unwrap();
        let still = second.read(&mut buf);
        assert!(
            still
                .as_ref()
                .is_err_and(|e| matches!(e.kind(), std::io::ErrorKind::WouldBlock | std::io::ErrorKind::TimedOut)),
            "{still:?}"
        );
        // A connection whose request is in no longer counts as waiting.
        for ticket in &tickets {
            clients.request_read(ticket);
        }
        let extra = TcpStream::connect(address).unwrap();
        let (extra_server, _) = listener.accept().unwrap();
        let t = clients.admit(me.clone(), &extra_server).unwrap();
        let _ = second.set_read_timeout(Some(Duration::from_millis(100)));
        assert!(second.read(&mut buf).is_err(), "not closed for the newcomer");
        drop(extra);
        assert_eq!(clients.open(), WAITING_PER_CLIENT + 2);
        clients.closed(t);
        for ticket in tickets {
            clients.closed(ticket);
        }
        assert_eq!(clients.open(), 0);
    }

    #[test]
    fn a_client_may_hold_only_so_many_connections() {
        let listener = TcpListener::bind("127.0.0.1:0").unwrap();
        let address = listener.local_addr().unwrap();
        let clients = Clients::default();
        let me = Client::User(4242);
        let other = Client::User(4243);
        let mut kept = Vec::new();
        for _ in 0..OPEN_PER_CLIENT {
            let c = TcpStream::connect(address).unwrap();
            let (s, _) = listener.accept().unwrap();
            let ticket = clients.admit(me.clone(), &s).unwrap();
            clients.request_read(&ticket);
            kept.push((c, s, ticket));
        }
        let c = TcpStream::connect(address).unwrap();
        let (s, _) = listener.accept().unwrap();
        assert!(clients.admit(me.clone(), &s).is_none(), "one too many");
        // Another client is not affected.
        let ticket = clients.admit(other, &s).expect("another user still gets in");
        clients.closed(ticket);
        drop(c);
        // One closes: room for one more.
        let (_, _, ticket) = kept.pop().unwrap();
        clients.closed(ticket);
        assert!(clients.admit(me, &s).is_some());
    }
}
