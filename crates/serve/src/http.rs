//! HTTP/1.1 on plain sockets: one request per connection, each connection on its own
//! thread, `Connection: close` on every answer.
//!
//! Why not keep connections open: a browser opens six at once for a grid of thumbnails
//! and keeps them idle afterwards; a server that parks a thread on each idle connection
//! can run out of threads for the next one (a small server crate we tried hung so). On
//! the loopback interface a new connection costs microseconds, so closing is the simple
//! safe choice. Parsing is `httparse`'s; bodies are read only by `Content-Length`.

use std::io::{ErrorKind, Read, Write};
use std::net::{Shutdown, TcpStream};
use std::time::{Duration, SystemTime, UNIX_EPOCH};

use crate::app::{Incoming, Method, Reply};

/// Longest request head (request line and headers) read.
const MAX_HEAD: usize = 16 * 1024;
/// Largest request body read (a form carries a token and a tag).
pub const MAX_BODY: usize = 64 * 1024;
/// Most headers parsed.
const MAX_HEADERS: usize = 64;
/// A client that sends nothing for this long is dropped.
const IDLE: Duration = Duration::from_secs(10);

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

/// Serves one connection: reads a request, asks `respond`, writes the answer, closes.
pub fn serve_connection(
    mut stream: TcpStream,
    respond: &dyn Fn(&Incoming) -> Reply,
    refuse: &dyn Fn(u16) -> Reply,
) {
    let _ = stream.set_read_timeout(Some(IDLE));
    let _ = stream.set_write_timeout(Some(IDLE));
    let reply = match read_request(&mut stream) {
        Ok(Some(parsed)) => {
            let reply = respond(&Incoming {
                method: parsed.method,
                target: &parsed.target,
                host: parsed.header("Host"),
                origin: parsed.header("Origin"),
                fetch_site: parsed.header("Sec-Fetch-Site"),
                body: &parsed.body,
            });
            write_reply(&mut stream, &reply, parsed.method == Method::Head);
            return close(stream);
        }
        Ok(None) => return close(stream),
        Err(status) => refuse(status),
    };
    write_reply(&mut stream, &reply, false);
    close(stream);
}

/// Answers without reading the request (the server is too busy to spend a thread on it).
pub fn refuse_now(mut stream: TcpStream, reply: &Reply) {
    let _ = stream.set_write_timeout(Some(Duration::from_secs(1)));
    write_reply(&mut stream, reply, false);
    let _ = stream.shutdown(Shutdown::Both);
}

fn close(stream: TcpStream) {
    let _ = stream.shutdown(Shutdown::Write);
    // Let the client read the answer before the socket goes: drain what it still sends.
    let mut sink = [0u8; 1024];
    let _ = stream.set_read_timeout(Some(Duration::from_millis(200)));
    let mut stream = stream;
    while matches!(stream.read(&mut sink), Ok(n) if n > 0) {}
}

/// `Ok(None)`: the client went away without a request. `Err(status)`: refuse with it.
fn read_request(stream: &mut TcpStream) -> Result<Option<Parsed>, u16> {
    let mut buffer = Vec::with_capacity(2048);
    let mut chunk = [0u8; 4096];
    let (head_len, method, target, headers) = loop {
        let n = match stream.read(&mut chunk) {
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
        let n = match stream.read(&mut chunk) {
            Ok(0) | Err(_) => return Err(400),
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
        431 => "Request Header Fields Too Large",
        500 => "Internal Server Error",
        503 => "Service Unavailable",
        505 => "HTTP Version Not Supported",
        _ => "",
    }
}

/// Only our own files, no scripts at all, no framing by other pages.
const CONTENT_SECURITY_POLICY: &str = "default-src 'none'; img-src 'self' data:; \
     style-src 'self'; form-action 'self'; frame-ancestors 'none'; base-uri 'none'";

/// The answer's bytes: status line, headers, and (unless for HEAD) the body.
pub fn render_reply(reply: &Reply, head_only: bool, now: SystemTime) -> Vec<u8> {
    let mut head = format!(
        "HTTP/1.1 {} {}\r\nDate: {}\r\nContent-Type: {}\r\nContent-Length: {}\r\n\
         Connection: close\r\nX-Content-Type-Options: nosniff\r\nReferrer-Policy: no-referrer\r\n\
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
    head.push_str("\r\n");
    let mut out = head.into_bytes();
    if !head_only {
        out.extend_from_slice(&reply.body);
    }
    out
}

fn write_reply(stream: &mut TcpStream, reply: &Reply, head_only: bool) {
    let bytes = render_reply(reply, head_only, SystemTime::now());
    let _ = stream.write_all(&bytes).and_then(|()| stream.flush());
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
        let reply = Reply {
            status: 404,
            content_type: "text/plain",
            body: b"gone".to_vec(),
            max_age: None,
            location: None,
            allow: Some("GET, HEAD"),
        };
        let text = String::from_utf8(render_reply(&reply, false, UNIX_EPOCH)).unwrap();
        assert!(text.starts_with("HTTP/1.1 404 Not Found\r\n"), "{text}");
        assert!(text.contains("\r\nContent-Length: 4\r\n"));
        assert!(text.contains("\r\nConnection: close\r\n"));
        assert!(text.contains("\r\nAllow: GET, HEAD\r\n"));
        assert!(text.contains("\r\nCache-Control: no-store\r\n"));
        assert!(text.ends_with("\r\n\r\ngone"));
        let head = String::from_utf8(render_reply(&reply, true, UNIX_EPOCH)).unwrap();
        assert!(head.ends_with("\r\n\r\n"), "{head}");
        assert!(head.contains("Content-Length: 4"));
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
                    &|incoming| {
                        *seen.lock().unwrap() = Some((
                            incoming.target.to_string(),
                            incoming.host.unwrap_or("").to_string(),
                            incoming.body.to_vec(),
                        ));
                        Reply {
                            status: 200,
                            content_type: "text/plain",
                            body: b"ok".to_vec(),
                            max_age: None,
                            location: None,
                            allow: None,
                        }
                    },
                    &|status| Reply {
                        status,
                        content_type: "text/plain",
                        body: Vec::new(),
                        max_age: None,
                        location: None,
                        allow: None,
                    },
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
}
