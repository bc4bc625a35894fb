//! HTTP/1.1 on plain sockets: one request per connection, each connection on its own
//! thread, `Connection: close` on every answer.
//!
//! Why not keep connections open: a browser opens six at once for a grid of thumbnails
//! and keeps them idle afterwards; a server that parks a thread on each idle connection
//! can run out of threads for the next one (a small server crate we tried hung so). On
//! the loopback interface a new connection costs microseconds, so closing is the simple
//! safe choice. Parsing is `httparse`'s; bodies are read only by `Content-Length`.
//!
//! Slow clients: every connection has a total deadline (the request must be in within
//! [`Limits::request`] of the connection, the answer out within [`Limits::whole`]),
//! however the bytes trickle in; after the answer at most [`Limits::drain_bytes`] are read
//! and dropped, for at most [`Limits::drain_time`]. How many connections may wait for
//! their request is capped in `connections.rs`.

use std::io::{ErrorKind, Read, Write};
use std::net::{Shutdown, TcpStream};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use crate::app::{Incoming, Method, Reply};

/// Longest request head (request line and headers) read.
const MAX_HEAD: usize = 16 * 1024;
/// Largest request body read (a form carries a token and a tag).
pub const MAX_BODY: usize = 64 * 1024;
/// Most headers parsed.
const MAX_HEADERS: usize = 64;

/// How long a connection may take, in total.
#[derive(Debug, Clone, Copy)]
pub struct Limits {
    /// From the connection to the whole request (head and body) read.
    pub request: Duration,
    /// From the connection to the last byte of the answer written.
    pub whole: Duration,
    /// Most bytes read and dropped after the answer, so the client reads it before the
    /// socket closes.
    pub drain_bytes: usize,
    /// Longest time spent on that.
    pub drain_time: Duration,
}

/// What the review page allows: a browser sends its request within microseconds of
/// connecting, and the largest answer (a 1200-pixel JPEG) is a few hundred kilobytes.
pub const LIMITS: Limits = Limits {
    request: Duration::from_secs(5),
    whole: Duration::from_secs(30),
    drain_bytes: 64 * 1024,
    drain_time: Duration::from_millis(250),
};

/// What a request looked like on the wire, owned.
struct Parsed {
    method: Method,
    target: String,
    headers: Vec<(String, String)>,
    body: Vec<u8>,
}

impl Parsed {
    fn header(&self, name: &str) -> Option<&str> {
        self.headers
            .iter()
            .find(|(n, _)| n.eq_ignore_ascii_case(name))
            .map(|(_, v)| v.as_str())
    }
}

/// Serves one connection: reads a request, tells `request_read` it is in, asks
/// `respond`, writes the answer, closes. Returns within about `limits.whole` plus
/// `limits.drain_time` of `started`, whatever the client does.
pub fn serve_connection(
    mut stream: TcpStream,
    limits: &Limits,
    started: Instant,
    request_read: &dyn Fn(),
    respond: &dyn Fn(&Incoming) -> Reply,
    refuse: &dyn Fn(u16) -> Reply,
) {
    let read = read_request(&mut stream, started + limits.request);
    request_read();
    let whole = started + limits.whole;
    let reply = match read {
        Ok(Some(parsed)) => {
            let reply = respond(&Incoming {
                method: parsed.method,
                target: &parsed.target,
                host: parsed.header("Host"),
                origin: parsed.header("Origin"),
                referer: parsed.header("Referer"),
                fetch_site: parsed.header("Sec-Fetch-Site"),
                cookie: parsed.header("Cookie"),
                content_type: parsed.header("Content-Type"),
                body: &parsed.body,
            });
            write_reply(&mut stream, &reply, parsed.method == Method::Head, whole);
            return close(stream, limits);
        }
        Ok(None) => return close(stream, limits),
        Err(status) => refuse(status),
    };
    write_reply(&mut stream, &reply, false, whole);
    close(stream, limits);
}

/// Answers without reading the request (the server is too busy to spend a thread on it).
pub fn refuse_now(mut stream: TcpStream, reply: &Reply) {
    write_reply(
        &mut stream,
        reply,
        false,
        Instant::now() + Duration::from_secs(1),
    );
    let _ = stream.shutdown(Shutdown::Both);
}

