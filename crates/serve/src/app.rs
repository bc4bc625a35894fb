//! What each address answers. Kept apart from the HTTP server so every decision (which
//! route, which status, who may write) is plain code over plain values.

use std::collections::{BTreeSet, HashMap};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex, MutexGuard, OnceLock};
use std::time::{Duration, Instant};

use tagweave_collection::{misleading_char, normalize_tag, CrawlOptions, ItemRecord};
use tagweave_query::{Dispute, Queries, QueryError, Ranking};
use tagweave_store::Store;
use tagweave_writeback::{commit_plan, diff, original_path, Planner, TagChange};

use crate::guard::{
    change_origin_allowed, cookies, host_allowed, is_form, loopback_hosts, pass_cookie,
    site_allowed, Secret, PASS_COOKIE,
};
use crate::ids::PageIds;
use crate::pages::{self, Card, Page, Written, FROM_SUGGESTION};
use crate::renditions::{Rendition, Renditions};
use crate::text::{first, pairs, tag_words};
use crate::ServeError;

/// The request methods the pages use; anything else is refused with 405.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Method {
    Get,
    Head,
    Post,
    Other,
}

/// One request, as far as the app cares.
#[derive(Debug, Clone, Copy)]
pub struct Incoming<'a> {
    pub method: Method,
    /// The request target exactly as sent (path and query, not decoded).
    pub target: &'a str,
    pub host: Option<&'a str>,
    pub origin: Option<&'a str>,
    pub referer: Option<&'a str>,
    pub fetch_site: Option<&'a str>,
    pub cookie: Option<&'a str>,
    pub content_type: Option<&'a str>,
    pub body: &'a [u8],
}

/// One answer.
#[derive(Debug, Clone)]
pub struct Reply {
    pub status: u16,
    pub content_type: &'static str,
    pub body: Vec<u8>,
    /// Seconds a browser may keep it; `None`: never stored (pages carry the token).
    pub max_age: Option<u32>,
    /// For 303 answers.
    pub location: Option<String>,
    /// For 405 answers.
    pub allow: Option<&'static str>,
    /// Only on the answer to the one-time address: the pass.
    pub set_cookie: Option<String>,
    /// Seconds after which to ask again (answers about work still under way).
    pub retry_after: Option<u16>,
}

const HTML: &str = "text/html; charset=utf-8";
const CSS: &str = "text/css; charset=utf-8";
const JPEG: &str = "image/jpeg";
/// source: RFC 9239 §6 (text/javascript is the one type for scripts).
const JS: &str = "text/javascript; charset=utf-8";

/// Our own look, embedded in the binary.
const STYLE: &str = include_str!("assets/style.css");
/// The one-by-one page's keys and in-place decisions, embedded too; the page works
/// without it.
const SCRIPT: &str = include_str!("assets/queue.js");

/// Pictures in a grid unless the address asks for another number.
const GRID: usize = 24;
const GRID_MAX: usize = 200;
/// Suggestions listed on a picture's page.
const SUGGESTIONS: usize = 8;
/// Review-queue entries per page.
const QUEUE_PAGE: usize = 20;
/// Longest tag accepted from a form (in characters).
const TAG_MAX: usize = 100;
/// Most tags one form may accept together (a picture lists `SUGGESTIONS`).
const TAGS_AT_ONCE: usize = 32;
/// A tagged picture joins the one-by-one walk when a tag it does not carry gets at least
/// this strength.
const PROPOSE_AT: f32 = 0.5;
/// The accept-all threshold before a person moves it, in hundredths.
const ABOVE: u32 = 70;

impl Reply {
    pub(crate) fn new(status: u16, content_type: &'static str, body: Vec<u8>) -> Reply {
        Reply {
            status,
            content_type,
            body,
            max_age: None,
            location: None,
            allow: None,
            set_cookie: None,
            retry_after: None,
        }
    }
}

/// How long a request waits for the review queue or the walk being worked out in the
/// background before it answers "being worked out" (well inside a connection's 30 s).
const WAIT_FOR_BACKGROUND: Duration = Duration::from_secs(10);
/// Seconds after which a "being worked out" page reloads itself.
const ASK_AGAIN_AFTER: u16 = 10;

/// What `cell` holds once it holds something, waiting at most `limit`.
fn wait_for<T>(cell: &OnceLock<T>, limit: Duration) -> Option<&T> {
    let started = Instant::now();
    loop {
        if let Some(value) = cell.get() {
            return Some(value);
        }
        if started.elapsed() >= limit {
            return None;
        }
        std::thread::sleep(Duration::from_millis(20));
    }
}

/// What happened to one picture during this run of the server.
#[derive(Debug, Default)]
struct PictureNotes {
    /// Normalised tags written into its sidecars.
    added: BTreeSet<String>,
    /// Normalised tags taken out of its sidecars.
    removed: BTreeSet<String>,
    /// Suggestions or doubts set aside (nothing written).
    set_aside: BTreeSet<String>,
}

