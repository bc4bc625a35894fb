//! Shared by the review-page tests: a scanned and trained copy of the demo archive, a
//! running `tagweave serve` on it (let in through its one-time address, as a browser is),
//! and a raw HTTP client (raw, so that a request target goes out exactly as written: no
//! client "fixes" `..` or percent escapes for us).

#![allow(dead_code)]

use std::io::{BufRead, BufReader, Read, Write};
use std::net::TcpStream;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::OnceLock;
use std::time::Duration;

use crate::common::*;

/// A picture file name with characters that mean something in HTML, so the pages must
/// escape what the collection says.
pub const ODD_PICTURE: &str = "odd/<b>bold & \"q\".jpg";
/// Its sidecar's tags: one known to the demo, one that is markup.
pub const ODD_TAGS: &str = "night\n<i>loud</i>\n";
pub const ODD_TAG: &str = "<i>loud</i>";

fn scratch_root() -> PathBuf {
    PathBuf::from(env!("CARGO_TARGET_TMPDIR"))
        .join("review-page")
        .join(env!("CARGO_CRATE_NAME"))
}

/// The demo archive (plus [`ODD_PICTURE`]) scanned and trained with the real binary,
/// once per test binary. Later tests copy it, store and all.
pub fn trained_demo() -> &'static Path {
    static TEMPLATE: OnceLock<PathBuf> = OnceLock::new();
    TEMPLATE.get_or_init(|| {
        let folder = scratch_root().join("template");
        if folder.exists() {
            std::fs::remove_dir_all(&folder).unwrap();
        }
        copy_demo_to(&folder);
        let donor = std::fs::read(folder.join("1950s/saltmarrow-0024.jpg")).unwrap();
        put(&folder, ODD_PICTURE, &donor);
        put(&folder, "odd/<b>bold & \"q\".txt", ODD_TAGS.as_bytes());
        for args in [&["scan", ".", "--json"][..], &["train", "--json"][..]] {
            let out = tagweave(&folder, args);
            assert!(
                out.status.code() == Some(0),
                "tagweave {args:?}: {:?}\n{}\n{}",
                out.status,
                stdout_of(&out),
                stderr_of(&out)
            );
        }
        folder
    })
}

/// A fresh copy of the trained demo, its store included.
pub fn trained_copy() -> tempfile::TempDir {
    let template = trained_demo();
    std::fs::create_dir_all(scratch_root()).unwrap();
    let temp = tempfile::tempdir_in(scratch_root()).unwrap();
    copy_everything(template, temp.path());
    temp
}

/// A running `tagweave serve`; killed when dropped.
pub struct Served {
    child: Child,
    folder: PathBuf,
    pub port: u16,
    /// The search page, `http://127.0.0.1:PORT/`.
    pub url: String,
    /// The one-time address `serve` printed.
    pub entry_url: String,
    /// The pass cookie (`tagweave-pass=…`) once the entry address was opened.
    pub pass: Option<String>,
}

impl Served {
    /// Starts `tagweave serve --port 0 EXTRA…` in `folder`, waits for its address and
    /// opens it once, keeping the pass it hands out.
    pub fn start(folder: &Path, extra: &[&str]) -> Served {
        let mut served = Served::start_unopened(folder, extra);
        let entry = served.entry_url.trim_start_matches(&served.url).to_string();
        let answer = request(served.port, "GET", &format!("/{entry}"), &[], b"");
        assert_eq!(answer.status, 303, "{}", answer.text());
        let cookie = answer
            .header("Set-Cookie")
            .expect("the one-time address hands out the pass");
        served.pass = Some(cookie.split(';').next().unwrap().trim().to_string());
        served
    }

