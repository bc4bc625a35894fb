//! `tagweave serve` on the built store: start-up until it answers, then its main pages one
//! request at a time (each page that computes something on first use asked twice, cold and
//! cached), with the server's peak resident memory after each.

use std::io::{BufRead, BufReader, Read, Write};
use std::net::TcpStream;
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use anyhow::{bail, Context};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde_json::{json, Value};
use tagweave_collection::{item_id, FileStamp, ImageFormat, ItemRecord};
use tagweave_serve::renditions::{Rendition, Renditions};
use tagweave_serve::PageIds;

/// How long one request may take before the bench gives up on it.
const REQUEST_LIMIT: Duration = Duration::from_secs(30 * 60);

/// The built store's picture whose page and thumbnail are asked for; a generated
/// 640×480 JPEG (as the scan bench makes them) is put at its path so the thumbnail has
/// something to reduce.
const PICTURE: usize = 1;

/// Rows for the bench's table: one for start-up, one per request.
pub fn time_serve(
    tagweave: &Path,
    archive: &Path,
    seed: u64,
    rel_path_of: impl Fn(usize) -> String,
) -> anyhow::Result<Vec<Value>> {
    let store_dir = archive.join(".tagweave");
    let rel_path = rel_path_of(PICTURE);
    let file = archive.join(&rel_path);
    std::fs::create_dir_all(file.parent().context("picture path has a folder")?)?;
    std::fs::write(
        &file,
        crate::scan::jpeg(&mut ChaCha8Rng::seed_from_u64(seed))?,
    )?;
    // The thumbnail is made on first request: start cold.
    let item = ItemRecord {
        id: item_id(&rel_path),
        content_hash: blake3::hash(rel_path.as_bytes()).to_hex().to_string(),
        rel_path: rel_path.clone(),
        format: ImageFormat::Jpeg,
        stamp: FileStamp {
            size: 0,
            mtime_ns: 0,
        },
        sidecars: Vec::new(),
        tags: Vec::new(),
        accepted: Vec::new(),
    };
    let cached = Renditions::new(archive, &store_dir).cache_path(&item, Rendition::Thumbnail);
    let _ = std::fs::remove_file(&cached);
    let page_id = PageIds::open(&store_dir)
        .context("reading the store's page key")?
        .of(&rel_path);

    eprintln!("running tagweave serve --read-only --port 0…");
    let started = Instant::now();
    let mut child = Command::new(tagweave)
        .args(["serve", "--read-only", "--port", "0"])
        .current_dir(archive)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()?;
    let pid = child.id();
    let stdout = child.stdout.take().context("serve's output")?;
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        let mut lines = BufReader::new(stdout).lines();
        let _ = tx.send(lines.next().and_then(Result::ok));
        for _ in lines {} // never let the server block on a full pipe
    });
    let first = rx.recv_timeout(REQUEST_LIMIT).ok().flatten();
    let Some(entry_url) = first
        .as_deref()
        .and_then(|l| l.strip_prefix("Review page: "))
    else {
        let _ = child.kill();
        let mut err = String::new();
        if let Some(mut e) = child.stderr.take() {
            let _ = e.read_to_string(&mut err);
        }
        let _ = child.wait();
        bail!("tagweave serve printed no address ({first:?}): {err}");
    };
    let listening = started.elapsed().as_secs_f64();
    let rest = entry_url
        .trim()
        .strip_prefix("http://127.0.0.1:")
        .context("serve's address is not on 127.0.0.1")?;
    let (port, entry) = rest
        .split_once('/')
        .context("serve's address has no path")?;
    let port: u16 = port.parse()?;

    let mut rows = Vec::new();
    let opened = get(port, &format!("/{entry}"), None);
    let startup = started.elapsed().as_secs_f64();
    let pass = opened
        .as_ref()
        .ok()
        .and_then(|a| a.header("Set-Cookie"))
        .and_then(|c| c.split(';').next())
        .map(|c| c.trim().to_string());
    rows.push(json!({
        "command": "serve: start-up until it answers (model loaded, entry address opened)",
        "args": ["serve", "--read-only", "--port", "0"],
        "figures": {
            "seconds": startup,
            "address_printed_s": listening,
            "peak_rss_mb": peak_rss_mb(pid),
            "result": describe(&opened),
        },
    }));
    let Some(pass) = pass else {
        stop(&mut child);
        bail!(
            "the entry address handed out no pass: {}",
            describe(&opened)
        );
    };

    let pages: Vec<(&str, String)> = vec![
        ("serve: start page", "/".into()),
        ("serve: search for one tag", "/?q=subject-000".into()),
        (
            "serve: one picture's page with suggestions",
            format!("/picture/{page_id}"),
        ),
        (
            "serve: review queue (first: runs the audit)",
            "/review".into(),
        ),
        ("serve: review queue again", "/review".into()),
        (
            "serve: one-by-one (first: orders the walk)",
            "/one-by-one".into(),
        ),
        ("serve: one-by-one again", "/one-by-one?at=2".into()),
        (
            "serve: thumbnail (first: reduced from the file)",
            format!("/picture/{page_id}/thumbnail"),
        ),
        (
            "serve: thumbnail again (cached)",
            format!("/picture/{page_id}/thumbnail"),
        ),
    ];
    for (name, target) in pages {
        eprintln!("  GET {target}");
        let t = Instant::now();
        // As a browser on the page does: while the answer says the work is under way (503
        // with Retry-After), ask again after the delay it gives.
        let mut under_way = 0;
        let mut longest = 0.0f64;
        let answer = loop {
            let asked = Instant::now();
            let answer = get(port, &target, Some(&pass));
            longest = longest.max(asked.elapsed().as_secs_f64());
            let again = answer.as_ref().ok().and_then(|a| {
                (a.status == 503)
                    .then(|| a.header("Retry-After")?.trim().parse::<u64>().ok())
                    .flatten()
            });
            match again {
                Some(delay) if t.elapsed() < READY_LIMIT => {
                    under_way += 1;
                    std::thread::sleep(Duration::from_secs(delay));
                }
                _ => break answer,
            }
        };
        let seconds = t.elapsed().as_secs_f64();
        let figures = json!({
            "seconds": seconds,
            "peak_rss_mb": peak_rss_mb(pid),
            "result": describe(&answer),
            "status": answer.as_ref().ok().map(|a| a.status),
            "answers_under_way": under_way,
            "longest_request_s": longest,
        });
        eprintln!("  {figures}");
        rows.push(json!({ "command": name, "args": ["GET", target], "figures": figures }));
    }
    stop(&mut child);
    Ok(rows)
}

