//! Walking a photo folder: which files are pictures, which are their sidecars, and what to
//! tell the user about the rest.

use std::collections::{BTreeMap, HashMap};
use std::fmt;
use std::fs;
use std::io::Read;
use std::path::{Path, PathBuf};

use walkdir::{DirEntry, WalkDir};

use crate::error::CollectionError;
use crate::item::{FileStamp, ImageFormat, SidecarKind, SidecarRef};

#[derive(Debug, Clone, Default)]
pub struct CrawlOptions {
    /// Off by default: a link can lead outside the collection or back into it.
    pub follow_symlinks: bool,
    /// Folders never entered, e.g. a store kept inside the collection under another name.
    pub skip_dirs: Vec<PathBuf>,
}

/// A picture found by [`crawl`], not yet read.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Candidate {
    pub path: PathBuf,
    /// Relative to the crawl root, `/`-separated.
    pub rel_path: String,
    pub format: ImageFormat,
    pub stamp: FileStamp,
    /// Text sidecars first, then XMP.
    pub sidecars: Vec<SidecarRef>,
}

#[derive(Debug, Clone, Default)]
pub struct Crawl {
    /// Sorted by `rel_path`.
    pub candidates: Vec<Candidate>,
    pub skipped: Vec<Skipped>,
    /// Files that neither are nor claim to be pictures or sidecars (notes, spreadsheets,
    /// scripts): left alone without complaint, counted for the summary.
    pub other_files: Vec<PathBuf>,
    pub notes: Vec<Note>,
}

/// A file left out, and why.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Skipped {
    pub path: PathBuf,
    pub reason: SkipReason,
}

#[derive(Debug, Clone, PartialEq, Eq)]
pub enum SkipReason {
    NotAnImage,
    EmptyFile,
    Unreadable(String),
    /// A followed link leads back into a folder above it.
    SymlinkLoop,
    SidecarWithoutPicture,
    BadSidecar {
        sidecar: PathBuf,
        problem: String,
    },
    /// Gone between the crawl and the read.
    Vanished,
    /// The path is not valid UTF-8, so it cannot be stored or shown faithfully.
    BadName,
    /// Looks like a picture but its pixels cannot be decoded; the text says why and what
    /// to do (it comes from the decoder, which names the file).
    BadPicture(String),
    /// Declares more pixels than the decoder's safety limit (a decompression bomb, or a
    /// giant scan); the text comes from the decoder, which names the file.
    TooLarge(String),
    /// A picture in a format not read yet (HEIC, AVIF); its sidecars stay unclaimed
    /// without being called orphans.
    NotSupportedYet(&'static str),
}

impl SkipReason {
    /// Short key for grouping skipped files in a summary.
    pub fn label(&self) -> &'static str {
        match self {
            SkipReason::NotAnImage => "not an image",
            SkipReason::EmptyFile => "empty file",
            SkipReason::Unreadable(_) => "unreadable",
            SkipReason::SymlinkLoop => "symlink loop",
            SkipReason::SidecarWithoutPicture => "sidecar without picture",
            SkipReason::BadSidecar { .. } => "bad sidecar",
            SkipReason::Vanished => "vanished",
            SkipReason::BadName => "bad file name",
            SkipReason::BadPicture(_) => "damaged picture",
            SkipReason::TooLarge(_) => "too large",
            SkipReason::NotSupportedYet(_) => "format not read yet",
        }
    }
}

impl fmt::Display for Skipped {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let path = self.path.display();
        match &self.reason {
            SkipReason::NotAnImage => write!(
                f,
                "{path}: skipped, not a picture (its first bytes are not JPEG, PNG, GIF, WebP, TIFF, BMP \
                 or a camera RAW); if it should be one, re-export it from the original"
            ),
            SkipReason::NotSupportedYet(format) => write!(
                f,
                "{path}: skipped, {format} pictures are not read yet; to include this one, save a \
                 JPEG copy of it under the same name (NAME.jpg) and its tag files pair with that"
            ),
            SkipReason::EmptyFile => {
                write!(f, "{path}: skipped, the file is empty; restore it from a backup or delete it")
            }
            SkipReason::Unreadable(why) => {
                write!(f, "{path}: skipped, cannot be read ({why}); check that you may read it")
            }
            SkipReason::SymlinkLoop => write!(
                f,
                "{path}: skipped, this link leads back into a folder that contains it; \
                 remove the link or scan without following links"
            ),
            SkipReason::SidecarWithoutPicture => write!(
                f,
                "{path}: tag file with no picture of the same name beside it; \
                 rename it to match its picture (NAME.txt or NAME.xmp beside NAME.jpg) or remove it"
            ),
            SkipReason::BadSidecar { sidecar, problem } => write!(
                f,
                "{path}: skipped, its sidecar {} cannot be used: {problem}",
                sidecar.display()
            ),
            SkipReason::Vanished => {
                write!(f, "{path}: skipped, it disappeared during the scan; scan again")
            }
            SkipReason::BadName => write!(
                f,
                "{path}: skipped, its name is not valid UTF-8; rename it"
            ),
            SkipReason::BadPicture(why) | SkipReason::TooLarge(why) => write!(f, "skipped: {why}"),
        }
    }
}