    /// Starts `tagweave serve --port 0 EXTRA…` in `folder` and waits for its address,
    /// without opening it.
    pub fn start_unopened(folder: &Path, extra: &[&str]) -> Served {
        let mut child = Command::new(env!("CARGO_BIN_EXE_tagweave"))
            .args(["serve", "--port", "0"])
            .args(extra)
            .current_dir(folder)
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .expect("tagweave serve starts");
        let stdout = child.stdout.take().unwrap();
        let (tx, rx) = std::sync::mpsc::channel();
        std::thread::spawn(move || {
            let mut lines = BufReader::new(stdout).lines();
            let first = lines.next().and_then(Result::ok);
            let _ = tx.send(first);
            // Keep reading so the server never blocks on a full pipe.
            for _ in lines {}
        });
        let line = match rx.recv_timeout(Duration::from_secs(120)) {
            Ok(Some(line)) => line,
            other => {
                let _ = child.kill();
                let mut err = String::new();
                let _ = child.stderr.take().unwrap().read_to_string(&mut err);
                panic!("tagweave serve printed no address ({other:?}); stderr:\n{err}");
            }
        };
        let entry_url = line
            .strip_prefix("Review page: ")
            .unwrap_or_else(|| panic!("unexpected first line: {line}"))
            .trim()
            .to_string();
        let port: u16 = entry_url
            .strip_prefix("http://127.0.0.1:")
            .and_then(|rest| rest.split('/').next())
            .and_then(|p| p.parse().ok())
            .unwrap_or_else(|| panic!("not a loopback address: {entry_url}"));
        Served {
            child,
            folder: folder.to_path_buf(),
            port,
            url: format!("http://127.0.0.1:{port}/"),
            entry_url,
            pass: None,
        }
    }

    /// The server's process id.
    pub fn pid(&self) -> u32 {
        self.child.id()
    }

    /// `Origin` of this server, as a browser sends it.
    pub fn origin(&self) -> String {
        format!("http://127.0.0.1:{}", self.port)
    }

    /// A request with the pass (when there is one) and `headers`.
    pub fn send(
        &self,
        method: &str,
        target: &str,
        headers: &[(&str, &str)],
        body: &[u8],
    ) -> Answer {
        let mut all: Vec<(&str, &str)> = Vec::new();
        if let Some(pass) = &self.pass {
            all.push(("Cookie", pass));
        }
        all.extend_from_slice(headers);
        request(self.port, method, target, &all, body)
    }

    pub fn get(&self, target: &str) -> Answer {
        self.send("GET", target, &[], b"")
    }

    /// A form POST as our own pages send it: form type, pass, this server's `Origin`.
    pub fn post(&self, target: &str, form: &str) -> Answer {
        let origin = self.origin();
        self.post_with(target, form, &[("Origin", &origin)])
    }

    /// A form POST with the pass and `headers` (no `Origin` unless given).
    pub fn post_with(&self, target: &str, form: &str, headers: &[(&str, &str)]) -> Answer {
        let mut all = vec![("Content-Type", "application/x-www-form-urlencoded")];
        all.extend_from_slice(headers);
        self.send("POST", target, &all, form.as_bytes())
    }

    /// The page id of a picture: keyed with the store's secret, which `serve` keeps in
    /// the store folder.
    pub fn id_of(&self, picture: &str) -> String {
        tagweave_serve::PageIds::open(&self.folder.join(".tagweave"))
            .expect("the store has its page key")
            .of(picture)
    }

    /// This run's token, as written into the forms of a picture's page.
    pub fn token(&self, id: &str) -> String {
        token_in(&self.get(&format!("/picture/{id}")).text())
            .expect("the picture page carries a token")
    }
}

impl Drop for Served {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// One HTTP answer.
#[derive(Debug)]
pub struct Answer {
    pub status: u16,
    pub headers: Vec<(String, String)>,
    pub body: Vec<u8>,
}

impl Answer {
    pub fn header(&self, name: &str) -> Option<&str> {
        self.headers
            .iter()
            .find(|(n, _)| n.eq_ignore_ascii_case(name))
            .map(|(_, v)| v.as_str())
    }

    pub fn content_type(&self) -> &str {
        self.header("Content-Type").unwrap_or("")
    }