/// The running review page.
pub(crate) struct App {
    /// The store's folder. The store itself is opened only to write one decision (its
    /// lock keeps a scan from reading sidecars mid-change), so other tagweave commands
    /// work beside the page.
    store_dir: PathBuf,
    queries: Queries,
    root: PathBuf,
    /// Each row's page id (see [`crate::ids`]), and back.
    page_ids: Vec<String>,
    row_of_id: HashMap<String, usize>,
    row_of_path: HashMap<String, usize>,
    /// The one-time key of the printed address, and whether it was spent.
    entry_key: Secret,
    entry_spent: AtomicBool,
    /// The cookie every request must carry.
    pass: Secret,
    token: Secret,
    read_only: bool,
    hosts: Vec<String>,
    renditions: Renditions,
    audit: OnceLock<Result<Vec<Dispute>, String>>,
    /// The one-by-one walk, kept in its order for the run.
    walk: OnceLock<Result<Walk, String>>,
    /// Whether the review queue and the walk are worked out in the background (else on
    /// first use).
    in_background: AtomicBool,
    /// What was done to each picture (by id) since this server started. Its lock also
    /// serialises writes, so two clicks never plan from the same old bytes.
    notes: Mutex<HashMap<String, PictureNotes>>,
}

/// The pictures of the one-by-one walk, as rows: the untagged ones first.
struct Walk {
    rows: Vec<usize>,
    untagged: usize,
}

/// The order of the one-by-one walk: untagged pictures in index order, then tagged ones
/// whose strongest suggestion of a tag they do not carry reaches [`PROPOSE_AT`], strongest
/// first (ties in index order). `strongest_other[r]` is read for tagged rows only.
fn walk_order(tagged: &[bool], strongest_other: &[f32]) -> Walk {
    let mut rows: Vec<usize> = (0..tagged.len()).filter(|&r| !tagged[r]).collect();
    let untagged = rows.len();
    let mut partly: Vec<usize> = (0..tagged.len())
        .filter(|&r| tagged[r] && strongest_other[r] >= PROPOSE_AT)
        .collect();
    partly.sort_by(|&a, &b| strongest_other[b].total_cmp(&strongest_other[a]));
    rows.extend(partly);
    Walk { rows, untagged }
}

/// A routed request that needs an indexed picture.
enum PictureRoute {
    Page,
    Thumbnail,
    Large,
    Like,
    Tags,
    SetAside,
}

impl App {
    pub(crate) fn new(
        store: &Store,
        queries: Queries,
        ids: PageIds,
        port: u16,
        read_only: bool,
    ) -> Result<App, QueryError> {
        let root = store.collection_root().to_path_buf();
        let items = queries.items().all()?;
        let page_ids: Vec<String> = items.iter().map(|item| ids.of(&item.rel_path)).collect();
        let row_of_id = page_ids
            .iter()
            .enumerate()
            .map(|(i, id)| (id.clone(), i))
            .collect();
        let row_of_path = items
            .iter()
            .enumerate()
            .map(|(i, item)| (item.rel_path.clone(), i))
            .collect();
        Ok(App {
            renditions: Renditions::new(&root, store.dir()),
            root,
            page_ids,
            row_of_id,
            row_of_path,
            entry_key: Secret::new(),
            entry_spent: AtomicBool::new(false),
            pass: Secret::new(),
            token: Secret::new(),
            read_only,
            hosts: loopback_hosts(port),
            audit: OnceLock::new(),
            walk: OnceLock::new(),
            in_background: AtomicBool::new(false),
            notes: Mutex::new(HashMap::new()),
            store_dir: store.dir().to_path_buf(),
            queries,
        })
    }

    /// The path of the one-time address `serve` prints.
    pub(crate) fn entry_path(&self) -> String {
        format!("/open/{}", self.entry_key.as_str())
    }

    pub fn respond(&self, request: &Incoming) -> Reply {
        if !host_allowed(request.host, &self.hosts) {
            return self.refusal(
                403,
                "Unknown host",
                "This review page answers only to 127.0.0.1, localhost or [::1] with its own \
                 port in the address. Open the address `tagweave serve` printed.",
            );
        }
        if !site_allowed(request.fetch_site) {
            return self.refusal(
                403,
                "Refused",
                "Another site (or another program on another port of this machine) asked \
                 for this page. Open the address `tagweave serve` printed.",
            );
        }
        let (path, query) = request
            .target
            .split_once('?')
            .unwrap_or((request.target, ""));
        let has_pass =
            cookies(request.cookie, PASS_COOKIE).any(|offered| self.pass.matches(offered));
        if let Some(key) = path.strip_prefix("/open/") {
            return self.open(request, key, has_pass);
        }
        if !has_pass {
            return self.refusal(
                403,
                "Open the printed address",
                "This review page lets in only the browser that opened the address \
                 `tagweave serve` printed when it started. That address works once; if it \
                 was used by another browser, or this browser was closed since, stop \
                 `tagweave serve` and start it again for a new one.",
            );
        }
        let Some(path) = path.strip_prefix('/') else {
            return self.not_found();
        };
        let segments: Vec<&str> = path.split('/').collect();
        let query = pairs(query);
        match segments.as_slice() {
            [""] => self.get_only(request, || self.search(&query)),
            ["review"] => self.get_only(request, || self.review(&query)),
            ["one-by-one"] => self.get_only(request, || self.one_by_one(&query, false)),
            ["one-by-one", "part"] => self.get_only(request, || self.one_by_one(&query, true)),
            ["style.css"] => self.get_only(request, || asset(CSS, STYLE)),
            ["queue.js"] => self.get_only(request, || asset(JS, SCRIPT)),
            ["picture", id] => self.picture_route(request, id, PictureRoute::Page, &query),
            ["picture", id, "thumbnail"] => {
                self.picture_route(request, id, PictureRoute::Thumbnail, &query)
            }
            ["picture", id, "large"] => {
                self.picture_route(request, id, PictureRoute::Large, &query)
            }
            ["picture", id, "like"] => self.picture_route(request, id, PictureRoute::Like, &query),
            ["picture", id, "tags"] => self.picture_route(request, id, PictureRoute::Tags, &query),
            ["picture", id, "set-aside"] => {
                self.picture_route(request, id, PictureRoute::SetAside, &query)
            }
            _ => self.not_found(),
        }
    }

