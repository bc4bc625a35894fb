//! The review page in a real browser: Debian's chromium, headless, used the way a person
//! would. It opens the one-time address `tagweave serve` printed (and is let in by the pass
//! cookie it gets), searches a keyword, opens a picture, clicks "accept" on a suggestion,
//! and the sidecar on disk must then carry the tag. A second browser opening the same
//! address is refused. Screenshots land in target/review-page-screenshots/.
//!
//! The test steers chromium over its remote-debugging protocol (JSON messages over a
//! WebSocket on the loopback interface, both written here in a few lines): navigate, read
//! the DOM, click, take a screenshot. Every request is the browser's own, with its own
//! cookie, `Origin`, `Sec-Fetch-Site` and form encoding. Without chromium
//! (`apt-get install chromium`) the test says so and passes.

mod common;
mod review_page_support;

use std::io::{BufRead, BufReader, Read, Write};
use std::net::TcpStream;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use common::*;
use review_page_support::*;

/// The browser, when this machine has one.
fn chromium() -> Option<&'static str> {
    ["chromium", "chromium-browser"].into_iter().find(|name| {
        Command::new(name)
            .arg("--version")
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .status()
            .is_ok_and(|s| s.success())
    })
}

fn screenshot_dir() -> PathBuf {
    let target = Path::new(env!("CARGO_TARGET_TMPDIR"))
        .parent()
        .expect("the target folder")
        .to_path_buf();
    let dir = target.join("review-page-screenshots");
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

/// Headless chromium without network chatter, at a fixed window size.
const QUIET_HEADLESS: [&str; 9] = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--hide-scrollbars",
    "--window-size=1280,1000",
];