/// How long to keep asking for a page whose work is under way.
const READY_LIMIT: Duration = Duration::from_secs(30 * 60);

/// The server's peak resident memory so far (VmHWM), in MB.
fn peak_rss_mb(pid: u32) -> Option<f64> {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kb: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb / 1000.0)
}

fn stop(child: &mut std::process::Child) {
    let _ = child.kill();
    let _ = child.wait();
}

fn describe(answer: &anyhow::Result<Answer>) -> String {
    match answer {
        Ok(a) => format!("HTTP {}, {} bytes", a.status, a.body_len),
        Err(e) => format!("no answer: {e:#}"),
    }
}

struct Answer {
    status: u16,
    headers: Vec<(String, String)>,
    body_len: usize,
}

impl Answer {
    fn header(&self, name: &str) -> Option<&str> {
        self.headers
            .iter()
            .find(|(n, _)| n.eq_ignore_ascii_case(name))
            .map(|(_, v)| v.as_str())
    }
}

/// One GET on its own connection, read to the end.
fn get(port: u16, target: &str, cookie: Option<&str>) -> anyhow::Result<Answer> {
    let mut stream = TcpStream::connect(("127.0.0.1", port))?;
    stream.set_read_timeout(Some(REQUEST_LIMIT))?;
    let mut head = format!("GET {target} HTTP/1.1\r\nHost: 127.0.0.1:{port}\r\n");
    if let Some(cookie) = cookie {
        head.push_str(&format!("Cookie: {cookie}\r\n"));
    }
    head.push_str("Connection: close\r\n\r\n");
    stream.write_all(head.as_bytes())?;
    let mut raw = Vec::new();
    stream.read_to_end(&mut raw)?;
    if raw.is_empty() {
        bail!("the server closed the connection without answering");
    }
    let end = raw
        .windows(4)
        .position(|w| w == b"\r\n\r\n")
        .context("the answer has no end of head")?;
    let head = String::from_utf8_lossy(&raw[..end]);
    let mut lines = head.split("\r\n");
    let status = lines
        .next()
        .and_then(|l| l.split(' ').nth(1))
        .and_then(|s| s.parse().ok())
        .context("the answer has no status")?;
    let headers = lines
        .filter_map(|l| l.split_once(':'))
        .map(|(n, v)| (n.trim().to_string(), v.trim().to_string()))
        .collect();
    Ok(Answer {
        status,
        headers,
        body_len: raw.len() - end - 4,
    })
}