    /// The one-time address: the first browser to open it gets the pass, and the key is
    /// spent. A browser that has the pass already is sent on to the search page.
    fn open(&self, request: &Incoming, key: &str, has_pass: bool) -> Reply {
        if request.method != Method::Get {
            // Not HEAD either: a link preview must not spend the key.
            let mut reply = self.refusal(405, "Not here", "This address answers only GET.");
            reply.allow = Some("GET");
            return reply;
        }
        let mut reply = Reply::new(303, HTML, Vec::new());
        reply.location = Some("/".to_string());
        if has_pass {
            return reply;
        }
        let fresh = self.entry_key.matches(key)
            && self
                .entry_spent
                .compare_exchange(false, true, Ordering::SeqCst, Ordering::SeqCst)
                .is_ok();
        if !fresh {
            return self.refusal(
                403,
                "Address already used",
                "This address works once, and it was used (or it is not the one `tagweave \
                 serve` printed). Stop `tagweave serve` and start it again for a new one.",
            );
        }
        reply.set_cookie = Some(pass_cookie(&self.pass));
        reply
    }

    /// The answer to a request the HTTP layer could not take (malformed, too large, or
    /// too many at once).
    pub(crate) fn refused(&self, status: u16) -> Reply {
        let text = if status == 503 {
            "Too many connections at once; reload the page in a moment."
        } else {
            "The review page takes small requests from a browser only."
        };
        self.refusal(status, "Request refused", text)
    }

    fn get_only(&self, request: &Incoming, answer: impl FnOnce() -> Reply) -> Reply {
        match request.method {
            Method::Get | Method::Head => answer(),
            _ => self.wrong_method("GET, HEAD"),
        }
    }

    fn wrong_method(&self, allow: &'static str) -> Reply {
        let mut reply = self.message(
            405,
            "Not here",
            &format!("This address answers only {allow}."),
        );
        reply.allow = Some(allow);
        reply
    }

    fn picture_route(
        &self,
        request: &Incoming,
        id: &str,
        route: PictureRoute,
        query: &[(String, String)],
    ) -> Reply {
        let writes = matches!(route, PictureRoute::Tags | PictureRoute::SetAside);
        if writes {
            if request.method != Method::Post {
                return self.wrong_method("POST");
            }
            if let Some(refusal) = self.refuse_change(request) {
                return refusal;
            }
        } else if !matches!(request.method, Method::Get | Method::Head) {
            return self.wrong_method("GET, HEAD");
        }
        let Some(row) = self.row_of(id) else {
            return self.not_found();
        };
        match route {
            PictureRoute::Page => self.picture(row),
            PictureRoute::Thumbnail => self.jpeg(row, Rendition::Thumbnail),
            PictureRoute::Large => self.jpeg(row, Rendition::Large),
            PictureRoute::Like => self.like(row, query),
            PictureRoute::Tags => self.change_tags(row, &form(request.body)),
            PictureRoute::SetAside => self.set_aside(row, &form(request.body)),
        }
    }

    /// Why a change request may not go ahead, if it may not.
    fn refuse_change(&self, request: &Incoming) -> Option<Reply> {
        if !is_form(request.content_type) {
            return Some(self.message(
                415,
                "Not a form",
                "A change must be sent by a form of this review page \
                 (application/x-www-form-urlencoded).",
            ));
        }
        if self.read_only {
            return Some(self.message(
                403,
                "Read-only",
                "This review page was started with --read-only: it changes nothing. Start \
                 `tagweave serve` without --read-only to accept or remove tags.",
            ));
        }
        let form = form(request.body);
        let token_ok = first(&form, "token").is_some_and(|t| self.token.matches(t));
        if !token_ok || !change_origin_allowed(request.origin, request.referer, &self.hosts) {
            return Some(self.message(
                403,
                "Refused",
                "A change must come from a form of this review page (it carries this \
                 run's token). Reload the page and try again; a page from another \
                 site cannot change your tags.",
            ));
        }
        None
    }

    /// The row of an indexed picture by its page id: exactly 16 lower-case hex digits, and
    /// known.
    fn row_of(&self, id: &str) -> Option<usize> {
        let well_formed =
            id.len() == 16 && id.bytes().all(|b| matches!(b, b'0'..=b'9' | b'a'..=b'f'));
        if !well_formed {
            return None;
        }
        self.row_of_id.get(id).copied()
    }

    /// Every picture, by row: the page's queries hold them all (read in [`App::new`]).
    fn items(&self) -> &[ItemRecord] {
        self.queries.items().loaded().unwrap_or_default()
    }

    /// How many pictures carry tags (counted once, at the first asking).
    fn tagged_count(&self) -> usize {
        self.queries.items().tagged_rows().map_or(0, <[usize]>::len)
    }

    fn item(&self, row: usize) -> &ItemRecord {
        &self.items()[row]
    }

    fn page(&self, status: u16, page: Page) -> Reply {
        let root = self.root.display().to_string();
        let html = pages::layout(&page, self.read_only, Some(&root));
        Reply::new(status, HTML, html.into_bytes())
    }

    /// A refusal to someone who may not be let in: it says nothing about the collection.
    fn refusal(&self, status: u16, title: &str, text: &str) -> Reply {
        let page = Page {
            title: title.to_string(),
            body: pages::message(title, text),
        };
        let html = pages::layout(&page, false, None);
        Reply::new(status, HTML, html.into_bytes())
    }

