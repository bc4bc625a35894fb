//! Turning one picture's [`TagChange`] into exact new bytes for each of its sidecars, checked
//! by reading them back with the collection's own readers before anything is written.

use std::collections::{BTreeSet, HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::sync::OnceLock;

use tagweave_collection::sidecar::{
    parse_text_marked, parse_xmp_marked, read_sidecar, text_spellings, SidecarTags,
};
use tagweave_collection::{
    crawl, normalize_tag, Candidate, CollectionError, CrawlOptions, SidecarKind, MAX_SIDECAR_BYTES,
    MAX_TEXT_LINE_BYTES,
};

use crate::error::WritebackError;
use crate::sheet::TagChange;
use crate::spelling::Spellings;
use crate::text::{edit_text, text_problem, NEW_FILE_HEADER};
use crate::xmp::{edit_xmp, xmp_problem, xmp_spellings};

/// A tag to write into a sidecar.
#[derive(Debug, Clone, PartialEq, Eq)]
pub(crate) struct NewTag {
    pub(crate) spelling: String,
    /// A suggestion a person accepted (marked so in the file), not a tag they wrote.
    pub(crate) suggested: bool,
}

#[cfg(test)]
impl NewTag {
    /// Each of `spellings`, a suggestion accepted or not as `suggested` says.
    pub(crate) fn all(spellings: &[&str], suggested: bool) -> Vec<NewTag> {
        spellings
            .iter()
            .map(|s| NewTag {
                spelling: s.to_string(),
                suggested,
            })
            .collect()
    }
}

/// New contents for one sidecar file, not yet written.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SidecarEdit {
    /// The picture, relative to the collection root.
    pub picture: String,
    /// The sidecar file (the collection root joined with `sidecar_rel`).
    pub sidecar: PathBuf,
    /// The sidecar relative to the collection root, `/`-separated.
    pub sidecar_rel: String,
    pub kind: SidecarKind,
    /// True when the file does not exist yet.
    pub created: bool,
    /// The bytes read while planning; writing refuses if the file no longer holds exactly these.
    pub before: Vec<u8>,
    pub after: Vec<u8>,
    /// Spellings written into this file.
    pub added: Vec<String>,
    /// Of `added`, the suggestions a person accepted (marked as such in the file).
    pub marked: Vec<String>,
    /// Normalised tags taken out of this file.
    pub removed: Vec<String>,
}

/// Everything that applying one picture's change does.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct PicturePlan {
    pub picture: String,
    /// One per sidecar that changes; empty when nothing changes.
    pub edits: Vec<SidecarEdit>,
    /// Normalised tags asked to be added that the picture already carries (in any spelling).
    pub already_present: Vec<String>,
    /// Normalised tags asked to be removed that the picture does not carry.
    pub not_present: Vec<String>,
}

impl PicturePlan {
    pub fn is_empty(&self) -> bool {
        self.edits.is_empty()
    }
}

/// Knows the pictures of one collection and their sidecars (one crawl), and plans changes.
#[derive(Debug)]
pub struct Planner {
    root: PathBuf,
    pictures: HashMap<String, Candidate>,
    /// File names of the pictures of each folder (relative, `""` for the root).
    names_by_folder: HashMap<String, Vec<String>>,
    /// Pictures that claim each sidecar (relative paths).
    claims: HashMap<String, Vec<String>>,
    /// How the collection's sidecars spell each tag; read at the first plan that adds one.
    spellings: OnceLock<Spellings>,
}

/// Plans one change with a fresh crawl of `root`; use a [`Planner`] for many.
pub fn plan_edit(root: &Path, change: &TagChange) -> Result<PicturePlan, WritebackError> {
    Planner::new(root, &CrawlOptions::default())?.plan(change)
}

impl Planner {
    /// Crawls `root` once, with the same options a scan uses (so a store kept inside the
    /// collection is skipped alike).
    pub fn new(root: &Path, options: &CrawlOptions) -> Result<Planner, WritebackError> {
        let found = crawl(root, options)?;
        let mut planner = Planner {
            root: root.to_path_buf(),
            pictures: HashMap::new(),
            names_by_folder: HashMap::new(),
            claims: HashMap::new(),
            spellings: OnceLock::new(),
        };
        for candidate in found.candidates {
            let (folder, name) = split_rel(&candidate.rel_path);
            planner
                .names_by_folder
                .entry(folder.to_string())
                .or_default()
                .push(name.to_string());
            for sidecar in &candidate.sidecars {
                planner
                    .claims
                    .entry(sidecar.rel_path.clone())
                    .or_default()
                    .push(candidate.rel_path.clone());
            }
            planner
                .pictures
                .insert(candidate.rel_path.clone(), candidate);
        }
        Ok(planner)
    }