/// Lets the client read the answer before the socket goes: reads and drops what it still
/// sends, but no more than the limits allow.
fn close(mut stream: TcpStream, limits: &Limits) {
    let _ = stream.shutdown(Shutdown::Write);
    let deadline = Instant::now() + limits.drain_time;
    let mut sink = [0u8; 4096];
    let mut drained = 0;
    while drained < limits.drain_bytes {
        match read_by(&mut stream, &mut sink, deadline) {
            Ok(n) if n > 0 => drained += n,
            _ => break,
        }
    }
}

/// One read that gives up at `deadline` (a `TimedOut` error once it has passed).
fn read_by(stream: &mut TcpStream, buffer: &mut [u8], deadline: Instant) -> std::io::Result<usize> {
    let left = deadline.saturating_duration_since(Instant::now());
    if left.is_zero() {
        return Err(ErrorKind::TimedOut.into());
    }
    stream.set_read_timeout(Some(left))?;
    stream.read(buffer)
}

/// `Ok(None)`: the client went away, or sent nothing in time. `Err(status)`: refuse with it.
fn read_request(stream: &mut TcpStream, deadline: Instant) -> Result<Option<Parsed>, u16> {
    let mut buffer = Vec::with_capacity(2048);
    let mut chunk = [0u8; 4096];
    let (head_len, method, target, headers) = loop {
        let n = match read_by(stream, &mut chunk, deadline) {
            Ok(0) if buffer.is_empty() => return Ok(None),
            Ok(0) => return Err(400),
            Ok(n) => n,
            Err(e) if matches!(e.kind(), ErrorKind::WouldBlock | ErrorKind::TimedOut) => {
                return if buffer.is_empty() {
                    Ok(None)
                } else {
                    Err(408)
                }
            }
            Err(_) => return Ok(None),
        };
        buffer.extend_from_slice(&chunk[..n]);
        let mut slots = [httparse::EMPTY_HEADER; MAX_HEADERS];
        let mut request = httparse::Request::new(&mut slots);
        match request.parse(&buffer) {
            Ok(httparse::Status::Complete(len)) => {
                if request.version != Some(1) && request.version != Some(0) {
                    return Err(505);
                }
                let method = match request.method.unwrap_or("") {
                    "GET" => Method::Get,
                    "HEAD" => Method::Head,
                    "POST" => Method::Post,
                    _ => Method::Other,
                };
                let target = request.path.unwrap_or("").to_string();
                let headers: Vec<(String, String)> = request
                    .headers
                    .iter()
                    .map(|h| {
                        (
                            h.name.to_string(),
                            String::from_utf8_lossy(h.value).into_owned(),
                        )
                    })
                    .collect();
                break (len, method, target, headers);
            }
            Ok(httparse::Status::Partial) if buffer.len() > MAX_HEAD => return Err(431),
            Ok(httparse::Status::Partial) => continue,
            Err(httparse::Error::TooManyHeaders) => return Err(431),
            Err(_) => return Err(400),
        }
    };
    let mut parsed = Parsed {
        method,
        target,
        headers,
        body: Vec::new(),
    };
    if parsed.header("Transfer-Encoding").is_some() {
        // Our own forms always send a length; anything else is not ours.
        return Err(411);
    }
    let length = match parsed.header("Content-Length") {
        None => 0,
        Some(v) => v.trim().parse::<usize>().map_err(|_| 400u16)?,
    };
    if length > MAX_BODY {
        return Err(413);
    }
    if length > 0
        && parsed
            .header("Expect")
            .is_some_and(|e| e.eq_ignore_ascii_case("100-continue"))
    {
        let _ = stream.write_all(b"HTTP/1.1 100 Continue\r\n\r\n");
    }
    let mut body = buffer.split_off(head_len);
    body.truncate(length);
    while body.len() < length {
        let n = match read_by(stream, &mut chunk, deadline) {
            Ok(0) => return Err(400),
            Err(e) if matches!(e.kind(), ErrorKind::WouldBlock | ErrorKind::TimedOut) => {
                return Err(408)
            }
            Err(_) => return Err(400),
            Ok(n) => n,
        };
        let wanted = (length - body.len()).min(n);
        body.extend_from_slice(&chunk[..wanted]);
    }
    parsed.body = body;
    Ok(Some(parsed))
}