    fn message(&self, status: u16, title: &str, text: &str) -> Reply {
        self.page(
            status,
            Page {
                title: title.to_string(),
                body: pages::message(title, text),
            },
        )
    }

    fn not_found(&self) -> Reply {
        self.message(
            404,
            "Not found",
            "Nothing here. Pictures are shown by the id of an indexed picture; start from the \
             search page.",
        )
    }

    fn failed(&self, error: &dyn std::fmt::Display) -> Reply {
        self.message(500, "Something went wrong", &error.to_string())
    }

    fn notes(&self) -> MutexGuard<'_, HashMap<String, PictureNotes>> {
        self.notes.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// The picture's tags as they stand in its sidecars now: indexed tags with the writes
    /// made since this page started applied. The flag marks tags written since then.
    fn tags_now(&self, row: usize, notes: Option<&PictureNotes>) -> Vec<(String, bool)> {
        let item = self.item(row);
        let mut tags: Vec<(String, bool)> = item
            .tags
            .iter()
            .filter(|t| notes.is_none_or(|n| !n.removed.contains(*t)))
            .map(|t| (t.clone(), false))
            .collect();
        if let Some(notes) = notes {
            for t in &notes.added {
                if !item.tags.contains(t) {
                    tags.push((t.clone(), true));
                }
            }
        }
        tags
    }

    fn card(&self, row: usize, badge: Option<&'static str>, similarity: Option<f32>) -> Card {
        let item = self.item(row);
        Card {
            id: self.page_ids[row].clone(),
            picture: item.rel_path.clone(),
            badge,
            untagged: item.tags.is_empty(),
            similarity,
        }
    }

    fn search(&self, query: &[(String, String)]) -> Reply {
        let typed = first(query, "q").unwrap_or("").trim().to_string();
        let untagged_only = first(query, "untagged").is_some_and(|v| !v.is_empty());
        let limit = limit_of(query);
        let vocabulary = self.queries.vocabulary();
        let tagged = self.tagged_count();
        let mut content = pages::SearchContent {
            typed: typed.clone(),
            untagged_only,
            vocabulary,
            pictures: self.items().len(),
            tagged,
            problem: None,
            cards: None,
        };
        let tags = tag_words(&typed);
        if tags.is_empty() {
            return self.page(200, pages::search(&content));
        }
        let ranking = Ranking {
            limit,
            untagged_only,
            exact: false,
        };
        match self.queries.find(&tags, ranking) {
            Ok(found) => {
                let cards = found
                    .iter()
                    .filter_map(|f| {
                        let row = *self.row_of_path.get(&f.picture)?;
                        let badge = if f.carries { "carries" } else { "inferred" };
                        Some(self.card(row, Some(badge), Some(f.similarity)))
                    })
                    .collect();
                content.cards = Some(cards);
                self.page(200, pages::search(&content))
            }
            Err(error @ (QueryError::UnknownTags { .. } | QueryError::NoTags)) => {
                content.problem = Some(error.to_string());
                self.page(400, pages::search(&content))
            }
            Err(error) => self.failed(&error),
        }
    }

    fn like(&self, row: usize, query: &[(String, String)]) -> Reply {
        let away = tag_words(first(query, "away").unwrap_or(""));
        let toward = tag_words(first(query, "toward").unwrap_or(""));
        let start = self.card(row, None, None);
        let mut content = pages::LikeContent {
            start,
            away: away.clone(),
            toward: toward.clone(),
            vocabulary: self.queries.vocabulary(),
            problem: None,
            cards: Vec::new(),
        };
        if away.is_empty() && toward.is_empty() {
            content.problem =
                Some("Say what to change: tags to move away from, toward, or both.".into());
            return self.page(400, pages::like(&content));
        }
        let ranking = Ranking {
            limit: limit_of(query),
            ..Ranking::default()
        };
        match self.queries.shift(row, &away, &toward, ranking) {
            Ok(found) => {
                content.cards = found
                    .iter()
                    .filter_map(|f| {
                        let r = *self.row_of_path.get(&f.picture)?;
                        let badge = if toward.is_empty() {
                            None
                        } else if f.carries {
                            Some("carries")
                        } else {
                            Some("inferred")
                        };
                        Some(self.card(r, badge, Some(f.similarity)))
                    })
                    .collect();
                self.page(200, pages::like(&content))
            }
            Err(error @ (QueryError::UnknownTags { .. } | QueryError::NoTags)) => {
                content.problem = Some(error.to_string());
                self.page(400, pages::like(&content))
            }
            Err(error) => self.failed(&error),
        }
    }

    fn picture(&self, row: usize) -> Reply {
        match self.picture_content(row) {
            Ok(content) => self.page(200, pages::picture(&content)),
            Err(reply) => reply,
        }
    }