    /// The collection root this planner crawled.
    pub fn root(&self) -> &Path {
        &self.root
    }

    /// How the sidecars of the collection spell each tag (read once, at the first call).
    /// A sidecar that cannot be read is passed over here: planning a change to it fails
    /// with its own message anyway.
    pub fn spellings(&self) -> &Spellings {
        self.spellings.get_or_init(|| {
            let mut spellings = Spellings::default();
            for candidate in self.pictures.values() {
                let mut written: Vec<String> = Vec::new();
                for sidecar in &candidate.sidecars {
                    let path = self.root.join(&sidecar.rel_path);
                    let Ok(bytes) = std::fs::read(&path) else {
                        continue;
                    };
                    if parse_bytes(&path, &bytes, sidecar.kind).is_err() {
                        continue;
                    }
                    let text = String::from_utf8_lossy(&bytes);
                    match sidecar.kind {
                        SidecarKind::Text => {
                            written.extend(text_spellings(&text).into_iter().map(str::to_string))
                        }
                        SidecarKind::Xmp => written.extend(xmp_spellings(&text)),
                    }
                }
                spellings.add_picture(written.iter().map(String::as_str));
            }
            spellings
        })
    }

    /// The exact edits that bring the picture's tags to its current tags ∪ `add` − `remove`
    /// (under [`normalize_tag`]). An added tag is written in the collection's own spelling
    /// when its sidecars spell it at all ([`Spellings::to_write`]), else as the sheet has it. New tags go into every sidecar the picture has (so each
    /// sidecar stays a complete record of what was accepted), or into a new text sidecar when
    /// it has none; a removed tag comes out of every sidecar that holds it. Each new file is
    /// read back with the collection's readers before it is offered; any doubt is an error.
    pub fn plan(&self, change: &TagChange) -> Result<PicturePlan, WritebackError> {
        let candidate =
            self.pictures
                .get(&change.picture)
                .ok_or_else(|| WritebackError::PictureNotFound {
                    root: self.root.clone(),
                    picture: change.picture.clone(),
                })?;
        let mut current = Vec::with_capacity(candidate.sidecars.len());
        for sidecar in &candidate.sidecars {
            let path = self.root.join(&sidecar.rel_path);
            let (bytes, tags) = read_current(&path, sidecar.kind)?;
            current.push((sidecar, path, bytes, tags));
        }
        let carried: HashSet<&String> = current.iter().flat_map(|c| &c.3.tags).collect();

        let mut plan = PicturePlan {
            picture: change.picture.clone(),
            edits: Vec::new(),
            already_present: Vec::new(),
            not_present: Vec::new(),
        };
        // (normal, spelling, suggested); a tag both typed and accepted is the person's.
        let mut add: Vec<(String, String, bool)> = Vec::new();
        let typed = change.add.iter().map(|t| (t, false));
        for (typed, suggested) in typed.chain(change.accept.iter().map(|t| (t, true))) {
            let Some(normal) = normalize_tag(typed) else {
                continue;
            };
            if carried.contains(&normal) {
                push_unique(&mut plan.already_present, normal);
            } else if !add.iter().any(|(n, _, _)| *n == normal) {
                if let Some((normal, written)) = self.spellings().to_write(typed) {
                    add.push((normal, written, suggested));
                }
            }
        }
        let mut remove = HashSet::new();
        for spelling in &change.remove {
            let Some(normal) = normalize_tag(spelling) else {
                continue;
            };
            if carried.contains(&normal) {
                remove.insert(normal);
            } else {
                push_unique(&mut plan.not_present, normal);
            }
        }
        if add.is_empty() && remove.is_empty() {
            return Ok(plan);
        }
        let spellings: Vec<String> = add.iter().map(|(_, s, _)| s.clone()).collect();
        let marked: Vec<String> = add
            .iter()
            .filter(|(_, _, suggested)| *suggested)
            .map(|(_, s, _)| s.clone())
            .collect();
        let new_tags: Vec<NewTag> = add
            .iter()
            .map(|(_, spelling, suggested)| NewTag {
                spelling: spelling.clone(),
                suggested: *suggested,
            })
            .collect();

        if current.is_empty() {
            let (sidecar_rel, path) = self.new_sidecar_name(candidate)?;
            let mut after = NEW_FILE_HEADER.to_string();
            after.push_str(&edit_text("", &new_tags, &HashSet::new()));
            let edit = SidecarEdit {
                picture: change.picture.clone(),
                sidecar: path,
                sidecar_rel,
                kind: SidecarKind::Text,
                created: true,
                before: Vec::new(),
                after: after.into_bytes(),
                added: spellings,
                marked,
                removed: Vec::new(),
            };
            check_and_verify(&edit, &SidecarTags::default(), &add)?;
            plan.edits.push(edit);
            return Ok(plan);
        }

        for (sidecar, path, bytes, tags) in current {
            let removed: Vec<String> = tags
                .tags
                .iter()
                .filter(|t| remove.contains(*t))
                .cloned()
                .collect();
            if removed.is_empty() && spellings.is_empty() {
                continue;
            }
            let here_remove: HashSet<String> = removed.iter().cloned().collect();
            if is_symlink(&path) {
                return Err(WritebackError::Symlink { path });
            }
            let pictures = &self.claims[&sidecar.rel_path];
            if pictures.len() > 1 {
                return Err(WritebackError::SharedSidecar {
                    sidecar: path,
                    pictures: pictures.clone(),
                });
            }
            let before = String::from_utf8_lossy(&bytes);
            let after = match sidecar.kind {
                SidecarKind::Text => edit_text(&before, &new_tags, &here_remove),
                SidecarKind::Xmp => {
                    edit_xmp(&before, &new_tags, &here_remove).map_err(|problem| {
                        WritebackError::XmpNotEditable {
                            path: path.clone(),
                            problem,
                        }
                    })?
                }
            };
            let edit = SidecarEdit {
                picture: change.picture.clone(),
                sidecar: path,
                sidecar_rel: sidecar.rel_path.clone(),
                kind: sidecar.kind,
                created: false,
                before: bytes,
                after: after.into_bytes(),
                added: spellings.clone(),
                marked: marked.clone(),
                removed,
            };
            check_and_verify(&edit, &tags, &add)?;
            plan.edits.push(edit);
        }
        Ok(plan)
    }