fn reason(status: u16) -> &'static str {
    match status {
        200 => "OK",
        303 => "See Other",
        400 => "Bad Request",
        403 => "Forbidden",
        404 => "Not Found",
        405 => "Method Not Allowed",
        408 => "Request Timeout",
        409 => "Conflict",
        411 => "Length Required",
        413 => "Content Too Large",
        415 => "Unsupported Media Type",
        431 => "Request Header Fields Too Large",
        500 => "Internal Server Error",
        503 => "Service Unavailable",
        505 => "HTTP Version Not Supported",
        _ => "",
    }
}

/// Only our own files: scripts from our own address only (never inline, never
/// evaluated text), requests from them to this server only, no framing by other pages.
pub const CONTENT_SECURITY_POLICY: &str = "default-src 'none'; img-src 'self' data:; \
     style-src 'self'; script-src 'self'; connect-src 'self'; form-action 'self'; \
     frame-ancestors 'none'; base-uri 'none'";

/// The answer's bytes: status line, headers, and (unless for HEAD) the body.
///
/// Every answer says: no other site may embed it (`Cross-Origin-Resource-Policy`), and
/// links out of our pages carry no address (`Referrer-Policy: same-origin`: our own forms
/// still send `Origin` and `Referer`, which the change checks need; `no-referrer` would
/// make a browser send `Origin: null` with them).
pub fn render_reply(reply: &Reply, head_only: bool, now: SystemTime) -> Vec<u8> {
    let mut head = format!(
        "HTTP/1.1 {} {}\r\nDate: {}\r\nContent-Type: {}\r\nContent-Length: {}\r\n\
         Connection: close\r\nX-Content-Type-Options: nosniff\r\nReferrer-Policy: same-origin\r\n\
         Cross-Origin-Resource-Policy: same-origin\r\n\
         Content-Security-Policy: {}\r\nCache-Control: {}\r\n",
        reply.status,
        reason(reply.status),
        http_date(now),
        reply.content_type,
        reply.body.len(),
        CONTENT_SECURITY_POLICY,
        match reply.max_age {
            Some(seconds) => format!("private, max-age={seconds}"),
            None => "no-store".to_string(),
        },
    );
    if let Some(location) = &reply.location {
        head.push_str(&format!("Location: {location}\r\n"));
    }
    if let Some(allow) = reply.allow {
        head.push_str(&format!("Allow: {allow}\r\n"));
    }
    if let Some(cookie) = &reply.set_cookie {
        head.push_str(&format!("Set-Cookie: {cookie}\r\n"));
    }
    // `Refresh` is not in the HTTP standard but every browser reloads by it; scripts read
    // `Retry-After` (RFC 9110 §10.2.3).
    if let Some(seconds) = reply.retry_after {
        head.push_str(&format!("Retry-After: {seconds}\r\nRefresh: {seconds}\r\n"));
    }
    head.push_str("\r\n");
    let mut out = head.into_bytes();
    if !head_only {
        out.extend_from_slice(&reply.body);
    }
    out
}

/// Writes the answer, giving up at `deadline` however slowly the client reads.
fn write_reply(stream: &mut TcpStream, reply: &Reply, head_only: bool, deadline: Instant) {
    let bytes = render_reply(reply, head_only, SystemTime::now());
    let mut sent = 0;
    while sent < bytes.len() {
        let left = deadline.saturating_duration_since(Instant::now());
        if left.is_zero() || stream.set_write_timeout(Some(left)).is_err() {
            return;
        }
        match stream.write(&bytes[sent..]) {
            Ok(0) | Err(_) => return,
            Ok(n) => sent += n,
        }
    }
    let _ = stream.flush();
}

