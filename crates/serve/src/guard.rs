//! Who may change tags: this run's token and the checks on where a request comes from.
//!
//! Any web page the user has open can make their browser send a form to 127.0.0.1. It
//! cannot read our pages, though, so it cannot know the token they carry: a change that
//! does not echo it back came from somewhere else. The Host check keeps a page that
//! re-points its own domain name at 127.0.0.1 (DNS rebinding) from reading our pages,
//! and with them the token.

use rand::Rng;

/// A secret issued once per server run and written into every form of its pages.
#[derive(Clone)]
pub struct WriteToken(String);

impl WriteToken {
    /// 128 random bits from the thread generator, which is seeded from the operating
    /// system and cryptographically strong.
    pub fn new() -> WriteToken {
        let bytes: [u8; 16] = rand::rng().random();
        WriteToken(bytes.iter().map(|b| format!("{b:02x}")).collect())
    }

    pub fn as_str(&self) -> &str {
        &self.0
    }

    /// Compares in time independent of where the strings first differ, so the token
    /// cannot be guessed one character at a time by timing answers.
    pub fn matches(&self, offered: &str) -> bool {
        let (a, b) = (self.0.as_bytes(), offered.as_bytes());
        if a.len() != b.len() {
            return false;
        }
        a.iter().zip(b).fold(0u8, |acc, (x, y)| acc | (x ^ y)) == 0
    }
}

impl Default for WriteToken {
    fn default() -> Self {
        WriteToken::new()
    }
}

/// The names under which a browser on this machine reaches a server on `port` of the
/// loopback interface.
pub fn loopback_hosts(port: u16) -> Vec<String> {
    ["127.0.0.1", "localhost", "[::1]"]
        .iter()
        .map(|h| format!("{h}:{port}"))
        .collect()
}

/// True when the `Host` header names this server by a loopback name (case-insensitive).
pub fn host_allowed(host: Option<&str>, allowed: &[String]) -> bool {
    host.is_some_and(|h| allowed.iter().any(|a| a.eq_ignore_ascii_case(h.trim())))
}

/// True when a change request's own headers do not say it came from another site. Old
/// browsers send neither header; then the token alone decides.
pub fn same_origin(
    origin: Option<&str>,
    fetch_site: Option<&str>,
    allowed_hosts: &[String],
) -> bool {
    if let Some(site) = fetch_site {
        if !matches!(site.trim(), "same-origin" | "none") {
            return false;
        }
    }
    match origin {
        None => true,
        Some(origin) => allowed_hosts
            .iter()
            .any(|h| origin.trim().eq_ignore_ascii_case(&format!("http://{h}"))),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn tokens_are_long_random_and_compared_exactly() {
        let a = WriteToken::new();
        let b = WriteToken::new();
        assert_eq!(a.as_str().len(), 32);
        assert!(a.as_str().bytes().all(|c| c.is_ascii_hexdigit()));
        assert_ne!(a.as_str(), b.as_str(), "two server runs, two tokens");
        assert!(a.matches(a.as_str()));
        assert!(!a.matches(b.as_str()));
        assert!(!a.matches(""));
        assert!(!a.matches(&a.as_str()[..31]));
        assert!(!a.matches(&format!("{}0", a.as_str())));
        let mut flipped = a.as_str().to_string().into_bytes();
        flipped[31] = if flipped[31] == b'0' { b'1' } else { b'0' };
        assert!(!a.matches(std::str::from_utf8(&flipped).unwrap()));
    }

    #[test]
    fn only_loopback_names_of_our_port_are_hosts() {
        let allowed = loopback_hosts(8080);
        assert!(host_allowed(Some("127.0.0.1:8080"), &allowed));
        assert!(host_allowed(Some("LOCALHOST:8080"), &allowed));
        assert!(host_allowed(Some("[::1]:8080"), &allowed));
        assert!(!host_allowed(Some("127.0.0.1:8081"), &allowed));
        assert!(!host_allowed(Some("attacker.example:8080"), &allowed));
        assert!(!host_allowed(Some("127.0.0.1"), &allowed));
        assert!(!host_allowed(None, &allowed));
    }

    #[test]
    fn cross_site_requests_are_recognised() {
        // source: Fetch Metadata Request Headers (W3C), Sec-Fetch-Site values;
        // RFC 6454 §7 for the Origin header ("null" for opaque origins).
        let allowed = loopback_hosts(9000);
        assert!(same_origin(None, None, &allowed));
        assert!(same_origin(
            Some("http://127.0.0.1:9000"),
            Some("same-origin"),
            &allowed
        ));
        assert!(!same_origin(Some("null"), None, &allowed));
        assert!(!same_origin(Some("http://evil.example"), None, &allowed));
        assert!(!same_origin(Some("http://127.0.0.1:9001"), None, &allowed));
        assert!(!same_origin(None, Some("cross-site"), &allowed));
        assert!(!same_origin(None, Some("same-site"), &allowed));
    }
}