    pub fn text(&self) -> String {
        String::from_utf8_lossy(&self.body).into_owned()
    }
}

/// Sends one request exactly as given (`Host` is added unless `headers` has one).
pub fn request(
    port: u16,
    method: &str,
    target: &str,
    headers: &[(&str, &str)],
    body: &[u8],
) -> Answer {
    request_within(port, method, target, headers, body, Duration::from_secs(60))
        .unwrap_or_else(|e| panic!("{method} {target}: no answer: {e}"))
}

/// As [`request`], but gives up when the answer is not all in within `time`.
pub fn request_within(
    port: u16,
    method: &str,
    target: &str,
    headers: &[(&str, &str)],
    body: &[u8],
    time: Duration,
) -> std::io::Result<Answer> {
    let deadline = std::time::Instant::now() + time;
    let mut stream = TcpStream::connect(("127.0.0.1", port))?;
    stream.set_read_timeout(Some(time))?;
    let mut head = format!("{method} {target} HTTP/1.1\r\n");
    if !headers.iter().any(|(n, _)| n.eq_ignore_ascii_case("Host")) {
        head.push_str(&format!("Host: 127.0.0.1:{port}\r\n"));
    }
    for (name, value) in headers {
        head.push_str(&format!("{name}: {value}\r\n"));
    }
    if !body.is_empty() || method == "POST" {
        head.push_str(&format!("Content-Length: {}\r\n", body.len()));
    }
    head.push_str("Connection: close\r\n\r\n");
    stream.write_all(head.as_bytes())?;
    stream.write_all(body)?;
    let mut raw = Vec::new();
    let mut chunk = [0u8; 16 * 1024];
    loop {
        let left = deadline.saturating_duration_since(std::time::Instant::now());
        if left.is_zero() {
            return Err(std::io::ErrorKind::TimedOut.into());
        }
        stream.set_read_timeout(Some(left))?;
        match stream.read(&mut chunk)? {
            0 => break,
            n => raw.extend_from_slice(&chunk[..n]),
        }
    }
    Ok(parse_answer(&raw, method == "HEAD"))
}

fn parse_answer(raw: &[u8], head_only: bool) -> Answer {
    let end = raw
        .windows(4)
        .position(|w| w == b"\r\n\r\n")
        .unwrap_or_else(|| panic!("no header end in {:?}", String::from_utf8_lossy(raw)));
    let head = String::from_utf8_lossy(&raw[..end]).into_owned();
    let mut lines = head.split("\r\n");
    let status_line = lines.next().unwrap();
    let status = status_line
        .split(' ')
        .nth(1)
        .and_then(|s| s.parse().ok())
        .unwrap_or_else(|| panic!("bad status line {status_line}"));
    let headers: Vec<(String, String)> = lines
        .filter_map(|l| l.split_once(':'))
        .map(|(n, v)| (n.trim().to_string(), v.trim().to_string()))
        .collect();
    let mut body = raw[end + 4..].to_vec();
    if !head_only {
        if let Some(length) = headers
            .iter()
            .find(|(n, _)| n.eq_ignore_ascii_case("Content-Length"))
            .and_then(|(_, v)| v.parse::<usize>().ok())
        {
            assert_eq!(body.len(), length, "Content-Length disagrees with the body");
            body.truncate(length);
        }
    }
    Answer {
        status,
        headers,
        body,
    }
}

/// The value of the first `name="token"` input in a page.
pub fn token_in(html: &str) -> Option<String> {
    let at = html.find("name=\"token\" value=\"")? + "name=\"token\" value=\"".len();
    let rest = &html[at..];
    Some(rest[..rest.find('"')?].to_string())
}

/// Every value of `attr="…"` on elements whose opening tag contains `marker`, in order.
pub fn attr_values(html: &str, marker: &str, attr: &str) -> Vec<String> {
    let needle = format!("{attr}=\"");
    html.split('<')
        .filter(|tag| tag.contains(marker))
        .filter_map(|tag| {
            let at = tag.find(&needle)? + needle.len();
            let rest = &tag[at..];
            Some(unescape(&rest[..rest.find('"')?]))
        })
        .collect()
}

/// Undoes the HTML escaping of attribute values.
pub fn unescape(text: &str) -> String {
    text.replace("&lt;", "<")
        .replace("&gt;", ">")
        .replace("&quot;", "\"")
        .replace("&#39;", "'")
        .replace("&amp;", "&")
}

/// Percent-encodes a form or query value.
pub fn form_value(value: &str) -> String {
    value
        .bytes()
        .map(|b| match b {
            b'A'..=b'Z' | b'a'..=b'z' | b'0'..=b'9' | b'-' | b'.' | b'_' | b'~' => {
                (b as char).to_string()
            }
            b => format!("%{b:02X}"),
        })
        .collect()
}

/// Tags a text sidecar holds now, read with the collection's own reader.
pub fn text_sidecar_tags(path: &Path) -> Vec<String> {
    tagweave_collection::sidecar::read_sidecar(path, tagweave_collection::SidecarKind::Text)
        .unwrap_or_else(|e| panic!("{}: {e}", path.display()))
        .tags
}

/// The text sidecar beside a picture (`STEM.txt`).
pub fn text_sidecar_of(root: &Path, picture: &str) -> PathBuf {
    root.join(picture).with_extension("txt")
}

/// The item id of a picture (the unkeyed hash of its path, as the store knows it).
pub fn item_id_of(picture: &str) -> String {
    tagweave_collection::item_id(picture)
}
