//! The pages, as HTML strings. Every value from the collection (paths, tags) goes through
//! [`html`] on its way in, and into links only through [`url_component`].

use std::fmt::Write;

use crate::text::{html, url_component};

/// A finished page body with its title.
pub struct Page {
    pub title: String,
    pub body: String,
}

/// One picture in a grid.
pub struct Card {
    pub id: String,
    pub picture: String,
    /// "carries" or "inferred", when the grid answers for tags.
    pub badge: Option<&'static str>,
    pub untagged: bool,
    pub similarity: Option<f32>,
}

pub struct SearchContent<'a> {
    pub typed: String,
    pub untagged_only: bool,
    pub vocabulary: &'a [String],
    pub pictures: usize,
    pub tagged: usize,
    pub problem: Option<String>,
    /// `None` before anything was asked.
    pub cards: Option<Vec<Card>>,
}

pub struct LikeContent<'a> {
    pub start: Card,
    pub away: Vec<String>,
    pub toward: Vec<String>,
    pub vocabulary: &'a [String],
    pub problem: Option<String>,
    pub cards: Vec<Card>,
}

pub struct PictureContent<'a> {
    pub id: String,
    pub picture: String,
    pub sidecars: Vec<String>,
    /// Tags now, whether written since this page started, and the share of similar pictures
    /// carrying it.
    pub tags: Vec<(String, bool, Option<f32>)>,
    pub suggestions: Vec<(String, f32)>,
    /// Whether the suggestions' numbers are calibrated probabilities (else bare scores).
    pub calibrated: bool,
    /// The picture is less like any tagged picture than the tagged ones are like each other:
    /// its suggestions are guesses.
    pub unlike_collection: bool,
    pub vocabulary: &'a [String],
    pub token: Option<&'a str>,
    pub changed: bool,
}

pub struct QueueEntry {
    pub rank: usize,
    pub card: Card,
    /// Carried tags few similar pictures carry, with that share.
    /// Tag, share of similar pictures carrying it, share of pictures with its other tags.
    pub doubtful: Vec<(String, f32, f32)>,
    /// Tags it probably should carry, with their probability.
    pub proposed: Vec<(String, f32)>,
    pub changed: bool,
}

pub struct QueueContent<'a> {
    pub judged: usize,
    pub flagged: usize,
    pub page: usize,
    pub pages: usize,
    pub entries: Vec<QueueEntry>,
    /// Whether proposed tags' numbers are calibrated probabilities (else bare scores).
    pub calibrated: bool,
    pub token: Option<&'a str>,
}

pub struct WrittenFile {
    pub sidecar: String,
    pub created: bool,
    pub original: Option<String>,
    pub diff: String,
}

pub struct Written {
    pub card: Card,
    pub tag: String,
    pub adding: bool,
    pub edits: Vec<WrittenFile>,
    /// True when the picture already was as asked (nothing to write).
    pub already: bool,
    pub back: String,
}

/// Note shown wherever tags were written: the index is not rescanned by the page.
const SCAN_NOTE: &str = "Written to the sidecar files. The index still has the old tags: \
     run <code>tagweave scan</code> to index the new tags (stop this page first; it holds the \
     store).";

/// The whole page around `page`. `root` (the collection folder) is shown in the bar; it is
/// left out of refusals, which must say nothing about the collection.
pub fn layout(page: &Page, read_only: bool, root: Option<&str>) -> String {
    let banner = if read_only {
        "<p class=\"banner\">Read-only: started with <code>--read-only</code>, this page \
         changes nothing.</p>"
    } else {
        ""
    };
    format!(
        "<!doctype html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n\
         <title>{title} · tagweave</title>\n<link rel=\"stylesheet\" href=\"/style.css\">\n\
         <link rel=\"icon\" href=\"data:,\">\n</head>\n<body>\n\
         <header class=\"bar\"><a class=\"brand\" href=\"/\">tagweave</a>\
         <nav><a href=\"/\">Search</a><a href=\"/review\">Review queue</a></nav>\
         {root}</header>\n\
         {banner}\n<main>\n{body}\n</main>\n\
         <footer>Suggestions are the model's guesses for you to judge. Nothing is written \
         until you accept it; the first version of each changed sidecar is kept beside it as <code>NAME.txt.orig</code> or <code>NAME.xmp.orig</code>.</footer>\n\
         </body>\n</html>\n",
        title = html(&page.title),
        root = root
            .map(|r| format!(
                "<span class=\"root\" title=\"collection folder\">{}</span>",
                html(r)
            ))
            .unwrap_or_default(),
        body = page.body,
    )
}