/// Something worth telling the user that does not stop a file from being used.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Note {
    pub path: PathBuf,
    pub message: String,
}

/// Lists the pictures under `root` with their sidecars. Only a missing or unreadable root
/// is an error; every other problem becomes a [`Skipped`] entry, so one bad file never
/// stops a scan.
pub fn crawl(root: &Path, options: &CrawlOptions) -> Result<Crawl, CollectionError> {
    let unreadable = |source| CollectionError::RootUnreadable {
        root: root.to_path_buf(),
        source,
    };
    if !fs::metadata(root).map_err(unreadable)?.is_dir() {
        return Err(CollectionError::RootNotFolder {
            root: root.to_path_buf(),
        });
    }
    fs::read_dir(root).map_err(unreadable)?;

    let skip_dirs: Vec<PathBuf> = options
        .skip_dirs
        .iter()
        .map(|d| d.canonicalize().unwrap_or_else(|_| d.clone()))
        .collect();
    let walker = WalkDir::new(root)
        .follow_links(options.follow_symlinks)
        .sort_by_file_name()
        .into_iter()
        .filter_entry(|e| e.depth() == 0 || !(is_hidden(e) || is_skipped_dir(e, &skip_dirs)));

    let mut crawl = Crawl::default();
    let mut folders: BTreeMap<PathBuf, Vec<(Found, Class)>> = BTreeMap::new();
    for entry in walker {
        let entry = match entry {
            Ok(entry) => entry,
            Err(err) => {
                let reason = if err.loop_ancestor().is_some() {
                    SkipReason::SymlinkLoop
                } else {
                    SkipReason::Unreadable(
                        err.io_error()
                            .map_or_else(|| err.to_string(), ToString::to_string),
                    )
                };
                let path = err.path().unwrap_or(root).to_path_buf();
                crawl.skipped.push(Skipped { path, reason });
                continue;
            }
        };
        let file_type = entry.file_type();
        if file_type.is_dir() {
            continue;
        }
        if file_type.is_symlink() {
            crawl.notes.push(Note {
                path: entry.path().to_path_buf(),
                message: "symbolic link not followed; scan with links followed to include it"
                    .into(),
            });
            continue;
        }
        match examine(root, &entry) {
            Ok(found) => {
                let folder = entry.path().parent().unwrap_or(root).to_path_buf();
                folders.entry(folder).or_default().push(found);
            }
            Err(skipped) => crawl.skipped.push(skipped),
        }
    }
    for files in folders.into_values() {
        pair_folder(files, &mut crawl);
    }
    crawl.candidates.sort_by(|a, b| a.rel_path.cmp(&b.rel_path));
    crawl.skipped.sort_by(|a, b| a.path.cmp(&b.path));
    crawl.notes.sort_by(|a, b| a.path.cmp(&b.path));
    crawl.other_files.sort();
    Ok(crawl)
}

/// Hidden names are skipped silently; this also keeps out the store folder `.tagweave`.
fn is_hidden(entry: &DirEntry) -> bool {
    entry.file_name().as_encoded_bytes().starts_with(b".")
}

fn is_skipped_dir(entry: &DirEntry, skip_dirs: &[PathBuf]) -> bool {
    !skip_dirs.is_empty()
        && entry.file_type().is_dir()
        && entry
            .path()
            .canonicalize()
            .is_ok_and(|p| skip_dirs.contains(&p))
}

/// A file kept for pairing.
struct Found {
    path: PathBuf,
    rel_path: String,
    name: String,
    stamp: FileStamp,
}