    /// A picture as it stands now: its tags (with this run's writes), its suggestions
    /// (less those set aside), and how far to trust their numbers.
    fn picture_content(&self, row: usize) -> Result<pages::PictureContent<'_>, Reply> {
        let item = self.item(row);
        let (probabilities, shares) = match self.queries.suggest_and_shares(&[row]) {
            Ok((p, s)) => (p.row(0).to_vec(), s.row(0).to_vec()),
            Err(error) => return Err(self.failed(&error)),
        };
        let vocabulary = self.queries.vocabulary();
        let share_of = |tag: &str| {
            vocabulary
                .iter()
                .position(|t| t == tag)
                .and_then(|c| shares.get(c).copied())
        };
        let notes_by_id = self.notes();
        let notes = notes_by_id.get(&item.id);
        let now = self.tags_now(row, notes);
        let carried: Vec<String> = now.iter().map(|(t, _)| t.clone()).collect();
        let suggestions = self
            .queries
            .tag_scores(&probabilities, &carried)
            .into_iter()
            .filter(|s| !s.carried && notes.is_none_or(|n| !n.set_aside.contains(&s.tag)))
            .take(SUGGESTIONS)
            .map(|s| (s.tag, s.probability))
            .collect();
        let content = pages::PictureContent {
            id: self.page_ids[row].clone(),
            picture: item.rel_path.clone(),
            sidecars: item.sidecars.iter().map(|s| s.rel_path.clone()).collect(),
            tags: now
                .into_iter()
                .map(|(tag, written)| {
                    let share = share_of(&tag);
                    (tag, written, share)
                })
                .collect(),
            suggestions,
            calibrated: self.queries.calibrated(Some(row)),
            unlike_collection: self
                .queries
                .familiarity_of_rows(&[row])
                .is_ok_and(|f| f.first().is_some_and(|f| f.unlike_collection)),
            vocabulary,
            token: self.writable_token(),
            changed: notes.is_some_and(|n| !n.added.is_empty() || !n.removed.is_empty()),
        };
        drop(notes_by_id);
        Ok(content)
    }

    /// Starts working out the review queue, then the one-by-one walk, on a thread of its
    /// own, for requests to find ready (at a million pictures each takes minutes, past any
    /// connection's limit). Without a thread to be had, the first request works each out.
    pub(crate) fn work_out_in_background(app: &Arc<App>) {
        app.in_background.store(true, Ordering::Release);
        let worker = Arc::clone(app);
        let spawned = std::thread::Builder::new()
            .name("tagweave-review-work".into())
            .spawn(move || {
                worker.disputes_now();
                worker.walk_now();
            });
        if spawned.is_err() {
            app.in_background.store(false, Ordering::Release);
        }
    }

    /// `cell` once worked out: by the background work when it runs (waiting up to
    /// [`WAIT_FOR_BACKGROUND`], `None` after that), else here and now.
    fn when_ready<'a, T>(
        &'a self,
        cell: &'a OnceLock<T>,
        now: impl FnOnce() -> &'a T,
    ) -> Option<&'a T> {
        if self.in_background.load(Ordering::Acquire) {
            wait_for(cell, WAIT_FOR_BACKGROUND)
        } else {
            Some(now())
        }
    }

    /// The answer while the background work is not done: a page that reloads itself.
    fn being_worked_out(&self, what: &str) -> Reply {
        let tagged = self.tagged_count();
        let mut reply = self.message(
            503,
            &format!("The {what} is being worked out"),
            &format!(
                "tagweave is judging the collection's {tagged} tagged pictures for it, which \
                 takes a while in a large collection. This page reloads itself every \
                 {ASK_AGAIN_AFTER} seconds until it is ready; searching and picture pages \
                 work meanwhile."
            ),
        );
        reply.retry_after = Some(ASK_AGAIN_AFTER);
        reply
    }

    fn walk(&self) -> Option<&Result<Walk, String>> {
        self.when_ready(&self.walk, || self.walk_now())
    }

    fn walk_now(&self) -> &Result<Walk, String> {
        self.walk.get_or_init(|| {
            let items = self.items();
            let tagged: Vec<bool> = items.iter().map(|i| !i.tags.is_empty()).collect();
            let rows: Vec<usize> = (0..items.len()).filter(|&r| tagged[r]).collect();
            let mut strongest = vec![0.0; items.len()];
            if !rows.is_empty() {
                let probabilities = self
                    .queries
                    .suggest_rows(&rows)
                    .map_err(|e| e.to_string())?;
                for (&row, p) in rows.iter().zip(probabilities.outer_iter()) {
                    strongest[row] = self
                        .queries
                        .tag_scores(&p.to_vec(), &items[row].tags)
                        .into_iter()
                        .find(|s| !s.carried)
                        .map_or(0.0, |s| s.probability);
                }
            }
            Ok(walk_order(&tagged, &strongest))
        })
    }

    /// The one-by-one walk at the place the address asks for (`at`, from 1): the whole
    /// page, or (`part`) just the picture's fragment for the page's script.
    fn one_by_one(&self, query: &[(String, String)], part: bool) -> Reply {
        let walk = match self.walk() {
            Some(Ok(w)) => w,
            Some(Err(error)) => return self.failed(error),
            None => return self.being_worked_out("one-by-one walk"),
        };
        let calibrated = self.queries.all_calibrated();
        let above = first(query, "above")
            .and_then(|typed| pages::threshold_from(typed, calibrated))
            .unwrap_or(ABOVE);
        let total = walk.rows.len();
        let at = first(query, "at")
            .and_then(|a| a.parse::<usize>().ok())
            .unwrap_or(1)
            .clamp(1, total.max(1));
        let current = match walk.rows.get(at - 1) {
            Some(&row) => match self.picture_content(row) {
                Ok(mut content) => {
                    // One kind of number along the whole walk, so the threshold keeps
                    // its meaning from picture to picture.
                    content.calibrated = calibrated;
                    let step = pages::Step {
                        at,
                        total,
                        untagged: at <= walk.untagged,
                        above,
                    };
                    Some((content, step))
                }
                Err(reply) => return reply,
            },
            None => None,
        };
        if part {
            return match current {
                Some((content, step)) => {
                    Reply::new(200, HTML, pages::one_part(&content, &step).into_bytes())
                }
                None => self.not_found(),
            };
        }
        let content = pages::OneByOneContent {
            untagged: walk.untagged,
            partly: total - walk.untagged,
            current,
        };
        self.page(200, pages::one_by_one(&content))
    }

    /// After a decision sent by the one-by-one page's script (`answer=part`): the
    /// picture's fragment as it stands now, instead of a page to go back from.
    fn fragment_after(&self, row: usize, form: &[(String, String)]) -> Option<Reply> {
        if first(form, "answer") != Some("part") {
            return None;
        }
        let walk = self.walk()?.as_ref().ok()?;
        let at = walk.rows.iter().position(|&r| r == row)? + 1;
        let mut query = vec![("at".to_string(), at.to_string())];
        if let Some(above) = first(form, "above") {
            query.push(("above".to_string(), above.to_string()));
        }
        Some(self.one_by_one(&query, true))
    }

    /// The token to put in forms, or `None` when the page must offer no changes.
    fn writable_token(&self) -> Option<&str> {
        (!self.read_only).then(|| self.token.as_str())
    }

    fn disputes(&self) -> Option<&Result<Vec<Dispute>, String>> {
        self.when_ready(&self.audit, || self.disputes_now())
    }

    fn disputes_now(&self) -> &Result<Vec<Dispute>, String> {
        self.audit.get_or_init(|| {
            self.queries
                .audit()
                .map(|audit| audit.queue)
                .map_err(|e| e.to_string())
        })
    }

    fn review(&self, query: &[(String, String)]) -> Reply {
        let disputes = match self.disputes() {
            Some(Ok(d)) => d,
            Some(Err(error)) => return self.failed(error),
            None => return self.being_worked_out("review queue"),
        };
        let flagged: Vec<&Dispute> = disputes.iter().filter(|d| !d.disputed.is_empty()).collect();
        let pages_total = flagged.len().div_ceil(QUEUE_PAGE).max(1);
        let page = first(query, "page")
            .and_then(|p| p.parse::<usize>().ok())
            .unwrap_or(1)
            .clamp(1, pages_total);
        let notes_by_id = self.notes();
        let entries = flagged
            .iter()
            .enumerate()
            .skip((page - 1) * QUEUE_PAGE)
            .take(QUEUE_PAGE)
            .filter_map(|(rank, d)| {
                let row = *self.row_of_path.get(&d.picture)?;
                let item = self.item(row);
                let notes = notes_by_id.get(&item.id);
                let acted = |tag: &str| {
                    notes.is_some_and(|n| {
                        n.added.contains(tag)
                            || n.removed.contains(tag)
                            || n.set_aside.contains(tag)
                    })
                };
                Some(pages::QueueEntry {
                    rank: rank + 1,
                    card: self.card(row, None, None),
                    doubtful: d
                        .disputed
                        .iter()
                        .filter(|t| !acted(&t.tag))
                        .map(|t| (t.tag.clone(), t.neighbours_carrying, t.with_its_other_tags))
                        .collect(),
                    proposed: d
                        .proposed
                        .iter()
                        .filter(|t| !acted(&t.tag))
                        .map(|t| (t.tag.clone(), t.probability))
                        .collect(),
                    changed: notes.is_some_and(|n| !n.added.is_empty() || !n.removed.is_empty()),
                })
            })
            .collect();
        drop(notes_by_id);
        let content = pages::QueueContent {
            judged: disputes.len(),
            flagged: flagged.len(),
            page,
            pages: pages_total,
            entries,
            calibrated: self.queries.all_calibrated(),
            token: self.writable_token(),
        };
        self.page(200, pages::review(&content))
    }

    fn jpeg(&self, row: usize, size: Rendition) -> Reply {
        match self.renditions.jpeg(self.item(row), size) {
            Ok(bytes) => {
                let mut reply = Reply::new(200, JPEG, bytes);
                reply.max_age = Some(3600);
                reply
            }
            Err(error @ ServeError::PictureGone { .. }) => {
                self.message(404, "Picture gone", &error.to_string())
            }
            Err(error) => self.failed(&error),
        }
    }

    /// Writes accepted tags (one, or several accepted together) or one removed tag into
    /// the picture's sidecars, the way `apply` does, and shows what was written.
    fn change_tags(&self, row: usize, form: &[(String, String)]) -> Reply {
        let item = self.item(row);
        let values = |name: &str| -> Vec<&str> {
            form.iter()
                .filter(|(k, _)| k == name)
                .map(|(_, v)| v.trim())
                .filter(|t| !t.is_empty())
                .collect()
        };
        let (add, remove) = (values("add"), values("remove"));
        let (spellings, adding) = match (add.len(), remove.len()) {
            (1..=TAGS_AT_ONCE, 0) => (add, true),
            (0, 1) => (remove, false),
            _ => {
                return self.message(
                    400,
                    "Which tag?",
                    &format!(
                        "Send one tag to remove, or 1 to {TAGS_AT_ONCE} tags to add, \
                         and not both."
                    ),
                )
            }
        };
        let mut normals: Vec<String> = Vec::new();
        for spelling in &spellings {
            let normal = match normalize_tag(spelling) {
                Some(n) if n.chars().count() <= TAG_MAX => n,
                _ => {
                    return self.message(
                        400,
                        "Not a tag",
                        &format!("A tag has 1 to {TAG_MAX} characters besides spaces."),
                    )
                }
            };
            if let Some(refusal) = self.refuse_misleading(spelling) {
                return refusal;
            }
            if !normals.contains(&normal) {
                normals.push(normal);
            }
        }
        let spellings: Vec<String> = spellings.iter().map(|t| t.to_string()).collect();
        // Accepting what the page suggested is marked as such in the sidecar; a tag typed in
        // ("a tag of your own") is the person's.
        let suggested = first(form, "from") == Some(FROM_SUGGESTION);
        let change = TagChange {
            picture: item.rel_path.clone(),
            add: if adding && !suggested {
                spellings.clone()
            } else {
                Vec::new()
            },
            accept: if adding && suggested {
                spellings.clone()
            } else {
                Vec::new()
            },
            remove: if adding { Vec::new() } else { spellings },
        };
        let mut notes_by_id = self.notes();
        if let Some(link) = self.linked_sidecar(item) {
            let target = std::fs::read_link(self.root.join(&link))
                .map(|t| t.display().to_string())
                .unwrap_or_else(|_| "somewhere unreadable".to_string());
            return self.message(
                409,
                "Not written",
                &format!(
                    "The sidecar {link} is a symbolic link (to {target}), not a file. Tags are \
                     written only into files inside the collection, never through a link, \
                     and writing beside it would start a second sidecar. Replace the link \
                     with the file it points to, then run `tagweave scan`."
                ),
            );
        }
        // Held from planning to the index's refresh, as `apply` holds it.
        let store = match Store::open_briefly(&self.store_dir, tagweave_store::PATIENCE) {
            Ok(store) => store,
            Err(error) => {
                return self.message(503, "Not written, the index is busy", &error.to_string())
            }
        };
        let planned = Planner::new(
            &self.root,
            &CrawlOptions {
                skip_dirs: vec![self.store_dir.clone()],
                ..CrawlOptions::default()
            },
        )
        .and_then(|planner| planner.plan(&change));
        let plan = match planned {
            // A picture the index knows sidecars of must not get a new one (its old tags
            // would drop out at the next scan).
            Ok(plan) if !item.sidecars.is_empty() && plan.edits.iter().any(|e| e.created) => {
                return self.message(
                    409,
                    "Not written",
                    &format!(
                        "The sidecars of {} changed since the last scan ({} no longer \
                         found as its sidecar). Run `tagweave scan`, then try again.",
                        item.rel_path,
                        item.sidecars
                            .iter()
                            .map(|s| s.rel_path.as_str())
                            .collect::<Vec<_>>()
                            .join(", ")
                    ),
                )
            }
            planned => planned,
        };
        let plan = match plan.and_then(|plan| commit_plan(&plan).map(|()| plan)) {
            Ok(plan) => plan,
            Err(error) => return self.message(409, "Not written", &error.to_string()),
        };
        // The next query from any terminal sees the new tags without a scan.
        let indexed = plan.is_empty()
            || tagweave_indexer::refresh_records(&store, std::slice::from_ref(&item.rel_path))
                .is_ok_and(|refreshed| refreshed == 1);
        drop(store);
        let notes = notes_by_id.entry(item.id.clone()).or_default();
        for normal in &normals {
            if adding {
                notes.removed.remove(normal);
                notes.added.insert(normal.clone());
            } else {
                notes.added.remove(normal);
                notes.removed.insert(normal.clone());
            }
        }
        drop(notes_by_id);
        if let Some(reply) = self.fragment_after(row, form) {
            return reply;
        }
        let written = Written {
            card: self.card(row, None, None),
            tags: normals,
            adding,
            edits: plan
                .edits
                .iter()
                .map(|e| pages::WrittenFile {
                    sidecar: e.sidecar_rel.clone(),
                    created: e.created,
                    original: (!e.created).then(|| {
                        original_path(std::path::Path::new(&e.sidecar_rel))
                            .to_string_lossy()
                            .into_owned()
                    }),
                    diff: diff(e),
                })
                .collect(),
            already: !plan.already_present.is_empty() || !plan.not_present.is_empty(),
            indexed,
            inside_picture: plan
                .not_present
                .iter()
                .filter(|tag| !adding && item.tags.contains(tag))
                .cloned()
                .collect(),
            back: back_link(form, &self.page_ids[row]),
        };
        self.page(200, pages::written(&written))
    }

    /// Sets a suggestion or doubt aside until this page stops (nothing is written), then
    /// goes back to the page the button was on.
    fn set_aside(&self, row: usize, form: &[(String, String)]) -> Reply {
        let item = self.item(row);
        let Some(tag) = first(form, "tag").and_then(normalize_tag) else {
            return self.message(400, "Which tag?", "Send the tag to set aside.");
        };
        if let Some(refusal) = self.refuse_misleading(&tag) {
            return refusal;
        }
        self.notes()
            .entry(item.id.clone())
            .or_default()
            .set_aside
            .insert(tag);
        if let Some(reply) = self.fragment_after(row, form) {
            return reply;
        }
        let mut reply = Reply::new(303, HTML, Vec::new());
        reply.location = Some(back_link(form, &self.page_ids[row]));
        reply
    }
}