pub fn message(title: &str, text: &str) -> String {
    format!(
        "<section class=\"message\"><h1>{}</h1><p>{}</p><p><a href=\"/\">Search</a> · \
         <a href=\"/review\">Review queue</a></p></section>",
        html(title),
        html(text)
    )
}

fn picture_href(id: &str) -> String {
    format!("/picture/{id}")
}

fn search_href(tag: &str) -> String {
    format!("/?q={}", url_component(tag))
}

fn grid(cards: &[Card]) -> String {
    let mut out = String::from("<ul class=\"grid\">\n");
    for card in cards {
        let badge = card
            .badge
            .map(|b| format!("<span class=\"badge {b}\">{b}</span>"))
            .unwrap_or_default();
        let untagged = if card.untagged {
            "<span class=\"note\">untagged</span>"
        } else {
            ""
        };
        let similarity = card
            .similarity
            .map(|s| format!("<span class=\"score\" title=\"similarity\">{s:.2}</span>"))
            .unwrap_or_default();
        let _ = writeln!(
            out,
            "<li class=\"card\" data-id=\"{id}\"><a href=\"{href}\"><img src=\"/picture/{id}/thumbnail\" \
             alt=\"{alt}\"></a><div class=\"caption\"><a class=\"path\" href=\"{href}\">{alt}</a>\
             <div class=\"marks\">{badge}{untagged}{similarity}</div></div></li>",
            id = card.id,
            href = picture_href(&card.id),
            alt = html(&card.picture),
        );
    }
    out.push_str("</ul>");
    out
}

fn tag_cloud(vocabulary: &[String]) -> String {
    let mut out = String::from("<p class=\"cloud\">");
    for tag in vocabulary {
        let _ = write!(
            out,
            "<a class=\"tag\" href=\"{}\">{}</a> ",
            html(&search_href(tag)),
            html(tag)
        );
    }
    out.push_str("</p>");
    out
}

fn datalist(vocabulary: &[String]) -> String {
    let mut out = String::from("<datalist id=\"known-tags\">");
    for tag in vocabulary {
        let _ = write!(out, "<option value=\"{}\">", html(tag));
    }
    out.push_str("</datalist>");
    out
}

pub fn search(content: &SearchContent) -> Page {
    let mut body = format!(
        "<section class=\"ask\"><h1>Find pictures by their tags</h1>\
         <form method=\"get\" action=\"/\" class=\"search\">\
         <label for=\"q\">Tags</label>\
         <input id=\"q\" name=\"q\" type=\"search\" value=\"{typed}\" list=\"known-tags\" \
         placeholder=\"e.g. night harbour\" autofocus>\
         <label class=\"check\"><input type=\"checkbox\" name=\"untagged\" value=\"on\"{checked}> \
         only pictures nobody has tagged</label>\
         <button type=\"submit\">Find</button></form>{datalist}\
         <p class=\"hint\">{pictures} pictures indexed, {tagged} of them tagged. \
         <span class=\"badge carries\">carries</span> the sidecar has every asked tag; \
         <span class=\"badge inferred\">inferred</span> the model thinks it fits.</p></section>\n",
        typed = html(&content.typed),
        checked = if content.untagged_only {
            " checked"
        } else {
            ""
        },
        datalist = datalist(content.vocabulary),
        pictures = content.pictures,
        tagged = content.tagged,
    );
    if let Some(problem) = &content.problem {
        let _ = write!(body, "<p class=\"problem\">{}</p>", html(problem));
    }
    match &content.cards {
        Some(cards) if cards.is_empty() => body.push_str("<p class=\"empty\">No pictures.</p>"),
        Some(cards) => {
            let _ = write!(
                body,
                "<h2 class=\"results\">{} pictures for “{}”, best first</h2>\n{}",
                cards.len(),
                html(&content.typed),
                grid(cards)
            );
        }
        None => {}
    }
    if content.cards.is_none() || content.problem.is_some() {
        let _ = write!(
            body,
            "<h2>Tags of this collection</h2>{}",
            tag_cloud(content.vocabulary)
        );
    }
    Page {
        title: if content.typed.is_empty() {
            "Search".into()
        } else {
            format!("Search: {}", content.typed)
        },
        body,
    }
}