/// What a file is, by its content (and, for sidecars, by its name).
enum Class {
    Picture(ImageFormat),
    /// A picture of a format not read yet, named for the message.
    NotYet(&'static str),
    Sidecar {
        kind: SidecarKind,
        base: String,
    },
    /// Neither a picture nor named like one or like a sidecar.
    Other,
}

fn examine(root: &Path, entry: &DirEntry) -> Result<(Found, Class), Skipped> {
    let path = entry.path();
    let skipped = |reason| Skipped {
        path: path.to_path_buf(),
        reason,
    };
    if !entry.file_type().is_file() {
        // Devices, sockets, pipes: never opened (reading a pipe could block forever).
        return Err(skipped(SkipReason::NotAnImage));
    }
    let (Some(rel_path), Some(name)) = (rel_path_of(root, path), entry.file_name().to_str()) else {
        return Err(skipped(SkipReason::BadName));
    };
    let metadata = entry
        .metadata()
        .map_err(|e| skipped(SkipReason::Unreadable(e.to_string())))?;
    let stamp = FileStamp::from_metadata(&metadata);
    let class = match (sniff(path, name), sidecar_name(name)) {
        // A sidecar's name wins over its first bytes: a tag list starting "BMX" or "GIF89a"
        // is still a tag list. A sidecar we cannot open still belongs to its picture:
        // reading the item then fails loudly instead of the picture silently losing its tags.
        (_, Some((kind, base))) => Class::Sidecar {
            kind,
            base: base.to_string(),
        },
        (Ok(Some(Sniffed::Picture(format))), None) => Class::Picture(format),
        (Ok(Some(Sniffed::NotYet(format))), None) => Class::NotYet(format),
        (Err(e), None) => return Err(skipped(SkipReason::Unreadable(e.to_string()))),
        (Ok(None), None) if !has_picture_extension(name) => Class::Other,
        (Ok(None), None) if metadata.len() == 0 => return Err(skipped(SkipReason::EmptyFile)),
        (Ok(None), None) => return Err(skipped(SkipReason::NotAnImage)),
    };
    Ok((
        Found {
            path: path.to_path_buf(),
            rel_path,
            name: name.to_string(),
            stamp,
        },
        class,
    ))
}

/// Names that promise a picture: such a file that is not one is worth telling the user about.
fn has_picture_extension(name: &str) -> bool {
    const PICTURE_EXTENSIONS: [&str; 20] = [
        "jpg", "jpeg", "jpe", "png", "gif", "webp", "tif", "tiff", "bmp", "heic", "heif", "avif",
        "dng", "cr2", "nef", "arw", "orf", "rw2", "pef", "raw",
    ];
    name.rsplit_once('.').is_some_and(|(_, ext)| {
        PICTURE_EXTENSIONS
            .iter()
            .any(|known| ext.eq_ignore_ascii_case(known))
    })
}

fn rel_path_of(root: &Path, path: &Path) -> Option<String> {
    let parts: Option<Vec<&str>> = path
        .strip_prefix(root)
        .ok()?
        .components()
        .map(|c| c.as_os_str().to_str())
        .collect();
    Some(parts?.join("/"))
}

/// `NAME.txt` / `NAME.xmp` in any letter case, with `NAME` returned for matching.
fn sidecar_name(name: &str) -> Option<(SidecarKind, &str)> {
    let (base, ext) = name.rsplit_once('.')?;
    let kind = if ext.eq_ignore_ascii_case("txt") {
        SidecarKind::Text
    } else if ext.eq_ignore_ascii_case("xmp") {
        SidecarKind::Xmp
    } else {
        return None;
    };
    (!base.is_empty()).then_some((kind, base))
}

/// What the first bytes (and, for a TIFF header, the name) say a file is.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Sniffed {
    Picture(ImageFormat),
    NotYet(&'static str),
}

fn sniff(path: &Path, name: &str) -> std::io::Result<Option<Sniffed>> {
    let mut head = Vec::with_capacity(12);
    fs::File::open(path)?.take(12).read_to_end(&mut head)?;
    Ok(format_of(&head, name))
}

/// Magic numbers from each format's own specification (JPEG SOI + marker, PNG signature,
/// GIF header, RIFF/WEBP container, TIFF byte-order mark + 42, BMP file header, ISO BMFF
/// `ftyp` box with a HEIF or AVIF brand). A TIFF header on a file named like a TIFF-based
/// camera RAW is that RAW; ORF and RW2 put their own number in place of 42.
fn format_of(head: &[u8], name: &str) -> Option<Sniffed> {
    const PNG: &[u8] = b"\x89PNG\r\n\x1a\n";
    let picture = |format| Some(Sniffed::Picture(format));
    match head {
        [0xFF, 0xD8, 0xFF, ..] => picture(ImageFormat::Jpeg),
        h if h.starts_with(PNG) => picture(ImageFormat::Png),
        h if h.starts_with(b"GIF87a") || h.starts_with(b"GIF89a") => picture(ImageFormat::Gif),
        h if h.len() >= 12 && h.starts_with(b"RIFF") && &h[8..12] == b"WEBP" => {
            picture(ImageFormat::Webp)
        }
        // source: ExifTool 12.57, Image/ExifTool.pm DoProcessTIFF ("identifier is 0x2a for
        // TIFF, RW2/RWL=0x55, ORF=0x4f52/0x5352").
        h if h.starts_with(b"IIRO") || h.starts_with(b"IIRS") || h.starts_with(b"MMOR") => {
            picture(ImageFormat::Orf)
        }
        h if h.starts_with(b"IIU\0") => picture(ImageFormat::Rw2),
        h if h.starts_with(b"II*\0") || h.starts_with(b"MM\0*") => {
            picture(tiff_raw_by_name(name).unwrap_or(ImageFormat::Tiff))
        }
        h if h.starts_with(b"BM") => picture(ImageFormat::Bmp),
        // ISO/IEC 14496-12 `ftyp` box: size, "ftyp", major brand (ISO/IEC 23008-12 HEIF
        // brands; "avif"/"avis" from the AV1 Image File Format specification).
        h if h.len() >= 12 && &h[4..8] == b"ftyp" => match &h[8..12] {
            b"heic" | b"heix" | b"heim" | b"heis" | b"hevc" | b"hevx" | b"mif1" | b"msf1" => {
                Some(Sniffed::NotYet("HEIC"))
            }
            b"avif" | b"avis" => Some(Sniffed::NotYet("AVIF")),
            _ => None,
        },
        _ => None,
    }
}

/// The TIFF-based camera RAW a file's extension names, if any.
fn tiff_raw_by_name(name: &str) -> Option<ImageFormat> {
    let (_, ext) = name.rsplit_once('.')?;
    [
        ImageFormat::Dng,
        ImageFormat::Cr2,
        ImageFormat::Nef,
        ImageFormat::Arw,
        ImageFormat::Pef,
    ]
    .into_iter()
    .find(|f| {
        usual_extensions(*f)
            .iter()
            .any(|u| ext.eq_ignore_ascii_case(u))
    })
}

fn usual_extensions(format: ImageFormat) -> &'static [&'static str] {
    match format {
        ImageFormat::Jpeg => &["jpg", "jpeg", "jpe", "jfif"],
        ImageFormat::Png => &["png"],
        ImageFormat::Gif => &["gif"],
        ImageFormat::Webp => &["webp"],
        ImageFormat::Tiff => &["tif", "tiff"],
        ImageFormat::Bmp => &["bmp", "dib"],
        ImageFormat::Dng => &["dng"],
        ImageFormat::Cr2 => &["cr2"],
        ImageFormat::Nef => &["nef", "nrw"],
        ImageFormat::Arw => &["arw"],
        ImageFormat::Orf => &["orf"],
        // Older Panasonic cameras name the same container .RAW, Leica .RWL.
        ImageFormat::Rw2 => &["rw2", "raw", "rwl"],
        ImageFormat::Pef => &["pef"],
    }
}

