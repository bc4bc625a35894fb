//! Who may look and who may change tags: this run's secrets and the checks on where a
//! request comes from.
//!
//! Three secrets, each 128 random bits, new on every run:
//! - the **entry key**, in the one address `tagweave serve` prints (`/open/KEY`). It works
//!   once: the first browser to open it gets the pass and the key is spent.
//! - the **pass**, a cookie (`HttpOnly; SameSite=Strict`) every request must carry, reads
//!   included. Other users of this machine can connect to 127.0.0.1 too; without the pass
//!   they get a refusal and nothing else. Other web pages cannot read it (`HttpOnly`), and
//!   their requests go out without it (`SameSite=Strict`).
//! - the **write token**, written into our pages' forms: a change that does not echo it
//!   back did not come from one of our pages.
//!
//! The Host check keeps a page that re-points its own domain name at 127.0.0.1 (DNS
//! rebinding) from reading our pages; the `Sec-Fetch-Site`, `Origin` and `Referer` checks
//! refuse what a browser says came from another site.

use rand::Rng;

/// Name of the cookie that carries the pass.
pub const PASS_COOKIE: &str = "tagweave-pass";

/// A secret issued once per server run.
#[derive(Clone)]
pub struct Secret(String);

impl Secret {
    /// 128 random bits from the thread generator, which is seeded from the operating
    /// system and cryptographically strong.
    pub fn new() -> Secret {
        let bytes: [u8; 16] = rand::rng().random();
        Secret(bytes.iter().map(|b| format!("{b:02x}")).collect())
    }

    pub fn as_str(&self) -> &str {
        &self.0
    }

    /// Compares in time independent of where the strings first differ, so a secret
    /// cannot be guessed one character at a time by timing answers.
    pub fn matches(&self, offered: &str) -> bool {
        let (a, b) = (self.0.as_bytes(), offered.as_bytes());
        if a.len() != b.len() {
            return false;
        }
        a.iter().zip(b).fold(0u8, |acc, (x, y)| acc | (x ^ y)) == 0
    }
}