/// Runs headless chromium once with a fresh profile, no network chatter, and a time limit;
/// returns what it printed.
fn run_chromium(browser: &str, args: &[String]) -> String {
    let profile = tempfile::tempdir().unwrap();
    let mut child = Command::new(browser)
        .args(QUIET_HEADLESS)
        .arg(format!("--user-data-dir={}", profile.path().display()))
        .args(args)
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .expect("chromium starts");
    let mut stdout = child.stdout.take().unwrap();
    let reader = std::thread::spawn(move || {
        let mut out = String::new();
        std::io::Read::read_to_string(&mut stdout, &mut out).ok();
        out
    });
    let started = Instant::now();
    loop {
        if child.try_wait().unwrap().is_some() {
            break;
        }
        if started.elapsed() > Duration::from_secs(60) {
            let _ = child.kill();
            let _ = child.wait();
            panic!("chromium did not finish within 60 s: {args:?}");
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    reader.join().unwrap()
}

/// The DOM after chromium loaded the page.
fn dom(browser: &str, url: &str) -> String {
    let out = run_chromium(browser, &["--dump-dom".to_string(), url.to_string()]);
    assert!(out.contains("</html>"), "no DOM for {url}: {out}");
    out
}

/// A chromium process, killed when dropped (also when a test fails half-way).
struct Chromium(Child);

impl Drop for Chromium {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

/// A headless chromium steered over its remote-debugging WebSocket; killed when dropped.
struct Browser {
    child: Chromium,
    socket: TcpStream,
    next_id: u64,
    /// Events seen while waiting for answers, by method name.
    events: Vec<String>,
    _profile: tempfile::TempDir,
}

// source: RFC 6455 §5.2 (base framing: FIN/opcode byte, MASK bit and 7/16/64-bit
// lengths, client frames masked) and §4.1 (the opening handshake).
fn ws_send(socket: &mut TcpStream, text: &str) -> std::io::Result<()> {
    let payload = text.as_bytes();
    let mut frame = vec![0x81u8];
    match payload.len() {
        n if n < 126 => frame.push(0x80 | n as u8),
        n if n < 65_536 => {
            frame.push(0x80 | 126);
            frame.extend_from_slice(&(n as u16).to_be_bytes());
        }
        n => {
            frame.push(0x80 | 127);
            frame.extend_from_slice(&(n as u64).to_be_bytes());
        }
    }
    let mask = [0x5a, 0x17, 0xc3, 0x2e];
    frame.extend_from_slice(&mask);
    frame.extend(payload.iter().enumerate().map(|(i, b)| b ^ mask[i % 4]));
    socket.write_all(&frame)
}

/// One whole text message (continuation frames joined).
fn ws_receive(socket: &mut TcpStream) -> std::io::Result<String> {
    let mut message = Vec::new();
    loop {
        let mut head = [0u8; 2];
        socket.read_exact(&mut head)?;
        let length = match head[1] & 0x7f {
            126 => {
                let mut l = [0u8; 2];
                socket.read_exact(&mut l)?;
                u16::from_be_bytes(l) as usize
            }
            127 => {
                let mut l = [0u8; 8];
                socket.read_exact(&mut l)?;
                u64::from_be_bytes(l) as usize
            }
            n => n as usize,
        };
        let mut payload = vec![0u8; length];
        socket.read_exact(&mut payload)?;
        if head[0] & 0x0f == 0x8 {
            return Err(std::io::ErrorKind::ConnectionAborted.into());
        }
        message.extend_from_slice(&payload);
        if head[0] & 0x80 != 0 {
            return Ok(String::from_utf8_lossy(&message).into_owned());
        }
    }
}

/// A JSON document from chromium's debugging HTTP server, read by its Content-Length
/// (that server keeps connections open).
fn debugger_json(port: u16, path: &str) -> serde_json::Value {
    let mut socket = TcpStream::connect(("127.0.0.1", port)).unwrap();
    socket
        .set_read_timeout(Some(Duration::from_secs(30)))
        .unwrap();
    write!(
        socket,
        "GET {path} HTTP/1.1\r\nHost: 127.0.0.1:{port}\r\n\r\n"
    )
    .unwrap();
    let mut raw = Vec::new();
    let mut chunk = [0u8; 8192];
    loop {
        let n = socket.read(&mut chunk).expect("chromium answers");
        assert!(n > 0, "chromium closed the connection");
        raw.extend_from_slice(&chunk[..n]);
        let Some(end) = raw.windows(4).position(|w| w == b"\r\n\r\n") else {
            continue;
        };
        let head = String::from_utf8_lossy(&raw[..end]).to_ascii_lowercase();
        let length: usize = head
            .lines()
            .find_map(|l| l.strip_prefix("content-length:"))
            .and_then(|v| v.trim().parse().ok())
            .expect("a Content-Length");
        if raw.len() >= end + 4 + length {
            return serde_json::from_slice(&raw[end + 4..end + 4 + length]).unwrap();
        }
    }
}

impl Browser {
    fn launch(browser: &str) -> Browser {
        let profile = tempfile::tempdir().unwrap();
        let mut child = Chromium(
            Command::new(browser)
                .args(QUIET_HEADLESS)
                .arg("--remote-debugging-port=0")
                .arg(format!("--user-data-dir={}", profile.path().display()))
                .arg("about:blank")
                .stdout(Stdio::null())
                .stderr(Stdio::piped())
                .spawn()
                .expect("chromium starts"),
        );
        // It says where it listens on stderr: "DevTools listening on ws://…".
        let stderr = child.0.stderr.take().unwrap();
        let (tx, rx) = std::sync::mpsc::channel();
        std::thread::spawn(move || {
            for line in BufReader::new(stderr).lines().map_while(Result::ok) {
                if let Some(at) = line.find("ws://") {
                    let _ = tx.send(line[at..].trim().to_string());
                }
            }
        });
        let browser_ws = rx
            .recv_timeout(Duration::from_secs(60))
            .expect("chromium opens its remote-debugging port within 60 s");
        let authority = browser_ws["ws://".len()..]
            .split('/')
            .next()
            .unwrap()
            .to_string();
        let port: u16 = authority.rsplit(':').next().unwrap().parse().unwrap();
        // The page chromium opened (about:blank), from its target list.
        let started = Instant::now();
        let page_path = loop {
            let targets = debugger_json(port, "/json/list");
            let page = targets.as_array().and_then(|all| {
                all.iter()
                    .find(|t| t["type"] == "page")
                    .and_then(|t| t["webSocketDebuggerUrl"].as_str())
                    .map(|u| u[u.find("/devtools/").unwrap()..].to_string())
            });
            if let Some(page) = page {
                break page;
            }
            assert!(
                started.elapsed() < Duration::from_secs(30),
                "no page target"
            );
            std::thread::sleep(Duration::from_millis(100));
        };
        let mut socket = TcpStream::connect(("127.0.0.1", port)).unwrap();
        socket
            .set_read_timeout(Some(Duration::from_secs(60)))
            .unwrap();
        write!(
            socket,
            "GET {page_path} HTTP/1.1\r\nHost: {authority}\r\nUpgrade: websocket\r\n\
             Connection: Upgrade\r\nSec-WebSocket-Key: dGhlIHNhbXBsZSBub25jZQ==\r\n\
             Sec-WebSocket-Version: 13\r\n\r\n"
        )
        .unwrap();
        let mut head = Vec::new();
        let mut byte = [0u8; 1];
        while !head.ends_with(b"\r\n\r\n") {
            socket.read_exact(&mut byte).unwrap();
            head.push(byte[0]);
        }
        let head = String::from_utf8_lossy(&head);
        assert!(head.starts_with("HTTP/1.1 101"), "{head}");
        let mut browser = Browser {
            child,
            socket,
            next_id: 0,
            events: Vec::new(),
            _profile: profile,
        };
        browser.call("Page.enable", serde_json::json!({}));
        browser
    }

    /// Sends one command and returns its result (events that arrive meanwhile are kept).
    fn call(&mut self, method: &str, params: serde_json::Value) -> serde_json::Value {
        self.next_id += 1;
        let id = self.next_id;
        let message = serde_json::json!({"id": id, "method": method, "params": params});
        ws_send(&mut self.socket, &message.to_string()).expect("the browser listens");
        let started = Instant::now();
        loop {
            assert!(
                started.elapsed() < Duration::from_secs(60),
                "{method}: no answer in 60 s"
            );
            let text = ws_receive(&mut self.socket).expect("the browser answers");
            let answer: serde_json::Value = serde_json::from_str(&text).unwrap();
            if answer["id"] == id {
                assert!(answer.get("error").is_none(), "{method}: {answer}");
                return answer["result"].clone();
            }
            self.note(&answer);
        }
    }

    /// Keeps an event's name; a request the page sends is kept as "METHOD URL" too.
    fn note(&mut self, event: &serde_json::Value) {
        let Some(name) = event["method"].as_str() else {
            return;
        };
        self.events.push(name.to_string());
        if name == "Network.requestWillBeSent" {
            let request = &event["params"]["request"];
            self.events.push(format!(
                "{} {}",
                request["method"].as_str().unwrap_or(""),
                request["url"].as_str().unwrap_or("")
            ));
        }
    }

    /// Presses one key as a keyboard does (down, up), into whatever has the focus.
    fn press(&mut self, key: &str) {
        // source: UI Events KeyboardEvent code values and Windows virtual-key codes
        // (from memory): letters are their upper-case ASCII, arrows 37–40.
        let (code, vk, text) = match key {
            "ArrowLeft" => ("ArrowLeft".to_string(), 37, ""),
            "ArrowUp" => ("ArrowUp".to_string(), 38, ""),
            "ArrowRight" => ("ArrowRight".to_string(), 39, ""),
            "ArrowDown" => ("ArrowDown".to_string(), 40, ""),
            letter => (
                format!("Key{}", letter.to_ascii_uppercase()),
                letter.to_ascii_uppercase().as_bytes()[0],
                letter,
            ),
        };
        for kind in ["keyDown", "keyUp"] {
            let mut event = serde_json::json!({
                "type": kind, "key": key, "code": code, "windowsVirtualKeyCode": vk,
            });
            if kind == "keyDown" && !text.is_empty() {
                event["text"] = serde_json::json!(text);
            }
            self.call("Input.dispatchKeyEvent", event);
        }
    }

    /// Waits (10 s at most) until a script expression is true in the page.
    fn wait_for(&mut self, expression: &str) {
        let started = Instant::now();
        while self.eval(expression) != serde_json::Value::Bool(true) {
            assert!(
                started.elapsed() < Duration::from_secs(10),
                "not so within 10 s: {expression}"
            );
            std::thread::sleep(Duration::from_millis(25));
        }
    }

    /// Waits (60 s at most) for the page to finish loading after `act` started a load.
    fn load(&mut self, act: impl FnOnce(&mut Browser)) {
        self.events.clear();
        act(self);
        let started = Instant::now();
        while !self.events.iter().any(|e| e == "Page.loadEventFired") {
            assert!(
                started.elapsed() < Duration::from_secs(60),
                "the page did not load within 60 s"
            );
            let text = ws_receive(&mut self.socket).expect("the browser reports");
            let event: serde_json::Value = serde_json::from_str(&text).unwrap();
            self.note(&event);
        }
    }

    fn open(&mut self, url: &str) {
        let url = url.to_string();
        self.load(|b| {
            b.call("Page.navigate", serde_json::json!({ "url": url }));
        });
    }

    /// The value of a script expression evaluated in the page.
    fn eval(&mut self, expression: &str) -> serde_json::Value {
        let result = self.call(
            "Runtime.evaluate",
            serde_json::json!({"expression": expression, "returnByValue": true}),
        );
        result["result"]["value"].clone()
    }

    fn dom(&mut self) -> String {
        self.eval("document.documentElement.outerHTML")
            .as_str()
            .unwrap()
            .to_string()
    }

    fn screenshot(&mut self, name: &str) -> PathBuf {
        let result = self.call(
            "Page.captureScreenshot",
            serde_json::json!({"format": "png"}),
        );
        let bytes = base64_decode(result["data"].as_str().unwrap());
        let path = screenshot_dir().join(name);
        std::fs::write(&path, &bytes).unwrap();
        // source: PNG signature, ISO/IEC 15948 §5.2.
        assert_eq!(&bytes[..8], b"\x89PNG\r\n\x1a\n", "{name} is a PNG");
        assert!(
            bytes.len() > 20_000,
            "{name} is a real page, {} bytes",
            bytes.len()
        );
        path
    }
}

impl Drop for Browser {
    fn drop(&mut self) {
        // Asked to close, chromium ends with all its helper processes; `child` is killed
        // after this in any case.
        let close = serde_json::json!({"id": 0, "method": "Browser.close"});
        let _ = ws_send(&mut self.socket, &close.to_string());
        let started = Instant::now();
        while started.elapsed() < Duration::from_secs(10) {
            if self.child.0.try_wait().is_ok_and(|s| s.is_some()) {
                break;
            }
            std::thread::sleep(Duration::from_millis(50));
        }
    }
}

// source: RFC 4648 §4, the base64 alphabet; padding "=" ignored.
fn base64_decode(text: &str) -> Vec<u8> {
    let value = |c: u8| match c {
        b'A'..=b'Z' => c - b'A',
        b'a'..=b'z' => c - b'a' + 26,
        b'0'..=b'9' => c - b'0' + 52,
        b'+' => 62,
        b'/' => 63,
        _ => panic!("not base64: {c}"),
    };
    let digits: Vec<u8> = text.bytes().filter(|&c| c != b'=').map(value).collect();
    let mut out = Vec::with_capacity(digits.len() * 3 / 4);
    for chunk in digits.chunks(4) {
        let n = chunk
            .iter()
            .enumerate()
            .fold(0u32, |acc, (i, &d)| acc | (d as u32) << (18 - 6 * i));
        out.extend_from_slice(&n.to_be_bytes()[1..chunk.len()]);
    }
    out
}

#[test]
fn base64_decodes_like_the_rfc_says() {
    // source: RFC 4648 §10 test vectors.
    assert_eq!(base64_decode("Zm9vYmFy"), b"foobar");
    assert_eq!(base64_decode("Zm9vYg=="), b"foob");
    assert_eq!(base64_decode("Zm9vYmE="), b"fooba");
    assert_eq!(base64_decode("Zg=="), b"f");
}

#[test]
fn open_search_and_accept_in_a_real_browser() {
    let Some(browser) = chromium() else {
        eprintln!("skipped: chromium not installed");
        return;
    };
    let started = Instant::now();
    let folder = trained_copy();
    let root = folder.path();
    let served = Served::start_unopened(root, &[]);
    let truth: std::collections::BTreeMap<String, TruthRow> = demo_truth()
        .into_iter()
        .map(|r| (r.file.clone(), r))
        .collect();

    // A person opens the printed address: the browser is let in, and lands on the search
    // page with the key gone from its address bar. Scripts cannot read the pass.
    let mut tab = Browser::launch(browser);
    tab.open(&served.entry_url);
    assert_eq!(
        tab.eval("location.href").as_str(),
        Some(served.url.as_str())
    );
    let page = tab.dom();
    assert!(page.contains("<form method=\"get\" action=\"/\""), "{page}");
    assert_eq!(tab.eval("document.cookie").as_str(), Some(""));
    assert_eq!(
        tab.eval("document.styleSheets.length > 0 && document.styleSheets[0].cssRules.length > 0"),
        serde_json::Value::Bool(true),
        "the style sheet loaded with the pass"
    );

    // Search a keyword the way the form sends it.
    let search_url = format!("{}?q=harbour", served.url);
    tab.open(&search_url);
    let page = tab.dom();
    assert!(page.contains("pictures for “harbour”"), "{page}");
    let ids = attr_values(&page, "class=\"card\"", "data-id");
    let pictures = attr_values(&page, "/thumbnail\"", "alt");
    assert_eq!(ids.len(), 24);
    assert_eq!(pictures.len(), 24);
    for (id, picture) in ids.iter().zip(&pictures) {
        assert_eq!(*id, served.id_of(picture), "keyed page ids");
    }
    // Every thumbnail arrived (same-origin requests with the pass).
    assert_eq!(
        tab.eval(
            "Array.from(document.images).filter(i => i.complete && i.naturalWidth > 0).length"
        ),
        serde_json::json!(24)
    );
    // (The legend above the grid shows one of each mark too.)
    let grid = &page[page.find("<ul class=\"grid\">").expect("a grid")..];
    let carries = grid.matches("class=\"badge carries\"").count();
    let inferred = grid.matches("class=\"badge inferred\"").count();
    assert_eq!(carries + inferred, 24);
    // source: TRUTH.csv written_tags — the marks the browser shows agree with the sidecars.
    let expected_carries = pictures
        .iter()
        .filter(|p| {
            truth
                .get(p.as_str())
                .is_some_and(|r| r.written_tags.iter().any(|t| t == "harbour"))
        })
        .count();
    assert_eq!(carries, expected_carries);
    let search_shot = tab.screenshot("search.png");

    // Open the first result that has a text sidecar (so the change is easy to read back).
    let (id, picture) = ids
        .iter()
        .zip(&pictures)
        .find(|(_, p)| truth.get(p.as_str()).is_some_and(|r| r.sidecar == "txt"))
        .map(|(i, p)| (i.clone(), p.clone()))
        .expect("a result with a text sidecar");
    let picture_url = format!("{}picture/{id}", served.url);
    tab.open(&picture_url);
    let page = tab.dom();
    assert!(page.contains(&format!("src=\"/picture/{id}/large\"")));
    let accept_tags = attr_values(&page, "data-action=\"accept\"", "data-tag");
    assert!(!accept_tags.is_empty(), "no suggestion to accept: {page}");
    let tag = accept_tags[0].clone();

    // Click "accept": the browser posts the form with its pass, Origin and token.
    let sidecar = text_sidecar_of(root, &picture);
    let before = text_sidecar_tags(&sidecar);
    assert!(!before.contains(&tag));
    tab.load(|b| {
        b.eval("document.querySelector('form[data-action=\"accept\"] button').click()");
    });
    let page = tab.dom();
    assert!(page.contains(&format!("Added “{tag}”")), "{page}");
    let after = text_sidecar_tags(&sidecar);
    let mut expected = before.clone();
    expected.push(tag.clone());
    assert_eq!(after, expected, "the sidecar gained exactly {tag}");
    assert!(
        sidecar.with_extension("txt.orig").is_file(),
        "original kept"
    );

    // The browser now shows the tag among the picture's tags, written but not yet indexed.
    tab.open(&picture_url);
    let page = tab.dom();
    let now = attr_values(&page, "class=\"current\"", "data-tag");
    assert!(now.contains(&tag), "{now:?}");
    assert!(page.contains("tagweave commands in another terminal see the new tags now"));
    let picture_shot = tab.screenshot("picture.png");

    // The review queue renders too.
    tab.open(&format!("{}review", served.url));
    let page = tab.dom();
    assert!(page.matches("class=\"entry\"").count() >= 10, "{page}");
    let review_shot = tab.screenshot("review.png");

    let walk_shot = walk_one_by_one(&mut tab, &served, root);
    drop(tab);

    // Another browser (another profile: no pass) gets nothing, not even with the address
    // that was printed: it was spent.
    let other = dom(browser, &served.entry_url);
    assert!(other.contains("Address already used"), "{other}");
    assert!(!other.contains("harbour"), "{other}");
    let other = dom(browser, &search_url);
    assert!(other.contains("Open the printed address"), "{other}");
    assert!(!other.contains("class=\"card\""), "{other}");

    eprintln!(
        "screenshots: {}, {}, {}, {} ({:.1} s)",
        search_shot.display(),
        picture_shot.display(),
        review_shot.display(),
        walk_shot.display(),
        started.elapsed().as_secs_f64()
    );
}

/// The tags of a picture's text sidecar (`STEM.txt` or `NAME.EXT.txt`), none without one.
fn sidecar_tags_of(root: &Path, picture: &str) -> Vec<String> {
    let by_stem = text_sidecar_of(root, picture);
    let by_name = root.join(format!("{picture}.txt"));
    match [by_stem, by_name].into_iter().find(|p| p.is_file()) {
        Some(path) => text_sidecar_tags(&path),
        None => Vec::new(),
    }
}

/// The one-by-one page driven by its keys: mark the second suggestion and accept it with
/// "a", go on with "j", back with "k" and on again, accept every suggestion above a
/// threshold typed into its box (where "k" must not move the page), reject one with "r".
/// Each decision must be one POST, the page never reloaded, and the sidecars must carry
/// exactly what was accepted.
fn walk_one_by_one(tab: &mut Browser, served: &Served, root: &Path) -> PathBuf {
    let started = Instant::now();
    tab.call("Network.enable", serde_json::json!({}));
    tab.open(&format!("{}one-by-one", served.url));
    // The script ran under the page's policy, and a mark of ours is set on this document.
    assert_eq!(
        tab.eval("document.documentElement.dataset.keys").as_str(),
        Some("on"),
        "the script loaded"
    );
    tab.eval("window.sameDocument = 'yes'");
    tab.events.clear();
    let shown = |tab: &mut Browser, what: &str| -> String {
        tab.eval(&format!(
            "document.querySelector('section.one').dataset.{what}"
        ))
        .as_str()
        .unwrap()
        .to_string()
    };
    let picture_at = |tab: &mut Browser| -> String {
        tab.eval("document.querySelector('section.one img.large').alt")
            .as_str()
            .unwrap()
            .to_string()
    };
    let suggested = |tab: &mut Browser| -> Vec<String> {
        tab.eval("Array.from(document.querySelectorAll('li.suggestion')).map(li => li.dataset.tag)")
            .as_array()
            .unwrap()
            .iter()
            .map(|t| t.as_str().unwrap().to_string())
            .collect()
    };

    // First place: mark the second suggestion, accept it.
    assert_eq!(shown(tab, "at"), "1");
    let first = picture_at(tab);
    let first_before = sidecar_tags_of(root, &first);
    let offered = suggested(tab);
    assert!(offered.len() >= 2, "{offered:?}");
    tab.press("ArrowDown");
    assert_eq!(
        tab.eval("document.querySelector('li.suggestion.marked').dataset.tag")
            .as_str(),
        Some(offered[1].as_str())
    );
    tab.press("a");
    let accepted = offered[1].clone();
    tab.wait_for(&format!(
        "Array.from(document.querySelectorAll('li.current')).some(li => li.dataset.tag === {})",
        serde_json::json!(accepted)
    ));
    assert!(!suggested(tab).contains(&accepted));

    // On, back, on again.
    tab.press("j");
    tab.wait_for("document.querySelector('section.one').dataset.at === '2'");
    // The address follows (without a load), so a reload or a link shows the same place.
    let address = tab.eval("location.pathname + location.search");
    assert!(
        address
            .as_str()
            .is_some_and(|a| a.starts_with("/one-by-one?at=2&above=")),
        "{address}"
    );
    tab.press("k");
    tab.wait_for("document.querySelector('section.one').dataset.at === '1'");
    assert_eq!(picture_at(tab), first);
    tab.press("ArrowRight");
    tab.wait_for("document.querySelector('section.one').dataset.at === '2'");
    let second = picture_at(tab);
    let second_before = sidecar_tags_of(root, &second);

    // Type a threshold that takes two or more suggestions; "k" typed there moves nothing.
    let levels: Vec<u64> = tab
        .eval("Array.from(document.querySelectorAll('li.suggestion')).map(li => Number(li.dataset.hundredths))")
        .as_array()
        .unwrap()
        .iter()
        .map(|h| h.as_u64().unwrap())
        .collect();
    assert!(levels.len() >= 2, "{levels:?}");
    let above = levels[1];
    let expected: Vec<String> = suggested(tab)
        .into_iter()
        .zip(&levels)
        .filter(|(_, &h)| h >= above)
        .map(|(t, _)| t)
        .collect();
    let calibrated = shown(tab, "calibrated") == "1";
    let typed = if calibrated {
        above.to_string()
    } else {
        format!("{:.2}", above as f64 / 100.0)
    };
    tab.eval("document.querySelector('input[name=above]').focus()");
    tab.press("k");
    assert_eq!(
        shown(tab, "at"),
        "2",
        "keys typed into the box are the box's"
    );
    tab.eval("document.querySelector('input[name=above]').select()");
    tab.call("Input.insertText", serde_json::json!({ "text": typed }));
    let label = tab
        .eval("document.querySelector('form.all-above button').textContent")
        .as_str()
        .unwrap()
        .to_string();
    let count = expected.len();
    let tags = if count == 1 { "tag" } else { "tags" };
    let wanted = if calibrated {
        format!("accept {count} {tags} at or above {above} %")
    } else {
        format!("accept {count} {tags} scoring {typed} or more")
    };
    assert_eq!(label, wanted, "the count is shown before anything is sent");
    let posts_before = tab.events.iter().filter(|e| e.starts_with("POST ")).count();
    assert_eq!(posts_before, 1, "one POST for the one decision so far");
    tab.eval("document.querySelector('form.all-above button').click()");
    tab.wait_for(&format!(
        "{}.every(t => Array.from(document.querySelectorAll('li.current')).some(li => li.dataset.tag === t))",
        serde_json::json!(expected)
    ));
    let shot = tab.screenshot("one-by-one.png");

    // Down and up again, and "r": the marked (first) suggestion is set aside, nothing
    // written.
    let left = suggested(tab);
    tab.eval("document.activeElement.blur()");
    tab.press("ArrowDown");
    tab.press("ArrowUp");
    tab.press("r");
    tab.wait_for(&format!(
        "!Array.from(document.querySelectorAll('li.suggestion')).some(li => li.dataset.tag === {})",
        serde_json::json!(left[0])
    ));
    // (The next suggestion below the list may move up into it.)
    let now = suggested(tab);
    assert!(now.starts_with(&left[1..]), "{now:?} after {left:?}");

    // The same document all along, three POSTs for three decisions, and on disk exactly
    // what was accepted.
    assert_eq!(tab.eval("window.sameDocument").as_str(), Some("yes"));
    let posts: Vec<&String> = tab
        .events
        .iter()
        .filter(|e| e.starts_with("POST "))
        .collect();
    assert_eq!(posts.len(), 3, "{posts:?}");
    assert!(
        !tab.events.iter().any(|e| e == "Page.frameNavigated"),
        "the page never reloaded: {:?}",
        tab.events
    );
    let mut first_after = first_before.clone();
    first_after.push(accepted.clone());
    assert_eq!(sidecar_tags_of(root, &first), first_after, "{first}");
    let mut second_after = second_before.clone();
    second_after.extend(expected.iter().cloned());
    assert_eq!(sidecar_tags_of(root, &second), second_after, "{second}");
    eprintln!(
        "one by one: {first} +{accepted}; {second} +{expected:?} ({:.1} s)",
        started.elapsed().as_secs_f64()
    );
    shot
}