fn like_form(id: &str, away: &str, toward: &str) -> String {
    format!(
        "<form method=\"get\" action=\"/picture/{id}/like\" class=\"like\" id=\"like\">\
         <h2>Like this, but…</h2>\
         <label>less of <input name=\"away\" value=\"{away}\" list=\"known-tags\" \
         placeholder=\"e.g. day\"></label>\
         <label>more of <input name=\"toward\" value=\"{toward}\" list=\"known-tags\" \
         placeholder=\"e.g. night\"></label>\
         <button type=\"submit\">Show</button></form>",
        away = html(away),
        toward = html(toward),
    )
}

pub fn like(content: &LikeContent) -> Page {
    let away = content.away.join(" ");
    let toward = content.toward.join(" ");
    let mut body = format!(
        "<section class=\"ask likehead\"><a href=\"{href}\"><img class=\"start\" \
         src=\"/picture/{id}/thumbnail\" alt=\"{alt}\"></a><div><h1>Like {alt}, but…</h1>{form}{list}\
         </div></section>\n",
        id = content.start.id,
        href = picture_href(&content.start.id),
        alt = html(&content.start.picture),
        form = like_form(&content.start.id, &away, &toward),
        list = datalist(content.vocabulary),
    );
    if let Some(problem) = &content.problem {
        let _ = write!(body, "<p class=\"problem\">{}</p>", html(problem));
    } else if content.cards.is_empty() {
        body.push_str("<p class=\"empty\">No pictures.</p>");
    } else {
        let mut said = Vec::new();
        if !away.is_empty() {
            said.push(format!("less {}", html(&away)));
        }
        if !toward.is_empty() {
            said.push(format!("more {}", html(&toward)));
        }
        let _ = write!(
            body,
            "<h2 class=\"results\">{} pictures: {}; badges refer to the “more of” tags</h2>\n{}",
            content.cards.len(),
            said.join(", "),
            grid(&content.cards)
        );
    }
    Page {
        title: format!("Like {}", content.start.picture),
        body,
    }
}

/// A one-button form that posts a change with this run's token.
fn button_form(
    token: &str,
    id: &str,
    action: &str,
    field: &str,
    tag: &str,
    label: &str,
    back: &str,
) -> String {
    // Keeping a doubted tag and removing it are equal choices, drawn alike; rejecting a
    // proposal is the quiet default.
    let (path, class) = match (action, label) {
        ("set-aside", "keep") => ("set-aside", "choice"),
        ("set-aside", _) => ("set-aside", "quiet"),
        _ if field == "remove" => ("tags", "choice"),
        _ => ("tags", "accept"),
    };
    format!(
        "<form method=\"post\" action=\"/picture/{id}/{path}\" class=\"inline\" \
         data-action=\"{label}\" data-tag=\"{tag}\">\
         <input type=\"hidden\" name=\"token\" value=\"{token}\">{back}\
         <button class=\"{class}\" name=\"{field}\" value=\"{tag}\">{label}</button></form>",
        tag = html(tag),
        token = html(token),
    )
}

fn percent(p: f32) -> String {
    format!("{:.0} %", p * 100.0)
}

/// A model's number as a person should read it: a percentage only when it is a calibrated
/// probability, else the bare score.
fn strength(p: f32, calibrated: bool) -> String {
    if calibrated {
        percent(p)
    } else {
        format!("{p:.2}")
    }
}

/// Said under numbers that are not calibrated probabilities.
const SCORES_NOTE: &str = "<p class=\"hint\">Scores, not probabilities: higher is likelier, \
     but 0.90 does not mean 9 times in 10 (too few tagged pictures to calibrate).</p>";

