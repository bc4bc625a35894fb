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
    /// The tags asked for (normalised): one, or several accepted together.
    pub tags: Vec<String>,
    pub adding: bool,
    pub edits: Vec<WrittenFile>,
    /// True when the picture already was as asked (nothing to write).
    pub already: bool,
    /// Tags asked to be removed that only the picture file itself holds (a keyword kept
    /// inside it), which tagweave never changes.
    pub inside_picture: Vec<String>,
    /// Whether the index now holds the new tags (else a scan must read them).
    pub indexed: bool,
    pub back: String,
}

/// Note shown wherever tags were written.
const WRITTEN_NOTE: &str = "Written to the sidecar files and to the index: tagweave commands \
     in another terminal see the new tags now. Run <code>tagweave train</code> now and then so \
     the model learns from them.";
/// Note shown when the index could not take the new tags.
const SCAN_NOTE: &str = "Written to the sidecar files. The index still has the old tags: \
     run <code>tagweave scan</code> to index the new tags.";

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
         <nav><a href=\"/\">Search</a><a href=\"/one-by-one\">One by one</a>\
         <a href=\"/review\">Review queue</a></nav>\
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
/// The value of the `from` field that says the tags sent are suggestions the person accepted
/// (the sidecar marks them so), not tags they typed.
pub(crate) const FROM_SUGGESTION: &str = "suggestion";

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
    let from = if field == "add" {
        format!("<input type=\"hidden\" name=\"from\" value=\"{FROM_SUGGESTION}\">")
    } else {
        String::new()
    };
    format!(
        "<form method=\"post\" action=\"/picture/{id}/{path}\" class=\"inline\" \
         data-action=\"{label}\" data-tag=\"{tag}\">\
         <input type=\"hidden\" name=\"token\" value=\"{token}\">{back}{from}\
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

/// The suggestions of a picture as list items, each with its accept and reject forms
/// (carrying `back`), its strength, and that strength in hundredths for the page's script.
fn suggestion_items(content: &PictureContent, back: &str) -> String {
    let id = &content.id;
    let mut out = String::new();
    for (tag, p) in &content.suggestions {
        let buttons = content
            .token
            .map(|t| {
                button_form(t, id, "tags", "add", tag, "accept", back)
                    + &button_form(t, id, "set-aside", "tag", tag, "reject", back)
            })
            .unwrap_or_default();
        let _ = write!(
            out,
            "<li class=\"suggestion\" data-tag=\"{t}\" data-hundredths=\"{h}\"><span class=\"tagname\">{t}</span>\
             <meter min=\"0\" max=\"1\" value=\"{p:.3}\"></meter><span class=\"prob\">{pc}</span>{buttons}</li>",
            t = html(tag),
            h = hundredths(*p),
            pc = strength(*p, content.calibrated),
        );
    }
    out
}

/// A strength as shown, in hundredths (83 for "83 %" or "0.83"): what a threshold is
/// compared with, so that what is counted is what the page shows.
pub fn hundredths(p: f32) -> u32 {
    (p.clamp(0.0, 1.0) * 100.0).round() as u32
}

/// The suggestions that "accept all at or above" takes: those shown at `above` hundredths
/// or more, in the order shown.
pub fn at_or_above(suggestions: &[(String, f32)], above: u32) -> Vec<&str> {
    suggestions
        .iter()
        .filter(|(_, p)| hundredths(*p) >= above)
        .map(|(t, _)| t.as_str())
        .collect()
}

/// The threshold as a person types it: a percentage when the numbers are calibrated
/// probabilities, else a score between 0 and 1. `None` when it is not a number.
pub fn threshold_from(typed: &str, calibrated: bool) -> Option<u32> {
    let value: f32 = typed.trim().parse().ok().filter(|v: &f32| v.is_finite())?;
    let scaled = if calibrated { value } else { value * 100.0 };
    Some(scaled.round().clamp(0.0, 100.0) as u32)
}

/// The threshold written back as a person types it.
fn threshold_typed(above: u32, calibrated: bool) -> String {
    if calibrated {
        above.to_string()
    } else {
        format!("{:.2}", f64::from(above) / 100.0)
    }
}

/// The accept-all button's words; the page's script says the same as the threshold moves.
pub fn accept_all_label(count: usize, above: u32, calibrated: bool) -> String {
    let tags = if count == 1 { "tag" } else { "tags" };
    if calibrated {
        format!("accept {count} {tags} at or above {above} %")
    } else {
        format!(
            "accept {count} {tags} scoring {} or more",
            threshold_typed(above, false)
        )
    }
}

/// Said of a picture less like any tagged picture than those are like each other.
const UNLIKE_NOTE: &str = "<p class=\"problem\">Unlike this collection: this picture is less \
     like any tagged picture than the tagged pictures are like each other, so the suggestions \
     below are guesses.</p>";

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
            "<span class=\"note\">written now</span>"
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
        let _ = write!(body, "<p class=\"written\">{WRITTEN_NOTE}</p>");
    }
    if content.unlike_collection {
        body.push_str(UNLIKE_NOTE);
    }
    body.push_str("<h2>Suggested</h2><ul class=\"suggestions\">");
    if content.suggestions.is_empty() {
        body.push_str("<li class=\"empty\">nothing more to suggest</li>");
    }
    body.push_str(&suggestion_items(content, ""));
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
            "<p class=\"note\">changed now</p>"
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