/// An IMF-fixdate (`Sun, 06 Nov 1994 08:49:37 GMT`), as the Date header wants.
pub fn http_date(time: SystemTime) -> String {
    let secs = time
        .duration_since(UNIX_EPOCH)
        .map(|d| d.as_secs())
        .unwrap_or(0);
    let days = (secs / 86_400) as i64;
    let (h, m, s) = (secs % 86_400 / 3600, secs % 3600 / 60, secs % 60);
    // Civil date from days since 1970-01-01 (proleptic Gregorian).
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = doy - (153 * mp + 2) / 5 + 1;
    let month = if mp < 10 { mp + 3 } else { mp - 9 };
    let year = yoe + era * 400 + i64::from(month <= 2);
    const WEEKDAYS: [&str; 7] = ["Thu", "Fri", "Sat", "Sun", "Mon", "Tue", "Wed"];
    const MONTHS: [&str; 12] = [
        "Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec",
    ];
    format!(
        "{}, {:02} {} {} {:02}:{:02}:{:02} GMT",
        WEEKDAYS[days.rem_euclid(7) as usize],
        day,
        MONTHS[(month - 1) as usize],
        year,
        h,
        m,
        s
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::net::TcpListener;

    #[test]
    fn dates_are_imf_fixdates() {
        // source: RFC 9110 §5.6.7 example "Sun, 06 Nov 1994 08:49:37 GMT" = Unix 784111777.
        let t = UNIX_EPOCH + Duration::from_secs(784_111_777);
        assert_eq!(http_date(t), "Sun, 06 Nov 1994 08:49:37 GMT");
        // by hand: the epoch itself, and a leap day (2024-02-29 is day 19782).
        assert_eq!(http_date(UNIX_EPOCH), "Thu, 01 Jan 1970 00:00:00 GMT");
        let leap = UNIX_EPOCH + Duration::from_secs(19_782 * 86_400 + 3_661);
        assert_eq!(http_date(leap), "Thu, 29 Feb 2024 01:01:01 GMT");
    }

    #[test]
    fn replies_carry_length_close_and_no_body_for_head() {
        let mut reply = Reply::new(404, "text/plain", b"gone".to_vec());
        reply.allow = Some("GET, HEAD");
        let text = String::from_utf8(render_reply(&reply, false, UNIX_EPOCH)).unwrap();
        assert!(text.starts_with("HTTP/1.1 404 Not Found\r\n"), "{text}");
        assert!(text.contains("\r\nContent-Length: 4\r\n"));
        assert!(text.contains("\r\nConnection: close\r\n"));
        assert!(text.contains("\r\nAllow: GET, HEAD\r\n"));
        assert!(text.contains("\r\nCache-Control: no-store\r\n"));
        assert!(!text.contains("Set-Cookie"));
        assert!(!text.contains("Retry-After"));
        assert!(text.ends_with("\r\n\r\ngone"));
        let head = String::from_utf8(render_reply(&reply, true, UNIX_EPOCH)).unwrap();
        assert!(head.ends_with("\r\n\r\n"), "{head}");
        assert!(head.contains("Content-Length: 4"));
    }

    // source: RFC 9110 §10.2.3 (Retry-After as delay-seconds with a 503).
    #[test]
    fn work_under_way_says_when_to_ask_again() {
        let mut reply = Reply::new(503, "text/html; charset=utf-8", b"wait".to_vec());
        reply.retry_after = Some(10);
        let text = String::from_utf8(render_reply(&reply, false, UNIX_EPOCH)).unwrap();
        assert!(
            text.starts_with("HTTP/1.1 503 Service Unavailable\r\n"),
            "{text}"
        );
        assert!(
            text.contains("\r\nRetry-After: 10\r\nRefresh: 10\r\n"),
            "{text}"
        );
    }

    #[test]
    fn every_answer_keeps_other_sites_out() {
        // source: Fetch Standard, "Cross-Origin-Resource-Policy header" (value
        // "same-origin"); Referrer Policy (W3C), "same-origin".
        let mut reply = Reply::new(303, "text/html; charset=utf-8", Vec::new());
        reply.set_cookie = Some("tagweave-pass=x; Path=/; HttpOnly; SameSite=Strict".into());
        let text = String::from_utf8(render_reply(&reply, false, UNIX_EPOCH)).unwrap();
        assert!(
            text.contains("\r\nCross-Origin-Resource-Policy: same-origin\r\n"),
            "{text}"
        );
        assert!(text.contains("\r\nReferrer-Policy: same-origin\r\n"));
        assert!(
            text.contains("\r\nSet-Cookie: tagweave-pass=x; Path=/; HttpOnly; SameSite=Strict\r\n")
        );
        assert!(text.contains("frame-ancestors 'none'"));
        // source: CSP Level 3 (W3C), script-src / connect-src: scripts and their requests
        // from this origin only; nothing inline, nothing evaluated.
        assert!(text.contains("script-src 'self';"), "{text}");
        assert!(text.contains("connect-src 'self';"), "{text}");
        assert!(!text.contains("unsafe-"), "{text}");
        // source: RFC 9110 §15.5.16, 415 Unsupported Media Type.
        let form_refused =
            render_reply(&Reply::new(415, "text/html", Vec::new()), false, UNIX_EPOCH);
        assert!(form_refused.starts_with(b"HTTP/1.1 415 Unsupported Media Type\r\n"));
    }

    const TEST_LIMITS: Limits = Limits {
        request: Duration::from_millis(800),
        whole: Duration::from_secs(3),
        drain_bytes: 8 * 1024,
        drain_time: Duration::from_millis(200),
    };

    /// A one-connection server on a thread: reports when `serve_connection` returned.
    fn one_connection(
        limits: Limits,
    ) -> (std::net::SocketAddr, std::sync::mpsc::Receiver<Duration>) {
        let listener = TcpListener::bind("127.0.0.1:0").unwrap();
        let address = listener.local_addr().unwrap();
        let (tx, rx) = std::sync::mpsc::channel();
        std::thread::spawn(move || {
            let (stream, _) = listener.accept().unwrap();
            let started = Instant::now();
            serve_connection(
                stream,
                &limits,
                started,
                &|| {},
                &|_| Reply::new(200, "text/plain", b"ok".to_vec()),
                &|status| Reply::new(status, "text/plain", Vec::new()),
            );
            let _ = tx.send(started.elapsed());
        });
        (address, rx)
    }

    /// Sends raw bytes to a one-connection server and returns what it answered.
    fn exchange(raw: &[u8]) -> (String, Option<(String, String, Vec<u8>)>) {
        let listener = TcpListener::bind("127.0.0.1:0").unwrap();
        let address = listener.local_addr().unwrap();
        let seen = std::sync::Mutex::new(None);
        let answer = std::thread::scope(|scope| {
            scope.spawn(|| {
                let (stream, _) = listener.accept().unwrap();
                serve_connection(
                    stream,
                    &LIMITS,
                    Instant::now(),
                    &|| {},
                    &|incoming| {
                        *seen.lock().unwrap() = Some((
                            incoming.target.to_string(),
                            incoming.host.unwrap_or("").to_string(),
                            incoming.body.to_vec(),
                        ));
                        Reply::new(200, "text/plain", b"ok".to_vec())
                    },
                    &|status| Reply::new(status, "text/plain", Vec::new()),
                );
            });
            let mut client = TcpStream::connect(address).unwrap();
            client.write_all(raw).unwrap();
            let mut answer = String::new();
            client.read_to_string(&mut answer).unwrap();
            answer
        });
        (answer, seen.into_inner().unwrap())
    }

    #[test]
    fn requests_are_parsed_with_their_bodies() {
        let (answer, seen) = exchange(
            b"POST /picture/x/tags?a=1 HTTP/1.1\r\nHost: 127.0.0.1:1\r\nContent-Length: 9\r\n\r\ntoken=abc",
        );
        assert!(answer.starts_with("HTTP/1.1 200 OK"), "{answer}");
        let (target, host, body) = seen.unwrap();
        assert_eq!(target, "/picture/x/tags?a=1");
        assert_eq!(host, "127.0.0.1:1");
        assert_eq!(body, b"token=abc");
    }

    #[test]
    fn malformed_or_oversized_requests_are_refused() {
        // source: RFC 9112 §6.1 / RFC 9110 §15.5 for the status codes chosen.
        let (answer, seen) = exchange(b"NOT HTTP AT ALL\r\n\r\n");
        assert!(answer.starts_with("HTTP/1.1 400 "), "{answer}");
        assert!(seen.is_none());
        let big = format!(
            "POST / HTTP/1.1\r\nHost: h\r\nContent-Length: {}\r\n\r\n",
            MAX_BODY + 1
        );
        let (answer, seen) = exchange(big.as_bytes());
        assert!(answer.starts_with("HTTP/1.1 413 "), "{answer}");
        assert!(seen.is_none());
        let (answer, _) =
            exchange(b"POST / HTTP/1.1\r\nHost: h\r\nTransfer-Encoding: chunked\r\n\r\n0\r\n\r\n");
        assert!(answer.starts_with("HTTP/1.1 411 "), "{answer}");
        let mut long = b"GET / HTTP/1.1\r\nX-Long: ".to_vec();
        long.extend(std::iter::repeat_n(b'a', MAX_HEAD + 10));
        let (answer, _) = exchange(&long);
        assert!(answer.starts_with("HTTP/1.1 431 "), "{answer}");
    }

    #[test]
    fn a_request_trickling_in_is_cut_off_at_its_deadline() {
        // One header byte every 50 ms never lets a per-read idle timeout fire; the total
        // deadline (800 ms here) must.
        let (address, finished) = one_connection(TEST_LIMITS);
        let mut client = TcpStream::connect(address).unwrap();
        client
            .set_read_timeout(Some(Duration::from_millis(20)))
            .unwrap();
        let head = b"GET / HTTP/1.1\r\nX-Slow: "
            .iter()
            .chain(std::iter::repeat(&b'a'));
        let mut answer = Vec::new();
        let mut served_in = None;
        // Bounded: at most 100 bytes, 5 s.
        for &byte in head.take(100) {
            if client.write_all(&[byte]).is_err() {
                break;
            }
            let mut buf = [0u8; 512];
            if let Ok(n) = client.read(&mut buf) {
                answer.extend_from_slice(&buf[..n]);
            }
            if let Ok(t) = finished.try_recv() {
                served_in = Some(t);
                break;
            }
            std::thread::sleep(Duration::from_millis(30));
        }
        let served_in = served_in
            .or_else(|| finished.recv_timeout(Duration::from_secs(2)).ok())
            .expect("the server let go of a client that trickled its request for 5 s");
        assert!(served_in < Duration::from_secs(3), "{served_in:?}");
        let _ = client.set_read_timeout(Some(Duration::from_secs(1)));
        let mut rest = Vec::new();
        let _ = client.read_to_end(&mut rest);
        answer.extend_from_slice(&rest);
        let answer = String::from_utf8_lossy(&answer);
        // source: RFC 9110 §15.5.9, 408 Request Timeout.
        assert!(answer.starts_with("HTTP/1.1 408 "), "{answer}");
    }

    #[test]
    fn after_the_answer_only_a_little_more_input_is_drained() {
        // A client that keeps sending after its request must not hold the connection:
        // at most `drain_bytes`, for at most `drain_time`.
        let (address, finished) = one_connection(TEST_LIMITS);
        let mut client = TcpStream::connect(address).unwrap();
        client
            .write_all(b"GET / HTTP/1.1\r\nHost: h\r\n\r\n")
            .unwrap();
        let filler = [b'x'; 1024];
        let mut done = None;
        // Bounded: 1 KB every 10 ms for at most 4 s.
        for _ in 0..400 {
            if client.write_all(&filler).is_err() {
                break;
            }
            if let Ok(t) = finished.try_recv() {
                done = Some(t);
                break;
            }
            std::thread::sleep(Duration::from_millis(10));
        }
        let done = done
            .or_else(|| finished.recv_timeout(Duration::from_secs(1)).ok())
            .expect("the server kept draining a client that kept sending for 4 s");
        assert!(done < Duration::from_secs(2), "{done:?}");
    }
}