pub fn picture(content: &PictureContent) -> Page {
    let id = &content.id;
    let mut body = format!(
        "<article class=\"picture\"><figure><img class=\"large\" src=\"/picture/{id}/large\" \
         alt=\"{alt}\"><figcaption>{alt}</figcaption></figure><div class=\"side\">",
        alt = html(&content.picture),
    );
    let source = if content.sidecars.is_empty() {
        "No sidecar yet (accepting a tag makes one).".to_string()
    } else {
        let files: Vec<String> = content
            .sidecars
            .iter()
            .map(|s| format!("<code>{}</code>", html(s)))
            .collect();
        format!("From {}.", files.join(", "))
    };
    let _ = write!(
        body,
        "<h1>Tags now</h1><p class=\"hint\">{source} Share: how many of the most similar \
         pictures carry the tag.</p><ul class=\"tags\">"
    );
    if content.tags.is_empty() {
        body.push_str("<li class=\"empty\">none</li>");
    }
    for (tag, written, share) in &content.tags {
        let share = share
            .map(|s| format!("<span class=\"share\">{} of similar</span>", percent(s)))
            .unwrap_or_default();
        let fresh = if *written {
            "<span class=\"note\">written now, not yet indexed</span>"
        } else {
            ""
        };
        let button = content
            .token
            .map(|t| button_form(t, id, "tags", "remove", tag, "remove", ""))
            .unwrap_or_default();
        let _ = write!(
            body,
            "<li class=\"current\" data-tag=\"{t}\"><a class=\"tag\" href=\"{href}\">{t}</a>{share}{fresh}{button}</li>",
            t = html(tag),
            href = html(&search_href(tag)),
        );
    }
    body.push_str("</ul>");
    if content.changed {
        let _ = write!(body, "<p class=\"written\">{SCAN_NOTE}</p>");
    }
    if content.unlike_collection {
        body.push_str(
            "<p class=\"problem\">Unlike this collection: this picture is less like any tagged \
             picture than the tagged pictures are like each other, so the suggestions below are \
             guesses.</p>",
        );
    }
    body.push_str("<h2>Suggested</h2><ul class=\"suggestions\">");
    if content.suggestions.is_empty() {
        body.push_str("<li class=\"empty\">nothing more to suggest</li>");
    }
    for (tag, p) in &content.suggestions {
        let buttons = content
            .token
            .map(|t| {
                button_form(t, id, "tags", "add", tag, "accept", "")
                    + &button_form(t, id, "set-aside", "tag", tag, "reject", "")
            })
            .unwrap_or_default();
        let _ = write!(
            body,
            "<li class=\"suggestion\" data-tag=\"{t}\"><span class=\"tagname\">{t}</span>\
             <meter min=\"0\" max=\"1\" value=\"{p:.3}\"></meter><span class=\"prob\">{pc}</span>{buttons}</li>",
            t = html(tag),
            pc = strength(*p, content.calibrated),
        );
    }
    body.push_str("</ul>");
    if !content.calibrated && !content.suggestions.is_empty() {
        body.push_str(SCORES_NOTE);
    }
    if let Some(token) = content.token {
        let _ = write!(
            body,
            "<form method=\"post\" action=\"/picture/{id}/tags\" class=\"own\">\
             <input type=\"hidden\" name=\"token\" value=\"{token}\">\
             <label>Add a tag of your own <input name=\"add\" list=\"known-tags\"></label>\
             <button class=\"accept\" type=\"submit\">add</button></form>",
            token = html(token),
        );
    }
    body.push_str(&like_form(id, "", ""));
    body.push_str(&datalist(content.vocabulary));
    body.push_str("</div></article>");
    Page {
        title: content.picture.clone(),
        body,
    }
}