/// Where a picture stands in the one-by-one walk.
pub struct Step {
    /// Its place in the walk, from 1.
    pub at: usize,
    pub total: usize,
    /// Untagged (else it carries tags and the model would add more).
    pub untagged: bool,
    /// The accept-all threshold, in hundredths.
    pub above: u32,
}

/// The one-by-one page: how many pictures of each kind it walks through, and the one at
/// the current place (none when there is nothing to go through).
pub struct OneByOneContent<'a> {
    pub untagged: usize,
    pub partly: usize,
    pub current: Option<(PictureContent<'a>, Step)>,
}

/// The keys of the one-by-one page, as its legend shows them.
const KEYS: [(&str, &str); 5] = [
    ("j or →", "next picture"),
    ("k or ←", "previous picture"),
    ("↓ ↑", "move between suggestions"),
    ("a", "accept the marked suggestion"),
    ("r", "reject it"),
];

fn step_href(at: usize, above: u32, calibrated: bool) -> String {
    format!(
        "/one-by-one?at={at}&amp;above={}",
        threshold_typed(above, calibrated)
    )
}

/// One picture of the walk: a fragment the page's script may put in place of the last.
/// Its forms work without the script too (they come back to this place).
pub fn one_part(content: &PictureContent, step: &Step) -> String {
    let id = &content.id;
    let calibrated = content.calibrated;
    let back = format!(
        "<input type=\"hidden\" name=\"back\" value=\"one-by-one\">\
         <input type=\"hidden\" name=\"at\" value=\"{}\">",
        step.at
    );
    let mut out = format!(
        "<section class=\"one picture\" data-at=\"{at}\" data-id=\"{id}\" data-calibrated=\"{cal}\">\
         <figure><img class=\"large\" src=\"/picture/{id}/large\" alt=\"{alt}\">\
         <figcaption><a href=\"{href}\">{alt}</a></figcaption></figure><div class=\"side\">\
         <nav class=\"steps\">",
        at = step.at,
        cal = u8::from(calibrated),
        alt = html(&content.picture),
        href = picture_href(id),
    );
    if step.at > 1 {
        let _ = write!(
            out,
            "<a href=\"{}\" data-go=\"previous\" rel=\"prev\">← previous</a>",
            step_href(step.at - 1, step.above, calibrated)
        );
    }
    let _ = write!(
        out,
        "<span class=\"where\">{} of {} · {}</span>",
        step.at,
        step.total,
        if step.untagged {
            "untagged"
        } else {
            "partly tagged"
        }
    );
    if step.at < step.total {
        let _ = write!(
            out,
            "<a href=\"{}\" data-go=\"next\" rel=\"next\">next →</a>",
            step_href(step.at + 1, step.above, calibrated)
        );
    }
    out.push_str("</nav><h2>Tags now</h2><ul class=\"tags\">");
    if content.tags.is_empty() {
        out.push_str("<li class=\"empty\">none</li>");
    }
    for (tag, written, _) in &content.tags {
        let _ = write!(
            out,
            "<li class=\"current\" data-tag=\"{t}\"><span class=\"tagname\">{t}</span>{fresh}</li>",
            t = html(tag),
            fresh = if *written {
                "<span class=\"note\">written now</span>"
            } else {
                ""
            },
        );
    }
    out.push_str("</ul>");
    if content.unlike_collection {
        out.push_str(UNLIKE_NOTE);
    }
    out.push_str("<h2>Suggested</h2><ul class=\"suggestions\">");
    if content.suggestions.is_empty() {
        out.push_str("<li class=\"empty\">nothing more to suggest</li>");
    }
    out.push_str(&suggestion_items(content, &back));
    out.push_str("</ul>");
    if !calibrated && !content.suggestions.is_empty() {
        out.push_str(SCORES_NOTE);
    }
    if let Some(token) = content.token.filter(|_| !content.suggestions.is_empty()) {
        let (words, bounds, unit) = if calibrated {
            ("at or above", "min=\"0\" max=\"100\" step=\"1\"", " %")
        } else {
            ("scoring at least", "min=\"0\" max=\"1\" step=\"0.01\"", "")
        };
        let taken = at_or_above(&content.suggestions, step.above);
        let adds: String = taken
            .iter()
            .map(|t| format!("<input type=\"hidden\" name=\"add\" value=\"{}\">", html(t)))
            .collect();
        let _ = write!(
            out,
            "<div class=\"all\"><form method=\"get\" action=\"/one-by-one\" class=\"above\">\
             <input type=\"hidden\" name=\"at\" value=\"{at}\">\
             <label>Accept every suggestion {words} <input name=\"above\" type=\"number\" \
             {bounds} value=\"{typed}\">{unit}</label>\
             <button class=\"quiet\" type=\"submit\">count</button></form>\
             <form method=\"post\" action=\"/picture/{id}/tags\" class=\"all-above\">\
             <input type=\"hidden\" name=\"token\" value=\"{token}\">{back}\
             <input type=\"hidden\" name=\"from\" value=\"{FROM_SUGGESTION}\">{adds}\
             <button class=\"accept\" type=\"submit\"{off}>{label}</button></form></div>",
            at = step.at,
            typed = threshold_typed(step.above, calibrated),
            token = html(token),
            off = if taken.is_empty() { " disabled" } else { "" },
            label = accept_all_label(taken.len(), step.above, calibrated),
        );
    }
    out.push_str("</div></section>");
    out
}