    /// `STEM.txt` beside `STEM.EXT`, or `STEM.EXT.txt` when another picture of the folder
    /// would claim the short name too (the crawler pairs both forms) or the name is taken.
    fn new_sidecar_name(&self, candidate: &Candidate) -> Result<(String, PathBuf), WritebackError> {
        let (folder, name) = split_rel(&candidate.rel_path);
        let neighbours = self
            .names_by_folder
            .get(folder)
            .map_or(&[][..], Vec::as_slice);
        let mut tried = Vec::new();
        for base in [stem_of(name), name] {
            let file = format!("{base}.txt");
            if tried.contains(&file) {
                continue;
            }
            tried.push(file.clone());
            let claimants = neighbours
                .iter()
                .filter(|n| n.as_str() == base || stem_of(n) == base)
                .count();
            let path = candidate.path.with_file_name(&file);
            let free = matches!(std::fs::symlink_metadata(&path),
                Err(e) if e.kind() == std::io::ErrorKind::NotFound);
            if claimants == 1 && free && !base.is_empty() {
                let rel = if folder.is_empty() {
                    file
                } else {
                    format!("{folder}/{file}")
                };
                return Ok((rel, path));
            }
        }
        Err(WritebackError::NoSidecarName {
            picture: candidate.rel_path.clone(),
            tried,
        })
    }
}

/// The sidecar's bytes and tags, read with the collection's own reader (so a broken sidecar
/// fails with its usual message and is never written), from one consistent read.
fn read_current(path: &Path, kind: SidecarKind) -> Result<(Vec<u8>, SidecarTags), WritebackError> {
    let tags = read_sidecar(path, kind)?;
    let bytes = std::fs::read(path).map_err(WritebackError::io(path, "read"))?;
    match parse_bytes(path, &bytes, kind) {
        Ok(again) if again == tags => Ok((bytes, tags)),
        _ => Err(WritebackError::ChangedOnDisk {
            path: path.to_path_buf(),
        }),
    }
}