impl App {
    /// A sidecar of the picture that is a symbolic link now: one the scan indexed, or a
    /// file name a sidecar of it would have (`STEM.txt`, `NAME.EXT.xmp`, … in any case).
    fn linked_sidecar(&self, item: &ItemRecord) -> Option<String> {
        let is_link = |rel: &str| {
            std::fs::symlink_metadata(self.root.join(rel)).is_ok_and(|m| m.file_type().is_symlink())
        };
        if let Some(s) = item.sidecars.iter().find(|s| is_link(&s.rel_path)) {
            return Some(s.rel_path.clone());
        }
        let picture = Path::new(&item.rel_path);
        let name = picture.file_name()?.to_str()?;
        let stem = picture.file_stem()?.to_str()?;
        let folder = self.root.join(picture.parent().unwrap_or(Path::new("")));
        let sidecar_name = |file: &str| {
            let (base, ext) = file.rsplit_once('.')?;
            let ours = base == name || base == stem;
            (ours && (ext.eq_ignore_ascii_case("txt") || ext.eq_ignore_ascii_case("xmp")))
                .then_some(())
        };
        std::fs::read_dir(&folder)
            .ok()?
            .filter_map(Result::ok)
            .filter(|e| e.file_type().is_ok_and(|t| t.is_symlink()))
            .filter_map(|e| e.file_name().into_string().ok())
            .find(|file| sidecar_name(file).is_some())
            .map(|file| match picture.parent().and_then(Path::to_str) {
                Some(p) if !p.is_empty() => format!("{p}/{file}"),
                _ => file,
            })
    }