/// Attaches sidecars to the pictures of one folder; reports the sidecars nobody claims and
/// sets the other files aside.
fn pair_folder(files: Vec<(Found, Class)>, crawl: &mut Crawl) {
    let mut pictures = Vec::new();
    let mut sidecars = Vec::new();
    let mut not_yet = Vec::new();
    for (found, class) in files {
        match class {
            Class::Picture(format) => pictures.push((found, format)),
            Class::NotYet(format) => {
                crawl.skipped.push(Skipped {
                    path: found.path.clone(),
                    reason: SkipReason::NotSupportedYet(format),
                });
                not_yet.push(found.name);
            }
            Class::Sidecar { kind, base } => sidecars.push((found, kind, base)),
            Class::Other => crawl.other_files.push(found.path),
        }
    }
    let mut by_base: HashMap<&str, Vec<usize>> = HashMap::new();
    for (i, (_, _, base)) in sidecars.iter().enumerate() {
        by_base.entry(base).or_default().push(i);
    }
    let mut claimed_by: Vec<Vec<&str>> = vec![Vec::new(); sidecars.len()];
    for (picture, format) in &pictures {
        note_extension(picture, *format, crawl);
        let name = picture.name.as_str();
        let stem = Path::new(name)
            .file_stem()
            .and_then(|s| s.to_str())
            .unwrap_or(name);
        // `NAME.txt` and `NAME.EXT.txt` both count; text before XMP, then by file name.
        let mut matched: Vec<usize> = [stem, name]
            .iter()
            .flat_map(|key| by_base.get(key).into_iter().flatten().copied())
            .collect();
        matched.sort_by_key(|&i| (sidecars[i].1 == SidecarKind::Xmp, i));
        matched.dedup();
        let mut refs = Vec::with_capacity(matched.len());
        for i in matched {
            let (sidecar, kind, _) = &sidecars[i];
            claimed_by[i].push(name);
            refs.push(SidecarRef {
                rel_path: sidecar.rel_path.clone(),
                kind: *kind,
                stamp: sidecar.stamp,
            });
        }
        crawl.candidates.push(Candidate {
            path: picture.path.clone(),
            rel_path: picture.rel_path.clone(),
            format: *format,
            stamp: picture.stamp,
            sidecars: refs,
        });
    }
    // A sidecar of a picture we cannot read yet belongs to it: not an orphan to rename.
    let beside_not_yet = |base: &str| {
        not_yet.iter().any(|name| {
            let stem = Path::new(name).file_stem().and_then(|s| s.to_str());
            name == base || stem == Some(base)
        })
    };
    for ((sidecar, _, base), claimants) in sidecars.iter().zip(&claimed_by) {
        match claimants.len() {
            0 if beside_not_yet(base) => {}
            0 => crawl.skipped.push(Skipped {
                path: sidecar.path.clone(),
                reason: SkipReason::SidecarWithoutPicture,
            }),
            1 => {}
            _ => crawl.notes.push(Note {
                path: sidecar.path.clone(),
                message: format!(
                    "{} holds the tags of every picture named like it ({}); to tag them apart, \
                     name each sidecar after its whole picture name, e.g. {}.txt",
                    sidecar.name,
                    claimants.join(", "),
                    claimants[0]
                ),
            }),
        }
    }
}