pub fn one_by_one(content: &OneByOneContent) -> Page {
    let mut body = format!(
        "<section class=\"ask\"><h1>One by one</h1><p class=\"hint\">First the untagged \
         pictures ({u}), then tagged ones the model would add a tag to ({p}), likeliest \
         addition first. Accept or reject each suggestion, or all above a threshold.</p>\
         <dl class=\"keys\">",
        u = content.untagged,
        p = content.partly,
    );
    for (key, meaning) in KEYS {
        let _ = write!(body, "<dt><kbd>{key}</kbd></dt><dd>{meaning}</dd>");
    }
    body.push_str("</dl></section>\n<p id=\"one-status\" class=\"status\" role=\"status\"></p>");
    body.push_str("<div id=\"one-slot\">");
    match &content.current {
        Some((picture, step)) => body.push_str(&one_part(picture, step)),
        None => body.push_str(
            "<p class=\"empty\">Nothing to go through: every picture carries tags, and the \
             model would add none.</p>",
        ),
    }
    body.push_str("</div>\n<script src=\"/queue.js\" defer></script>");
    Page {
        title: "One by one".into(),
        body,
    }
}

pub fn written(content: &Written) -> Page {
    let card = &content.card;
    let verb = if content.adding { "Added" } else { "Removed" };
    let quoted = content
        .tags
        .iter()
        .map(|t| format!("“{}”", html(t)))
        .collect::<Vec<_>>()
        .join(", ");
    let mut body = format!(
        "<section class=\"done\"><a href=\"/picture/{id}\"><img src=\"/picture/{id}/thumbnail\" \
         alt=\"{alt}\"></a><div>",
        id = card.id,
        alt = html(&card.picture),
    );
    if content.edits.is_empty() && !content.inside_picture.is_empty() {
        let kept = content
            .inside_picture
            .iter()
            .map(|t| format!("“{}”", html(t)))
            .collect::<Vec<_>>()
            .join(", ");
        let _ = write!(
            body,
            "<h1>Not removed</h1><p>No sidecar of <code>{alt}</code> holds <b>{kept}</b>: it is \
             a keyword kept inside the picture file, and tagweave never changes pictures. \
             Remove it with the program that wrote it, then run <code>tagweave scan</code>.</p>",
            alt = html(&card.picture),
        );
    } else if content.edits.is_empty() {
        let state = if content.adding {
            "already carries"
        } else {
            "does not carry"
        };
        let _ = write!(
            body,
            "<h1>Nothing to write</h1><p><code>{alt}</code> {state} <b>{quoted}</b>{why}.</p>",
            alt = html(&card.picture),
            why = if content.already {
                ""
            } else {
                " (nothing changed)"
            },
        );
    } else {
        let _ = write!(
            body,
            "<h1>{verb} {quoted}</h1><p>Picture <code>{alt}</code>.</p>",
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
        let note = if content.indexed {
            WRITTEN_NOTE
        } else {
            SCAN_NOTE
        };
        let _ = write!(body, "<p class=\"written\">{note}</p>");
    }
    let _ = write!(
        body,
        "<p class=\"next\"><a class=\"button\" href=\"{back}\">Back</a> \
         <a href=\"/picture/{id}\">the picture</a> · <a href=\"/review\">review queue</a></p></div></section>",
        back = html(&content.back),
        id = card.id,
    );
    Page {
        title: format!("{verb} {}", content.tags.join(", ")),
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
    fn removing_a_keyword_kept_inside_the_picture_says_where_it_is() {
        let written = |inside_picture: Vec<String>| {
            written(&Written {
                card: card("harbour/night.jpg"),
                tags: vec!["night".into()],
                adding: false,
                edits: Vec::new(),
                already: true,
                inside_picture,
                indexed: true,
                back: "/".into(),
            })
            .body
        };
        let inside = written(vec!["night".into()]);
        assert!(inside.contains("<h1>Not removed</h1>"), "{inside}");
        assert!(
            inside.contains("keyword kept inside the picture file"),
            "{inside}"
        );
        let absent = written(Vec::new());
        assert!(absent.contains("<h1>Nothing to write</h1>"), "{absent}");
        assert!(absent.contains("does not carry"), "{absent}");
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

    fn walk_picture(calibrated: bool, token: Option<&str>) -> PictureContent<'_> {
        PictureContent {
            id: "0123456789abcdef".into(),
            picture: "odd/<b>.jpg".into(),
            sidecars: vec![],
            tags: vec![("<i>x</i>".into(), true, None)],
            suggestions: vec![
                ("night".into(), 0.834),
                ("\"sea".into(), 0.695),
                ("harbour".into(), 0.704),
                ("snow".into(), 0.2),
            ],
            calibrated,
            unlike_collection: false,
            vocabulary: &[],
            token,
            changed: false,
        }
    }

    #[test]
    fn accept_all_counts_what_the_page_shows() {
        let suggestions = walk_picture(true, None).suggestions;
        // 0.695 shows as "70 %" (hundredths round half up, as the script's Math.round),
        // so it counts at 70; 0.2 does not.
        assert_eq!(hundredths(0.695), 70);
        assert_eq!(hundredths(0.704), 70);
        assert_eq!(hundredths(1.5), 100);
        assert_eq!(
            at_or_above(&suggestions, 70),
            vec!["night", "\"sea", "harbour"]
        );
        assert_eq!(at_or_above(&suggestions, 71), vec!["night"]);
        assert_eq!(at_or_above(&suggestions, 84), Vec::<&str>::new());
        assert_eq!(at_or_above(&suggestions, 0).len(), 4);
        // A threshold is typed as a percentage when calibrated, else as a score.
        assert_eq!(threshold_from("70", true), Some(70));
        assert_eq!(threshold_from("0.7", false), Some(70));
        assert_eq!(threshold_from(" 150 ", true), Some(100));
        assert_eq!(threshold_from("-3", true), Some(0));
        assert_eq!(threshold_from("NaN", true), None);
        assert_eq!(threshold_from("seventy", false), None);
        assert_eq!(
            accept_all_label(3, 70, true),
            "accept 3 tags at or above 70 %"
        );
        assert_eq!(
            accept_all_label(1, 70, false),
            "accept 1 tag scoring 0.70 or more"
        );
    }

    #[test]
    fn a_walk_fragment_offers_the_counted_tags_and_escapes_them() {
        let step = Step {
            at: 2,
            total: 5,
            untagged: false,
            above: 70,
        };
        let part = one_part(&walk_picture(true, Some("t")), &step);
        assert!(!part.contains("<b>") && !part.contains("<i>"), "{part}");
        // The accept-all form carries exactly the three counted tags, escaped.
        let form = &part[part.find("class=\"all-above\"").unwrap()..];
        let form = &form[..form.find("</form>").unwrap()];
        let adds: Vec<&str> = form
            .split("name=\"add\" value=\"")
            .skip(1)
            .map(|rest| rest.split('"').next().unwrap())
            .collect();
        assert_eq!(adds, vec!["night", "&quot;sea", "harbour"]);
        assert!(
            form.contains(">accept 3 tags at or above 70 %</button>"),
            "{form}"
        );
        // Each suggestion tells the script its shown strength; forms come back here.
        assert!(part.contains("data-tag=\"night\" data-hundredths=\"83\""));
        assert!(part.contains("name=\"back\" value=\"one-by-one\""));
        assert!(part.contains("name=\"at\" value=\"2\""));
        assert!(part.contains("href=\"/one-by-one?at=1&amp;above=70\" data-go=\"previous\""));
        assert!(part.contains("href=\"/one-by-one?at=3&amp;above=70\" data-go=\"next\""));
        // Scores: the threshold is a score and says so; read-only: no forms at all.
        let scores = one_part(&walk_picture(false, None), &step);
        assert!(!scores.contains("<form"), "{scores}");
        assert!(scores.contains("Scores, not probabilities"));
        let scores = one_part(&walk_picture(false, Some("t")), &step);
        assert!(scores.contains("scoring at least"), "{scores}");
        assert!(scores.contains("value=\"0.70\""), "{scores}");
        // The first and last places have no link past the end.
        let last = Step { at: 5, ..step };
        let last = one_part(&walk_picture(true, Some("t")), &last);
        assert!(!last.contains("data-go=\"next\"") && last.contains("data-go=\"previous\""));
        // The page loads its script from our own address, and shows the keys.
        let page = one_by_one(&OneByOneContent {
            untagged: 1,
            partly: 4,
            current: None,
        })
        .body;
        assert!(
            page.contains("<script src=\"/queue.js\" defer></script>"),
            "{page}"
        );
        assert!(page.contains("<kbd>a</kbd>") && page.contains("Nothing to go through"));
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