    /// Refuses a tag with a character that would make it show as something it is not.
    fn refuse_misleading(&self, tag: &str) -> Option<Reply> {
        let c = misleading_char(tag)?;
        Some(self.message(
            400,
            "Not a tag",
            &format!(
                "The tag contains U+{:04X}, an invisible character that changes how text \
                 is shown (or none that text should carry). Type the tag without it.",
                c as u32
            ),
        ))
    }
}

/// One of our embedded files, which a browser may keep for an hour.
fn asset(content_type: &'static str, text: &str) -> Reply {
    let mut reply = Reply::new(200, content_type, text.as_bytes().to_vec());
    reply.max_age = Some(3600);
    reply
}

fn form(body: &[u8]) -> Vec<(String, String)> {
    pairs(&String::from_utf8_lossy(body))
}

fn limit_of(query: &[(String, String)]) -> usize {
    first(query, "limit")
        .and_then(|l| l.parse::<usize>().ok())
        .unwrap_or(GRID)
        .clamp(1, GRID_MAX)
}

/// Where a form's "back" goes: the review queue (at its page), the one-by-one walk (at
/// its place) or the picture's page. Built from a fixed word, a number and the id, never
/// echoed from the request.
fn back_link(form: &[(String, String)], id: &str) -> String {
    let number = |name: &str| {
        first(form, name)
            .and_then(|p| p.parse::<usize>().ok())
            .unwrap_or(1)
    };
    match first(form, "back") {
        Some("one-by-one") => format!("/one-by-one?at={}", number("at")),
        Some("review") => format!("/review?page={}", number("page")),
        _ => format!("/picture/{id}"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_request_waits_for_background_work_only_so_long() {
        let cell: OnceLock<u32> = OnceLock::new();
        assert_eq!(
            wait_for(&cell, Duration::from_millis(30)),
            None,
            "not ready"
        );
        std::thread::scope(|scope| {
            scope.spawn(|| {
                std::thread::sleep(Duration::from_millis(50));
                cell.set(7).unwrap();
            });
            assert_eq!(
                wait_for(&cell, Duration::from_secs(60)),
                Some(&7),
                "ready meanwhile"
            );
        });
    }

    #[test]
    fn back_links_never_echo_the_request() {
        let f = |s: &str| pairs(s);
        assert_eq!(
            back_link(&f("back=review&page=3"), "00000000000000ab"),
            "/review?page=3"
        );
        assert_eq!(
            back_link(&f("back=review&page=x"), "00000000000000ab"),
            "/review?page=1"
        );
        assert_eq!(
            back_link(&f("back=https%3A%2F%2Fevil.example"), "00000000000000ab"),
            "/picture/00000000000000ab"
        );
        assert_eq!(
            back_link(&f(""), "00000000000000ab"),
            "/picture/00000000000000ab"
        );
        assert_eq!(
            back_link(&f("back=one-by-one&at=12"), "00000000000000ab"),
            "/one-by-one?at=12"
        );
        assert_eq!(
            back_link(
                &f("back=one-by-one&at=%2F%2Fevil.example"),
                "00000000000000ab"
            ),
            "/one-by-one?at=1"
        );
    }

    #[test]
    fn the_walk_puts_untagged_first_then_the_likeliest_additions() {
        // Rows 1 and 4 are untagged; of the tagged ones, row 3 has the strongest
        // suggestion, row 0 the next, row 2 none that reaches PROPOSE_AT, row 5 ties row 0.
        let tagged = [true, false, true, true, false, true];
        let strongest = [0.6, 0.99, 0.3, 0.9, 0.0, 0.6];
        let walk = walk_order(&tagged, &strongest);
        assert_eq!(walk.rows, vec![1, 4, 3, 0, 5]);
        assert_eq!(walk.untagged, 2);
        // Exactly at the bar is in; just below is out.
        let walk = walk_order(&[true, true], &[PROPOSE_AT, PROPOSE_AT - 1e-3]);
        assert_eq!(walk.rows, vec![0]);
        assert_eq!(walk.untagged, 0);
        let walk = walk_order(&[], &[]);
        assert!(walk.rows.is_empty());
    }

    #[test]
    fn grid_sizes_are_bounded() {
        assert_eq!(limit_of(&pairs("")), GRID);
        assert_eq!(limit_of(&pairs("limit=5")), 5);
        assert_eq!(limit_of(&pairs("limit=0")), 1);
        assert_eq!(limit_of(&pairs("limit=999999999")), GRID_MAX);
        assert_eq!(limit_of(&pairs("limit=-3")), GRID);
    }
}