pub fn review(content: &QueueContent) -> Page {
    let mut body = format!(
        "<section class=\"ask\"><h1>Review queue</h1><p class=\"hint\">{flagged} of {judged} \
         tagged pictures carry a tag that few similar pictures, or few pictures with \
         the same other tags, carry; the most doubtful first. Remove a doubtful tag, or keep it; accept or reject proposed ones.</p></section>\n",
        flagged = content.flagged,
        judged = content.judged,
    );
    if !content.calibrated {
        body.push_str(SCORES_NOTE);
    }
    if content.entries.is_empty() {
        body.push_str("<p class=\"empty\">Nothing to review.</p>");
    }
    body.push_str("<ol class=\"queue\">\n");
    let back = format!(
        "<input type=\"hidden\" name=\"back\" value=\"review\"><input type=\"hidden\" \
         name=\"page\" value=\"{}\">",
        content.page
    );
    for entry in &content.entries {
        let card = &entry.card;
        let id = &card.id;
        let mut doubtful = String::new();
        for (tag, share, with_others) in &entry.doubtful {
            let buttons = content
                .token
                .map(|t| {
                    button_form(t, id, "tags", "remove", tag, "remove", &back)
                        + &button_form(t, id, "set-aside", "tag", tag, "keep", &back)
                })
                .unwrap_or_default();
            let _ = write!(
                doubtful,
                "<li data-tag=\"{t}\"><span class=\"tagname\">{t}</span><span class=\"share\">on {s} \
                 of similar, {o} with its other tags</span>{buttons}</li>",
                t = html(tag),
                s = percent(*share),
                o = percent(*with_others),
            );
        }
        let mut proposed = String::new();
        for (tag, p) in &entry.proposed {
            let buttons = content
                .token
                .map(|t| {
                    button_form(t, id, "tags", "add", tag, "accept", &back)
                        + &button_form(t, id, "set-aside", "tag", tag, "reject", &back)
                })
                .unwrap_or_default();
            let _ = write!(
                proposed,
                "<li data-tag=\"{t}\"><span class=\"tagname\">{t}</span>\
                 <meter min=\"0\" max=\"1\" value=\"{p:.3}\"></meter><span class=\"prob\">{pc}</span>{buttons}</li>",
                t = html(tag),
                pc = strength(*p, content.calibrated),
            );
        }
        if doubtful.is_empty() {
            doubtful.push_str("<li class=\"empty\">done</li>");
        }
        if proposed.is_empty() {
            proposed.push_str("<li class=\"empty\">none</li>");
        }
        let changed = if entry.changed {
            "<p class=\"note\">changed now; run <code>tagweave scan</code> to index</p>"
        } else {
            ""
        };
        let _ = writeln!(
            body,
            "<li class=\"entry\" data-id=\"{id}\"><span class=\"rank\">{rank}</span>\
             <a href=\"{href}\"><img src=\"/picture/{id}/thumbnail\" alt=\"{alt}\"></a>\
             <div class=\"who\"><a class=\"path\" href=\"{href}\">{alt}</a>{changed}</div>\
             <div class=\"col doubt\"><h3>Doubtful</h3><ul>{doubtful}</ul></div>\
             <div class=\"col propose\"><h3>Proposed</h3><ul>{proposed}</ul></div></li>",
            rank = entry.rank,
            href = picture_href(id),
            alt = html(&card.picture),
        );
    }
    body.push_str("</ol>");
    if content.pages > 1 {
        body.push_str("<nav class=\"pages\">");
        if content.page > 1 {
            let _ = write!(
                body,
                "<a href=\"/review?page={}\">← previous</a>",
                content.page - 1
            );
        }
        let _ = write!(
            body,
            "<span>page {} of {}</span>",
            content.page, content.pages
        );
        if content.page < content.pages {
            let _ = write!(
                body,
                "<a href=\"/review?page={}\">next →</a>",
                content.page + 1
            );
        }
        body.push_str("</nav>");
    }
    Page {
        title: "Review queue".into(),
        body,
    }
}