impl Default for Secret {
    fn default() -> Self {
        Secret::new()
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

/// True unless the browser says the request was started by another site, including
/// another port of this machine (`same-site`): our own pages' requests are `same-origin`,
/// an address typed or opened from a terminal is `none`. Browsers that do not send the
/// header are left to the other checks.
pub fn site_allowed(fetch_site: Option<&str>) -> bool {
    fetch_site.is_none_or(|site| matches!(site.trim(), "same-origin" | "none"))
}

/// True when a change request says where it comes from, and that is this server: its
/// `Origin`, or, when a browser sent none, its `Referer`. A request that names neither is
/// refused (every browser of the last years sends `Origin` with a form's POST).
pub fn change_origin_allowed(
    origin: Option<&str>,
    referer: Option<&str>,
    allowed_hosts: &[String],
) -> bool {
    let ours = |origin: &str| {
        allowed_hosts
            .iter()
            .any(|h| origin.eq_ignore_ascii_case(&format!("http://{h}")))
    };
    match (origin, referer) {
        (Some(origin), _) => ours(origin.trim()),
        (None, Some(referer)) => {
            // The origin of a URL is its scheme and authority: up to the first `/` after
            // `http://` (a URL of just an origin is allowed too).
            let referer = referer.trim();
            let Some(rest) = referer.get("http://".len()..) else {
                return false;
            };
            if !referer[.."http://".len()].eq_ignore_ascii_case("http://") {
                return false;
            }
            let end = rest.find(['/', '?', '#']).unwrap_or(rest.len());
            ours(&referer[..("http://".len() + end)])
        }
        (None, None) => false,
    }
}

/// True when a POST body says it is a form (`application/x-www-form-urlencoded`, with or
/// without parameters such as a charset).
pub fn is_form(content_type: Option<&str>) -> bool {
    content_type.is_some_and(|t| {
        t.split(';').next().is_some_and(|media| {
            media
                .trim()
                .eq_ignore_ascii_case("application/x-www-form-urlencoded")
        })
    })
}

/// Every value of cookie `name` in a `Cookie` header (`a=1; b=2`). There can be more than
/// one: a web server on another port of this machine may set a cookie of the same name
/// for 127.0.0.1 (cookies do not tell ports apart). The pass is checked against each, so
/// such a cookie can neither stand in for the pass nor hide it.
pub fn cookies<'a>(header: Option<&'a str>, name: &'a str) -> impl Iterator<Item = &'a str> {
    header
        .unwrap_or("")
        .split(';')
        .filter_map(|pair| pair.split_once('='))
        .filter(move |(key, _)| key.trim() == name)
        .map(|(_, value)| value.trim().trim_matches('"'))
}

/// The `Set-Cookie` value that hands the pass to a browser: not readable by scripts, never
/// sent with a request another site starts, gone when the browser closes.
pub fn pass_cookie(pass: &Secret) -> String {
    format!(
        "{PASS_COOKIE}={}; Path=/; HttpOnly; SameSite=Strict",
        pass.as_str()
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn secrets_are_long_random_and_compared_exactly() {
        let a = Secret::new();
        let b = Secret::new();
        assert_eq!(a.as_str().len(), 32);
        assert!(a.as_str().bytes().all(|c| c.is_ascii_hexdigit()));
        assert_ne!(a.as_str(), b.as_str(), "two secrets, two values");
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
    fn requests_other_sites_start_are_recognised() {
        // source: Fetch Metadata Request Headers (W3C), Sec-Fetch-Site values
        // "cross-site", "same-origin", "same-site", "none".
        assert!(site_allowed(None));
        assert!(site_allowed(Some("same-origin")));
        assert!(site_allowed(Some("none")));
        assert!(!site_allowed(Some("cross-site")));
        assert!(!site_allowed(Some("same-site")));
        assert!(!site_allowed(Some("")));
    }

    #[test]
    fn changes_must_name_this_server_by_origin_or_referer() {
        // source: RFC 6454 §7 for the Origin header ("null" for opaque origins); RFC 9110
        // §10.1.3 for Referer (an absolute URI).
        let allowed = loopback_hosts(9000);
        let ok = |o, r| change_origin_allowed(o, r, &allowed);
        assert!(ok(Some("http://127.0.0.1:9000"), None));
        assert!(ok(
            Some("http://LOCALHOST:9000"),
            Some("http://evil.example/")
        ));
        assert!(!ok(Some("null"), Some("http://127.0.0.1:9000/")));
        assert!(!ok(Some("http://evil.example"), None));
        assert!(!ok(Some("http://127.0.0.1:9001"), None));
        assert!(!ok(Some("https://127.0.0.1:9000"), None));
        // No Origin: the Referer decides.
        assert!(ok(None, Some("http://127.0.0.1:9000/picture/ab")));
        assert!(ok(None, Some("http://127.0.0.1:9000")));
        assert!(ok(None, Some("http://127.0.0.1:9000?x=1")));
        assert!(!ok(None, Some("http://127.0.0.1:9000.evil.example/")));
        assert!(!ok(None, Some("http://127.0.0.1:90001/")));
        assert!(!ok(
            None,
            Some("http://evil.example/http://127.0.0.1:9000/")
        ));
        assert!(!ok(None, Some("http://user@127.0.0.1:9000/")));
        assert!(!ok(None, Some("/picture/ab")));
        assert!(!ok(None, Some("http:/")));
        assert!(!ok(None, Some("")));
        assert!(!ok(None, None));
    }

    #[test]
    fn only_form_bodies_are_forms() {
        // source: HTML Living Standard, form submission: the default enctype
        // "application/x-www-form-urlencoded"; RFC 9110 §8.3.1 (media types are
        // case-insensitive, parameters follow ";").
        assert!(is_form(Some("application/x-www-form-urlencoded")));
        assert!(is_form(Some(
            "Application/X-WWW-Form-URLEncoded; charset=UTF-8"
        )));
        assert!(!is_form(Some("text/plain")));
        assert!(!is_form(Some("multipart/form-data; boundary=x")));
        assert!(!is_form(Some("application/x-www-form-urlencodedx")));
        assert!(!is_form(None));
    }

    #[test]
    fn the_pass_is_found_among_the_cookies_of_a_request() {
        // source: RFC 6265 §4.2.1, cookie-string = cookie-pair *( ";" SP cookie-pair ).
        let all = |h: Option<&str>| cookies(h, PASS_COOKIE).collect::<Vec<_>>().join(",");
        assert_eq!(all(Some("a=1; tagweave-pass=abc; b=2")), "abc");
        assert_eq!(all(Some("tagweave-pass=abc")), "abc");
        assert_eq!(all(Some("x-tagweave-pass=abc")), "");
        assert_eq!(all(Some("tagweave-pass=abc; tagweave-pass=def")), "abc,def");
        assert_eq!(all(Some("tagweave-pass")), "");
        assert_eq!(all(None), "");
        let pass = Secret::new();
        let set = pass_cookie(&pass);
        assert!(set.starts_with(&format!("{PASS_COOKIE}={};", pass.as_str())));
        assert!(set.contains("; HttpOnly") && set.contains("; SameSite=Strict"));
        assert!(set.contains("; Path=/"));
        assert!(!set.contains("Max-Age") && !set.contains("Expires"));
    }
}