fn note_extension(picture: &Found, format: ImageFormat, crawl: &mut Crawl) {
    let ext = Path::new(&picture.name)
        .extension()
        .and_then(|e| e.to_str());
    let fits = ext.is_some_and(|e| {
        usual_extensions(format)
            .iter()
            .any(|u| e.eq_ignore_ascii_case(u))
    });
    if !fits {
        let shown = ext.map_or_else(
            || "has no extension".to_string(),
            |e| format!("ends in .{e}"),
        );
        crawl.notes.push(Note {
            path: picture.path.clone(),
            message: format!(
                "content is {0} but the name {shown}; read as {0}",
                format.name()
            ),
        });
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::test_support::{put, GIF, JPEG, PNG, WEBP};

    fn rel_paths(crawl: &Crawl) -> Vec<&str> {
        crawl
            .candidates
            .iter()
            .map(|c| c.rel_path.as_str())
            .collect()
    }

    fn candidate<'a>(crawl: &'a Crawl, rel: &str) -> &'a Candidate {
        crawl.candidates.iter().find(|c| c.rel_path == rel).unwrap()
    }

    fn sidecar_names(c: &Candidate) -> Vec<(&str, SidecarKind)> {
        c.sidecars
            .iter()
            .map(|s| (s.rel_path.as_str(), s.kind))
            .collect()
    }

    fn skipped_as(crawl: &Crawl, root: &Path) -> Vec<(String, &'static str)> {
        crawl
            .skipped
            .iter()
            .map(|s| {
                (
                    s.path.strip_prefix(root).unwrap().display().to_string(),
                    s.reason.label(),
                )
            })
            .collect()
    }

    fn notes_on<'a>(crawl: &'a Crawl, path: &Path) -> Vec<&'a str> {
        crawl
            .notes
            .iter()
            .filter(|n| n.path == path)
            .map(|n| n.message.as_str())
            .collect()
    }

    #[test]
    fn classifies_by_content_and_pairs_sidecars() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path();
        put(root, "a.jpg", JPEG);
        put(root, "a.txt", b"boat");
        put(root, "b.png", PNG);
        put(root, "b.xmp", b"<x/>");
        put(root, "b.txt", b"dusk");
        put(root, "sub/c.gif", GIF);
        put(root, "sub/deeper/d.webp", WEBP);
        put(root, "e.jpg", JPEG);
        put(root, "e.jpg.xmp", b"<x/>");
        put(root, "F.JPG", JPEG);
        put(root, "F.TXT", b"upper");
        put(root, "g.jpg", JPEG);
        put(root, "g.txt", b"BMX\nGIF89a\n"); // tags that begin like picture signatures
        let wrong = put(root, "wrong.jpg", PNG);
        let bare = put(root, "noext", JPEG);
        put(root, "empty.jpg", b"");
        put(root, "fake.jpg", b"this is just text\n");
        put(root, "README.md", b"# about\n");
        put(root, "list.csv", b"a,b\n");
        put(root, "orphan.txt", b"lonely");
        put(root, "orphan2.XMP", b"<x/>");
        put(root, "empty-sidecar.jpg", JPEG);
        put(root, "empty-sidecar.txt", b"");
        put(root, ".hidden/h.jpg", JPEG);
        put(root, ".tagweave/store.jpg", JPEG);
        put(root, ".dot.jpg", JPEG);

        let crawl = crawl(root, &CrawlOptions::default()).unwrap();
        assert_eq!(
            rel_paths(&crawl),
            [
                "F.JPG",
                "a.jpg",
                "b.png",
                "e.jpg",
                "empty-sidecar.jpg",
                "g.jpg",
                "noext",
                "sub/c.gif",
                "sub/deeper/d.webp",
                "wrong.jpg"
            ]
        );
        assert_eq!(
            sidecar_names(candidate(&crawl, "a.jpg")),
            [("a.txt", SidecarKind::Text)]
        );
        assert_eq!(
            sidecar_names(candidate(&crawl, "g.jpg")),
            [("g.txt", SidecarKind::Text)],
            "a sidecar is known by its name, whatever its first bytes look like"
        );
        assert_eq!(
            sidecar_names(candidate(&crawl, "b.png")),
            [("b.txt", SidecarKind::Text), ("b.xmp", SidecarKind::Xmp)]
        );
        assert_eq!(
            sidecar_names(candidate(&crawl, "e.jpg")),
            [("e.jpg.xmp", SidecarKind::Xmp)]
        );
        assert_eq!(
            sidecar_names(candidate(&crawl, "F.JPG")),
            [("F.TXT", SidecarKind::Text)]
        );
        assert_eq!(
            candidate(&crawl, "sub/deeper/d.webp").format,
            ImageFormat::Webp
        );
        assert_eq!(candidate(&crawl, "wrong.jpg").format, ImageFormat::Png);
        assert_eq!(candidate(&crawl, "noext").format, ImageFormat::Jpeg);
        assert_eq!(candidate(&crawl, "a.jpg").stamp.size, JPEG.len() as u64);

        assert_eq!(
            skipped_as(&crawl, root),
            [
                ("empty.jpg".to_string(), "empty file"),
                ("fake.jpg".to_string(), "not an image"),
                ("orphan.txt".to_string(), "sidecar without picture"),
                ("orphan2.XMP".to_string(), "sidecar without picture"),
            ]
        );
        assert_eq!(
            notes_on(&crawl, &wrong),
            ["content is PNG but the name ends in .jpg; read as PNG"]
        );
        assert_eq!(
            notes_on(&crawl, &bare),
            ["content is JPEG but the name has no extension; read as JPEG"]
        );
        assert_eq!(crawl.notes.len(), 2, "{:?}", crawl.notes);
        let others: Vec<_> = crawl
            .other_files
            .iter()
            .map(|p| p.strip_prefix(root).unwrap().to_string_lossy().into_owned())
            .collect();
        assert_eq!(
            others,
            ["README.md", "list.csv"],
            "left alone, not complained about"
        );
        let message = crawl.skipped[0].to_string();
        assert!(
            message.contains("empty.jpg") && message.contains("empty"),
            "{message}"
        );
    }

    #[test]
    fn same_stem_pictures_share_a_sidecar_with_a_note() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path();
        put(root, "s.jpg", JPEG);
        put(root, "s.png", PNG);
        let shared = put(root, "s.txt", b"twin");
        let crawl = crawl(root, &CrawlOptions::default()).unwrap();
        for rel in ["s.jpg", "s.png"] {
            assert_eq!(
                sidecar_names(candidate(&crawl, rel)),
                [("s.txt", SidecarKind::Text)]
            );
        }
        let notes = notes_on(&crawl, &shared);
        assert_eq!(notes.len(), 1);
        assert!(notes[0].contains("s.jpg, s.png"), "{}", notes[0]);
        assert!(crawl.skipped.is_empty());
    }

    #[test]
    fn skip_dirs_are_not_entered() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path();
        put(root, "keep/k.jpg", JPEG);
        put(root, "store/cache.jpg", JPEG);
        put(root, "store/junk.bin", b"x");
        let options = CrawlOptions {
            skip_dirs: vec![root.join("keep/../store")],
            ..Default::default()
        };
        let crawl = crawl(root, &options).unwrap();
        assert_eq!(rel_paths(&crawl), ["keep/k.jpg"]);
        assert!(crawl.skipped.is_empty());
    }

    #[test]
    fn root_problems_are_errors() {
        let dir = tempfile::tempdir().unwrap();
        let missing = dir.path().join("nope");
        let err = crawl(&missing, &CrawlOptions::default()).unwrap_err();
        assert!(matches!(err, CollectionError::RootUnreadable { .. }));
        assert!(err.to_string().contains("nope"));
        let file = put(dir.path(), "file.jpg", JPEG);
        assert!(matches!(
            crawl(&file, &CrawlOptions::default()),
            Err(CollectionError::RootNotFolder { .. })
        ));
    }

    #[test]
    fn hidden_root_is_still_crawled() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path().join(".photos");
        put(&root, "p.jpg", JPEG);
        assert_eq!(
            rel_paths(&crawl(&root, &CrawlOptions::default()).unwrap()),
            ["p.jpg"]
        );
    }

    #[cfg(unix)]
    #[test]
    fn symlink_loops_are_reported_only_when_following() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path();
        put(root, "sub/p.jpg", JPEG);
        let link = root.join("sub/loop");
        std::os::unix::fs::symlink(root, &link).unwrap();
        std::os::unix::fs::symlink(root.join("nowhere.jpg"), root.join("broken.jpg")).unwrap();

        let plain = crawl(root, &CrawlOptions::default()).unwrap();
        assert_eq!(rel_paths(&plain), ["sub/p.jpg"]);
        assert!(plain.skipped.is_empty());
        assert_eq!(notes_on(&plain, &link).len(), 1);
        assert_eq!(plain.notes.len(), 2, "both links noted, neither followed");

        let following = crawl(
            root,
            &CrawlOptions {
                follow_symlinks: true,
                ..Default::default()
            },
        )
        .unwrap();
        assert_eq!(rel_paths(&following), ["sub/p.jpg"]);
        assert_eq!(
            skipped_as(&following, root),
            [
                ("broken.jpg".to_string(), "unreadable"),
                ("sub/loop".to_string(), "symlink loop")
            ]
        );
    }

    #[cfg(unix)]
    #[test]
    fn unreadable_file_is_skipped() {
        use std::os::unix::fs::PermissionsExt;
        let dir = tempfile::tempdir().unwrap();
        if crate::test_support::running_as_root(dir.path()) {
            eprintln!("skipped: running as root, a mode-000 file is still readable");
            return;
        }
        let locked = put(dir.path(), "locked.jpg", JPEG);
        std::fs::set_permissions(&locked, std::fs::Permissions::from_mode(0o000)).unwrap();
        let crawl = crawl(dir.path(), &CrawlOptions::default()).unwrap();
        assert_eq!(
            skipped_as(&crawl, dir.path()),
            [("locked.jpg".to_string(), "unreadable")]
        );
    }

    #[cfg(unix)]
    #[test]
    fn non_utf8_name_is_skipped() {
        use std::os::unix::ffi::OsStrExt;
        let dir = tempfile::tempdir().unwrap();
        let name = std::ffi::OsStr::from_bytes(b"caf\xe9.jpg");
        std::fs::write(dir.path().join(name), JPEG).unwrap();
        let crawl = crawl(dir.path(), &CrawlOptions::default()).unwrap();
        assert!(crawl.candidates.is_empty());
        assert_eq!(crawl.skipped.len(), 1);
        assert_eq!(crawl.skipped[0].reason, SkipReason::BadName);
    }

    #[test]
    fn sniffing_signatures() {
        let pic = |head: &[u8]| match format_of(head, "x") {
            Some(Sniffed::Picture(format)) => Some(format),
            _ => None,
        };
        // source: the formats' own specifications (JPEG T.81 SOI marker FFD8 then a marker
        // FFxx; PNG spec section 5.2 signature; GIF89a header; RIFF "WEBP" form type;
        // TIFF 6.0 header "II" or "MM" then 42; BMP "BM" file header).
        assert_eq!(pic(b"\xFF\xD8\xFF\xDB"), Some(ImageFormat::Jpeg));
        assert_eq!(pic(b"\x89PNG\r\n\x1a\n"), Some(ImageFormat::Png));
        assert_eq!(pic(b"\x89PNG\r\n\x1a"), None);
        assert_eq!(pic(b"GIF87a"), Some(ImageFormat::Gif));
        assert_eq!(pic(b"RIFF\0\0\0\0WEBP"), Some(ImageFormat::Webp));
        assert_eq!(pic(b"RIFF\0\0\0\0WAVE"), None);
        assert_eq!(pic(b"II*\0\x08\0\0\0"), Some(ImageFormat::Tiff));
        assert_eq!(pic(b"MM\0*\0\0\0\x08"), Some(ImageFormat::Tiff));
        assert_eq!(pic(b"BM6\0\0\0"), Some(ImageFormat::Bmp));
        assert_eq!(pic(b"\xFF\xD8"), None);
        assert_eq!(pic(b""), None);
        // source: ExifTool 12.57, Image/ExifTool.pm DoProcessTIFF (ORF 0x4F52 "RO" or
        // 0x5352 "RS", RW2 0x55 in place of 42; CR2, NEF, DNG… keep 42).
        assert_eq!(pic(b"IIRO\x08\0\0\0"), Some(ImageFormat::Orf));
        assert_eq!(pic(b"IIRS\x08\0\0\0"), Some(ImageFormat::Orf));
        assert_eq!(pic(b"MMOR\0\0\0\x08"), Some(ImageFormat::Orf));
        assert_eq!(pic(b"IIU\0\x18\0\0\0"), Some(ImageFormat::Rw2));
        let tiff = b"II*\0\x10\0\0\0CR\x02\0";
        for (name, format) in [
            ("a.CR2", ImageFormat::Cr2),
            ("a.dng", ImageFormat::Dng),
            ("a.NEF", ImageFormat::Nef),
            ("a.arw", ImageFormat::Arw),
            ("a.pef", ImageFormat::Pef),
            ("a.tif", ImageFormat::Tiff),
            ("cr2", ImageFormat::Tiff),
        ] {
            assert_eq!(
                format_of(tiff, name),
                Some(Sniffed::Picture(format)),
                "{name}"
            );
        }
        // source: ISO/IEC 14496-12 ftyp box; brands from ISO/IEC 23008-12 (HEIF) and the
        // AV1 Image File Format (AVIF) specification.
        assert_eq!(
            format_of(b"\0\0\0\x18ftypheic", "a"),
            Some(Sniffed::NotYet("HEIC"))
        );
        assert_eq!(
            format_of(b"\0\0\0\x1cftypavif", "a"),
            Some(Sniffed::NotYet("AVIF"))
        );
        assert_eq!(format_of(b"\0\0\0\x18ftypisom", "a.mp4"), None);
    }

    #[test]
    fn camera_raw_pairs_its_sidecars_and_heic_keeps_its_own() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path();
        let raw = |name| {
            std::fs::read(
                Path::new(env!("CARGO_MANIFEST_DIR"))
                    .join("testdata/raw")
                    .join(name),
            )
            .unwrap()
        };
        put(root, "real.CR2", &raw("preview.cr2"));
        put(root, "real.txt", b"harbour\n");
        put(root, "shot.orf", &raw("preview.orf"));
        put(root, "shot.orf.xmp", b"<x/>");
        let heic = put(root, "phone.heic", b"\0\0\0\x18ftypheic\0\0\0\0mif1heic");
        put(root, "phone.txt", b"beach\n");
        let avif = put(root, "web.avif", b"\0\0\0\x1cftypavif\0\0\0\0avifmif1");
        let fake = put(root, "fake.cr2", b"not a raw at all");
        let crawl = crawl(root, &CrawlOptions::default()).unwrap();
        assert_eq!(rel_paths(&crawl), ["real.CR2", "shot.orf"]);
        assert_eq!(candidate(&crawl, "real.CR2").format, ImageFormat::Cr2);
        assert_eq!(
            sidecar_names(candidate(&crawl, "real.CR2")),
            [("real.txt", SidecarKind::Text)]
        );
        assert_eq!(
            sidecar_names(candidate(&crawl, "shot.orf")),
            [("shot.orf.xmp", SidecarKind::Xmp)]
        );
        assert!(crawl.other_files.is_empty(), "{:?}", crawl.other_files);
        assert!(crawl.notes.is_empty(), "{:?}", crawl.notes);
        assert_eq!(
            skipped_as(&crawl, root),
            [
                ("fake.cr2".to_string(), "not an image"),
                ("phone.heic".to_string(), "format not read yet"),
                ("web.avif".to_string(), "format not read yet"),
            ],
            "phone.txt is phone.heic's, not an orphan"
        );
        let said: Vec<String> = crawl.skipped.iter().map(ToString::to_string).collect();
        assert!(said[0].contains(&*fake.to_string_lossy()), "{said:?}");
        assert!(
            said[1].contains(&*heic.to_string_lossy())
                && said[1].contains("HEIC pictures are not read yet"),
            "{said:?}"
        );
        assert!(said[2].contains(&*avif.to_string_lossy()) && said[2].contains("AVIF"));
    }
}