pub fn written(content: &Written) -> Page {
    let card = &content.card;
    let verb = if content.adding { "Added" } else { "Removed" };
    let mut body = format!(
        "<section class=\"done\"><a href=\"/picture/{id}\"><img src=\"/picture/{id}/thumbnail\" \
         alt=\"{alt}\"></a><div>",
        id = card.id,
        alt = html(&card.picture),
    );
    if content.edits.is_empty() {
        let state = if content.adding {
            "already carries"
        } else {
            "does not carry"
        };
        let _ = write!(
            body,
            "<h1>Nothing to write</h1><p><code>{alt}</code> {state} <b>{tag}</b>{why}.</p>",
            alt = html(&card.picture),
            tag = html(&content.tag),
            why = if content.already {
                ""
            } else {
                " (nothing changed)"
            },
        );
    } else {
        let _ = write!(
            body,
            "<h1>{verb} “{tag}”</h1><p>Picture <code>{alt}</code>.</p>",
            tag = html(&content.tag),
            alt = html(&card.picture),
        );
        for file in &content.edits {
            let kept = match &file.original {
                Some(o) => format!(
                    "original kept as <code>{}</code> (first change only)",
                    html(o)
                ),
                None => "new file".to_string(),
            };
            let _ = write!(
                body,
                "<div class=\"file\"><h2><code>{sidecar}</code></h2><p class=\"hint\">{kept}{created}</p>\
                 <pre class=\"diff\">{diff}</pre></div>",
                sidecar = html(&file.sidecar),
                created = if file.created { "; created" } else { "" },
                diff = html(&file.diff),
            );
        }
        let _ = write!(body, "<p class=\"written\">{SCAN_NOTE}</p>");
    }
    let _ = write!(
        body,
        "<p class=\"next\"><a class=\"button\" href=\"{back}\">Back</a> \
         <a href=\"/picture/{id}\">the picture</a> · <a href=\"/review\">review queue</a></p></div></section>",
        back = html(&content.back),
        id = card.id,
    );
    Page {
        title: format!("{verb} {}", content.tag),
        body,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn card(picture: &str) -> Card {
        Card {
            id: "0123456789abcdef".into(),
            picture: picture.into(),
            badge: Some("carries"),
            untagged: false,
            similarity: Some(0.5),
        }
    }

    #[test]
    fn collection_text_never_becomes_markup() {
        let hostile = "<script>alert(1)</script>";
        let content = PictureContent {
            id: "0123456789abcdef".into(),
            picture: format!("odd/{hostile}.jpg"),
            sidecars: vec![format!("odd/{hostile}.txt")],
            tags: vec![(hostile.into(), true, Some(0.2))],
            suggestions: vec![(format!("\"{hostile}"), 0.7)],
            calibrated: true,
            unlike_collection: false,
            vocabulary: &[],
            token: Some("tok\"en"),
            changed: true,
        };
        let page = picture(&content);
        let all = layout(&page, false, Some(hostile));
        assert!(!all.contains("<script"), "{all}");
        assert!(all.contains("&lt;script&gt;"));
        assert!(!all.contains("tok\"en"));
        assert!(all.contains("tok&quot;en"));
        let grid_html = grid(&[card(hostile)]);
        assert!(!grid_html.contains("<script"));
        // Links to searches are percent-encoded, then escaped.
        assert_eq!(search_href("a&b c"), "/?q=a%26b+c");
    }

    #[test]
    fn read_only_pages_offer_no_changes() {
        let content = PictureContent {
            id: "0123456789abcdef".into(),
            picture: "a.jpg".into(),
            sidecars: vec![],
            tags: vec![("snow".into(), false, None)],
            suggestions: vec![("night".into(), 0.9)],
            calibrated: true,
            unlike_collection: false,
            vocabulary: &[],
            token: None,
            changed: false,
        };
        let page = layout(&picture(&content), true, Some("/x"));
        assert!(!page.contains("method=\"post\""), "{page}");
        assert!(page.contains("--read-only"));
        let content = PictureContent {
            token: Some("abc"),
            ..content
        };
        let page = layout(&picture(&content), false, Some("/x"));
        assert!(page.contains("method=\"post\""));
        assert!(page.contains("name=\"token\" value=\"abc\""));
    }

    // Without a calibration a number is a score, never a percentage; a picture unlike the
    // collection is said to get guesses; keeping and removing a doubted tag look alike.
    #[test]
    fn numbers_are_shown_as_honestly_as_the_model_allows() {
        let content = PictureContent {
            id: "0123456789abcdef".into(),
            picture: "a.jpg".into(),
            sidecars: vec![],
            tags: vec![],
            suggestions: vec![("night".into(), 0.834)],
            calibrated: false,
            unlike_collection: true,
            vocabulary: &[],
            token: None,
            changed: false,
        };
        let page = picture(&content).body;
        assert!(page.contains(">0.83<") && !page.contains('%'), "{page}");
        assert!(page.contains("Scores, not probabilities"), "{page}");
        assert!(page.contains("Unlike this collection"), "{page}");
        let sure = picture(&PictureContent {
            calibrated: true,
            unlike_collection: false,
            ..content
        })
        .body;
        assert!(sure.contains(">83 %<"), "{sure}");
        assert!(
            !sure.contains("Scores, not") && !sure.contains("Unlike this"),
            "{sure}"
        );

        let queue = QueueContent {
            judged: 3,
            flagged: 1,
            page: 1,
            pages: 1,
            entries: vec![QueueEntry {
                rank: 1,
                card: card("b.jpg"),
                doubtful: vec![("snow".into(), 0.1, 0.2)],
                proposed: vec![("sea".into(), 0.41)],
                changed: false,
            }],
            calibrated: false,
            token: Some("t"),
        };
        let page = review(&queue).body;
        let class_of = |label: &str| {
            let at = page.find(&format!(">{label}</button>")).unwrap();
            let start = page[..at].rfind("class=\"").unwrap() + 7;
            page[start..at].split('"').next().unwrap().to_string()
        };
        assert_eq!(class_of("keep"), class_of("remove"));
        assert!(
            page.contains(">0.41<") && page.contains("Scores, not"),
            "{page}"
        );
    }
}