/// The tags (and accepted-suggestion marks) the collection would read from these bytes, with
/// the same limits as [`read_sidecar`], so a file that could not be read back is never written.
pub(crate) fn parse_bytes(
    path: &Path,
    bytes: &[u8],
    kind: SidecarKind,
) -> Result<SidecarTags, CollectionError> {
    let parsed = if bytes.len() as u64 > MAX_SIDECAR_BYTES {
        Err(CollectionError::TooLarge {
            size: bytes.len() as u64,
            limit: MAX_SIDECAR_BYTES,
        })
    } else {
        match kind {
            SidecarKind::Xmp => parse_xmp_marked(bytes),
            SidecarKind::Text => match bytes
                .split(|&b| b == b'\n')
                .position(|l| l.len() > MAX_TEXT_LINE_BYTES)
            {
                Some(line) => Err(CollectionError::LineTooLong {
                    line: line + 1,
                    limit: MAX_TEXT_LINE_BYTES,
                }),
                None => std::str::from_utf8(bytes)
                    .map(parse_text_marked)
                    .map_err(|e| CollectionError::NotUtf8 {
                        line: 1 + bytes[..e.valid_up_to()]
                            .iter()
                            .filter(|&&b| b == b'\n')
                            .count(),
                    }),
            },
        }
    };
    parsed.map_err(|problem| CollectionError::Sidecar {
        path: path.to_path_buf(),
        problem: Box::new(problem),
    })
}

/// Refuses tags the file's format cannot hold, then reads the new bytes back and requires
/// exactly `before` ∪ added − removed, and the accepted-suggestion marks of `before` − removed
/// ∪ the accepted suggestions added.
fn check_and_verify(
    edit: &SidecarEdit,
    before: &SidecarTags,
    add: &[(String, String, bool)],
) -> Result<(), WritebackError> {
    for (_, spelling, _) in add {
        let problem = if spelling.chars().any(char::is_control) {
            Some("it contains a control character (a line break or tab, perhaps); retype the tag")
        } else {
            match edit.kind {
                SidecarKind::Text => text_problem(spelling),
                SidecarKind::Xmp => xmp_problem(spelling),
            }
        };
        if let Some(why) = problem {
            return Err(WritebackError::Unrepresentable {
                path: edit.sidecar.clone(),
                tag: spelling.clone(),
                why,
            });
        }
    }
    let mut expected: BTreeSet<&str> = before.tags.iter().map(String::as_str).collect();
    expected.extend(add.iter().map(|(normal, _, _)| normal.as_str()));
    let mut expected_marks: BTreeSet<&str> = before.accepted.iter().map(String::as_str).collect();
    expected_marks.extend(
        add.iter()
            .filter(|a| a.2)
            .map(|(normal, _, _)| normal.as_str()),
    );
    for gone in &edit.removed {
        expected.remove(gone.as_str());
        expected_marks.remove(gone.as_str());
    }
    let unverified = |problem: String| WritebackError::Unverified {
        path: edit.sidecar.clone(),
        problem,
    };
    let read_back = parse_bytes(&edit.sidecar, &edit.after, edit.kind)
        .map_err(|e| unverified(format!("it would not read back: {e}")))?;
    let got: BTreeSet<&str> = read_back.tags.iter().map(String::as_str).collect();
    if got != expected {
        let missing: Vec<&str> = expected.difference(&got).copied().collect();
        let extra: Vec<&str> = got.difference(&expected).copied().collect();
        return Err(unverified(format!(
            "it would read back without [{}] and with [{}]; a keyword in qualified form \
             (rdf:value) is never edited",
            missing.join(", "),
            extra.join(", ")
        )));
    }
    let got_marks: BTreeSet<&str> = read_back.accepted.iter().map(String::as_str).collect();
    if got_marks != expected_marks {
        return Err(unverified(format!(
            "its accepted suggestions would read back as [{}], not [{}]",
            got_marks.into_iter().collect::<Vec<_>>().join(", "),
            expected_marks.into_iter().collect::<Vec<_>>().join(", ")
        )));
    }
    Ok(())
}

pub(crate) fn is_symlink(path: &Path) -> bool {
    std::fs::symlink_metadata(path).is_ok_and(|m| m.file_type().is_symlink())
}

fn push_unique(list: &mut Vec<String>, item: String) {
    if !list.contains(&item) {
        list.push(item);
    }
}

/// (`folder`, `name`) of a `/`-separated relative path; the folder is `""` at the root.
fn split_rel(rel: &str) -> (&str, &str) {
    rel.rsplit_once('/').unwrap_or(("", rel))
}

/// The name without its last extension, as the crawler computes it.
fn stem_of(name: &str) -> &str {
    Path::new(name)
        .file_stem()
        .and_then(|s| s.to_str())
        .unwrap_or(name)
}
