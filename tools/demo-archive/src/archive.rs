//! Lays the pictures out as an archive would hold them: subfolders, mixed formats, text and
//! XMP sidecars (some missing, some incomplete, some wrong), plus the ground truth.

use crate::paint::{paint, Finish};
use crate::scene::{pick, Scene, SEASONS, SUBJECTS, TIMES, WEATHERS};
use crate::Error;
use image::codecs::jpeg::JpegEncoder;
use image::codecs::png::{CompressionType, FilterType, PngEncoder};
use image::RgbImage;
use rand::seq::{IndexedRandom, SliceRandom};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use std::fs;
use std::path::Path;

/// Subfolders and how often a picture lands in each.
const FOLDERS: [(&str, u32); 4] = [
    ("1950s", 25),
    ("1970s", 30),
    ("1990s", 25),
    ("harbour-office", 20),
];
/// Every generated picture and sidecar starts with this; stale ones are removed by it.
const STEM: &str = "saltmarrow-";
const OWNED_EXTENSIONS: [&str; 4] = ["jpg", "png", "txt", "xmp"];
const DC: &str = "http://purl.org/dc/elements/1.1/";
const RDF: &str = "http://www.w3.org/1999/02/22-rdf-syntax-ns#";
pub const TRUTH_HEADER: &str =
    "file,sidecar,time_of_day,weather,season,subjects,true_tags,written_tags,removed_tags,false_tags";

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Sidecar {
    Text,
    Xmp,
    Missing,
}

impl Sidecar {
    fn label(self) -> &'static str {
        match self {
            Sidecar::Text => "txt",
            Sidecar::Xmp => "xmp",
            Sidecar::Missing => "none",
        }
    }
}

/// Counts for the closing summary line.
#[derive(Debug, Default, PartialEq, Eq)]
pub struct Summary {
    pub jpeg: usize,
    pub png: usize,
    pub text: usize,
    pub xmp: usize,
    pub untagged: usize,
    pub removed: usize,
    pub false_tags: usize,
}

/// One picture's plan: everything the truth file records.
struct Item {
    file: String,
    scene: Scene,
    sidecar: Sidecar,
    true_tags: Vec<&'static str>,
    written: Vec<&'static str>,
    removed: Option<&'static str>,
    false_tag: Option<&'static str>,
}

/// Writes `count` pictures with their sidecars into `out`, then README.md and TRUTH.csv.
/// Each picture draws from its own ChaCha stream, so picture n is the same whatever `count` is.
pub fn generate(out: &Path, seed: u64, count: usize) -> Result<Summary, Error> {
    remove_stale(out)?;
    let mut items = Vec::with_capacity(count);
    let mut summary = Summary::default();
    for n in 1..=count {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        rng.set_stream(n as u64);
        let item = make_item(out, n, &mut rng, &mut summary)?;
        items.push(item);
    }
    items.sort_by(|a, b| a.file.cmp(&b.file));
    write(&out.join("README.md"), readme(seed, count).as_bytes())?;
    write(&out.join("TRUTH.csv"), truth_csv(&items).as_bytes())?;
    Ok(summary)
}

fn make_item(
    out: &Path,
    n: usize,
    rng: &mut ChaCha8Rng,
    summary: &mut Summary,
) -> Result<Item, Error> {
    let scene = Scene::sample(rng);
    let folder = FOLDERS[pick(rng, &FOLDERS.map(|f| f.1))].0;
    let png = rng.random_bool(0.25);
    let (long, short) = (rng.random_range(212..=236), rng.random_range(150..=168));
    let (width, height) = if rng.random_bool(0.2) {
        (short, long)
    } else {
        (long, short)
    };
    // PNGs are the smaller "contact scans": lossless files of full-size pictures would
    // outweigh the rest of the archive.
    let (width, height) = if png {
        (width * 2 / 3, height * 2 / 3)
    } else {
        (width, height)
    };
    let sidecar = [Sidecar::Text, Sidecar::Xmp, Sidecar::Missing][pick(rng, &[80, 10, 10])];
    let true_tags = scene.true_tags();
    let (mut removed, mut false_tag, mut written) = (None, None, Vec::new());
    if sidecar != Sidecar::Missing {
        if rng.random_bool(0.08) {
            removed = true_tags.choose(rng).copied();
        }
        if rng.random_bool(0.04) {
            false_tag = Some(wrong_tag(&true_tags, rng));
        }
        written = true_tags
            .iter()
            .copied()
            .filter(|t| Some(*t) != removed)
            .chain(false_tag)
            .collect();
        written.shuffle(rng);
    }

    let finish = Finish {
        noise: if png { 0.6 } else { rng.random_range(2.0..4.5) },
        faded: folder == "1950s",
    };
    let img = paint(&scene, width, height, finish, rng);
    let stem = format!("{folder}/{STEM}{n:04}");
    let file = format!("{stem}.{}", if png { "png" } else { "jpg" });
    fs::create_dir_all(out.join(folder)).map_err(|source| Error::CreateDir {
        path: out.join(folder),
        source,
    })?;
    write(&out.join(&file), &encode(&img, png, &out.join(&file))?)?;
    match sidecar {
        Sidecar::Text => write(
            &out.join(format!("{stem}.txt")),
            text_sidecar(&written, n, folder, rng).as_bytes(),
        )?,
        Sidecar::Xmp => write(
            &out.join(format!("{stem}.xmp")),
            xmp_sidecar(&written, n, rng).as_bytes(),
        )?,
        Sidecar::Missing => {}
    }

    *if png {
        &mut summary.png
    } else {
        &mut summary.jpeg
    } += 1;
    *match sidecar {
        Sidecar::Text => &mut summary.text,
        Sidecar::Xmp => &mut summary.xmp,
        Sidecar::Missing => &mut summary.untagged,
    } += 1;
    summary.removed += usize::from(removed.is_some());
    summary.false_tags += usize::from(false_tag.is_some());
    Ok(Item {
        file,
        scene,
        sidecar,
        true_tags,
        written,
        removed,
        false_tag,
    })
}

/// A tag the picture does not deserve: another time, weather or season, or an absent subject.
fn wrong_tag(true_tags: &[&str], rng: &mut impl Rng) -> &'static str {
    let subjects = SUBJECTS.map(|s| s.tag());
    let pool: &[&'static str] = match rng.random_range(0..6) {
        0 => &TIMES,
        1 => &WEATHERS,
        2 => &SEASONS,
        _ => &subjects,
    };
    let options: Vec<&'static str> = pool
        .iter()
        .copied()
        .filter(|t| !true_tags.contains(t))
        .collect();
    // Every pool holds more values than one picture can carry, so options is never empty.
    options[rng.random_range(0..options.len())]
}

/// How a person might have typed the tag: now and then capitalised, spaced or padded.
fn as_typed(tag: &str, rng: &mut impl Rng) -> String {
    if !rng.random_bool(0.04) {
        return tag.to_string();
    }
    let title: String = tag
        .split('-')
        .map(|w| {
            let mut cs = w.chars();
            cs.next()
                .map(|c| c.to_uppercase().chain(cs).collect())
                .unwrap_or_default()
        })
        .collect::<Vec<String>>()
        .join(" ");
    match rng.random_range(0..3) {
        0 => title,
        1 => format!("  {title} "),
        _ => tag.to_uppercase(),
    }
}

fn text_sidecar(tags: &[&str], n: usize, folder: &str, rng: &mut impl Rng) -> String {
    let mut s = String::new();
    if rng.random_bool(0.15) {
        s += &format!("# Saltmarrow Historical Society — {folder} — card {n:04}\n");
    }
    let typed: Vec<String> = tags.iter().map(|t| as_typed(t, rng)).collect();
    if rng.random_bool(0.1) {
        s += &typed.join(", ");
        s.push('\n');
    } else {
        for t in typed {
            s += &t;
            s.push('\n');
        }
    }
    s
}

/// An XMP packet (ISO 16684-1) with the tags in `dc:subject`; a few bind other prefixes to
/// the same namespaces, which a reader must match by URI.
fn xmp_sidecar(tags: &[&str], n: usize, rng: &mut impl Rng) -> String {
    let dc = if rng.random_bool(0.2) { "d" } else { "dc" };
    let rdf = if rng.random_bool(0.1) { "r" } else { "rdf" };
    let mut s = String::from("<?xpacket begin=\"\u{feff}\" id=\"W5M0MpCehiHzreSzNTczkc9d\"?>\n");
    s += "<x:xmpmeta xmlns:x=\"adobe:ns:meta/\">\n";
    s += &format!(" <{rdf}:RDF xmlns:{rdf}=\"{RDF}\">\n");
    s += &format!("  <{rdf}:Description {rdf}:about=\"\" xmlns:{dc}=\"{DC}\">\n");
    if rng.random_bool(0.3) {
        s += &format!("   <{dc}:title>\n    <{rdf}:Alt>\n");
        s += &format!("     <{rdf}:li xml:lang=\"x-default\">Saltmarrow print {n:04}</{rdf}:li>\n");
        s += &format!("    </{rdf}:Alt>\n   </{dc}:title>\n");
    }
    s += &format!("   <{dc}:subject>\n    <{rdf}:Bag>\n");
    for t in tags {
        s += &format!(
            "     <{rdf}:li>{}</{rdf}:li>\n",
            xml_escape(&as_typed(t, rng))
        );
    }
    s += &format!("    </{rdf}:Bag>\n   </{dc}:subject>\n");
    s += &format!("  </{rdf}:Description>\n </{rdf}:RDF>\n</x:xmpmeta>\n");
    s += "<?xpacket end=\"w\"?>\n";
    s
}

fn xml_escape(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
}

fn encode(img: &RgbImage, png: bool, path: &Path) -> Result<Vec<u8>, Error> {
    let mut bytes = Vec::new();
    let result = if png {
        img.write_with_encoder(PngEncoder::new_with_quality(
            &mut bytes,
            CompressionType::Best,
            FilterType::Adaptive,
        ))
    } else {
        img.write_with_encoder(JpegEncoder::new_with_quality(&mut bytes, 80))
    };
    result.map_err(|source| Error::Encode {
        path: path.to_path_buf(),
        source,
    })?;
    Ok(bytes)
}

fn write(path: &Path, bytes: &[u8]) -> Result<(), Error> {
    fs::write(path, bytes).map_err(|source| Error::Write {
        path: path.to_path_buf(),
        source,
    })
}

/// Removes pictures and sidecars from an earlier run so a smaller `--count` leaves no strays;
/// files it did not make (other names, other folders) are left alone.
fn remove_stale(out: &Path) -> Result<(), Error> {
    for (folder, _) in FOLDERS {
        let dir = out.join(folder);
        let Ok(entries) = fs::read_dir(&dir) else {
            continue;
        };
        for entry in entries.flatten() {
            let path = entry.path();
            let name = entry.file_name().to_string_lossy().into_owned();
            let ours = name.starts_with(STEM)
                && path
                    .extension()
                    .is_some_and(|e| OWNED_EXTENSIONS.iter().any(|o| e == *o));
            if ours && path.is_file() {
                fs::remove_file(&path).map_err(|source| Error::Remove { path, source })?;
            }
        }
    }
    Ok(())
}

fn truth_csv(items: &[Item]) -> String {
    let mut s = String::from(TRUTH_HEADER);
    s.push('\n');
    for it in items {
        let subjects: Vec<&str> = it.scene.subjects.iter().map(|x| x.tag()).collect();
        let row = [
            it.file.as_str(),
            it.sidecar.label(),
            it.scene.time.tag(),
            it.scene.weather.tag(),
            it.scene.season.tag(),
            &subjects.join(";"),
            &it.true_tags.join(";"),
            &it.written.join(";"),
            it.removed.unwrap_or(""),
            it.false_tag.unwrap_or(""),
        ];
        s += &row.join(",");
        s.push('\n');
    }
    s
}

fn readme(seed: u64, count: usize) -> String {
    format!(
        "# Saltmarrow Historical Society — picture archive (demo)\n\
         \n\
         An invented photo archive for trying tagweave: {count} pictures of Saltmarrow, a coastal\n\
         town that does not exist. Every picture is drawn from scene parameters (time of day,\n\
         weather, season and one to three subjects such as the harbour, the lighthouse or the\n\
         orchard); no real people, places or brands appear.\n\
         \n\
         Most pictures have a sidecar beside them: `NAME.txt` (one tag per line, sometimes commas\n\
         or a `#` comment) or `NAME.xmp` (keywords in `dc:subject`). About one in ten has none.\n\
         A few sidecars leave a true tag off or carry a wrong one on purpose, so suggestions and\n\
         the audit have something to find.\n\
         \n\
         `TRUTH.csv` is the ground truth: for each picture its parameters, the tags it deserves,\n\
         the tags its sidecar really carries (normalised), and which tag was left off or added.\n\
         \n\
         The folder is generated, deterministically (seed {seed}: same seed, same bytes):\n\
         \n\
         ```\n\
         cargo run -p tagweave-demo-archive --release -- demo-collection\n\
         ```\n\
         \n\
         Licence: the same as the tagweave project. All content is invented.\n"
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::collections::BTreeMap;
    use std::path::PathBuf;

    fn files(root: &Path) -> BTreeMap<PathBuf, Vec<u8>> {
        let mut out = BTreeMap::new();
        let mut stack = vec![root.to_path_buf()];
        while let Some(dir) = stack.pop() {
            for e in fs::read_dir(&dir).unwrap() {
                let p = e.unwrap().path();
                if p.is_dir() {
                    stack.push(p);
                } else {
                    out.insert(
                        p.strip_prefix(root).unwrap().to_path_buf(),
                        fs::read(&p).unwrap(),
                    );
                }
            }
        }
        out
    }

    fn normalise(t: &str) -> String {
        t.split_whitespace()
            .collect::<Vec<_>>()
            .join("-")
            .to_lowercase()
    }

    /// Reads tags back the way the design describes the two sidecar kinds.
    fn read_sidecar(path: &Path) -> Vec<String> {
        let text = fs::read_to_string(path).unwrap();
        if path.extension().unwrap() == "txt" {
            return text
                .lines()
                .filter(|l| !l.trim_start().starts_with('#'))
                .flat_map(|l| l.split(','))
                .map(normalise)
                .filter(|t| !t.is_empty())
                .collect();
        }
        let start = text.find(":subject>").unwrap();
        let end = start + 1 + text[start + 1..].find(":subject>").unwrap();
        text[start..end]
            .split('<')
            .filter_map(|seg| {
                let (name, content) = seg.split_once('>')?;
                (!name.starts_with('/') && name.ends_with(":li")).then(|| normalise(content))
            })
            .collect()
    }

    fn split(field: &str) -> Vec<String> {
        field
            .split(';')
            .filter(|t| !t.is_empty())
            .map(String::from)
            .collect()
    }

    #[test]
    fn same_seed_gives_identical_bytes_and_another_seed_does_not() {
        let (a, b, c) = (
            tempfile::tempdir().unwrap(),
            tempfile::tempdir().unwrap(),
            tempfile::tempdir().unwrap(),
        );
        generate(a.path(), 1901, 12).unwrap();
        generate(b.path(), 1901, 12).unwrap();
        generate(c.path(), 1902, 12).unwrap();
        let (fa, fb, fc) = (files(a.path()), files(b.path()), files(c.path()));
        assert!(fa.len() > 12);
        assert_eq!(fa, fb);
        assert_ne!(
            fa.get(Path::new("TRUTH.csv")),
            fc.get(Path::new("TRUTH.csv"))
        );
    }

    #[test]
    fn rerun_with_a_smaller_count_removes_its_own_strays_only() {
        let dir = tempfile::tempdir().unwrap();
        generate(dir.path(), 3, 10).unwrap();
        fs::create_dir_all(dir.path().join("1970s")).unwrap();
        let keep = dir.path().join("1970s/notes.txt");
        fs::write(&keep, "mine").unwrap();
        generate(dir.path(), 3, 4).unwrap();
        let pictures = files(dir.path())
            .keys()
            .filter(|p| p.extension().is_some_and(|e| e == "jpg" || e == "png"))
            .count();
        assert_eq!(pictures, 4);
        assert!(keep.exists());
    }

    #[test]
    fn truth_matches_the_files_and_the_sidecars() {
        let dir = tempfile::tempdir().unwrap();
        let count = 60;
        let summary = generate(dir.path(), 1901, count).unwrap();
        let truth = fs::read_to_string(dir.path().join("TRUTH.csv")).unwrap();
        let mut lines = truth.lines();
        assert_eq!(lines.next(), Some(TRUTH_HEADER));
        let rows: Vec<Vec<&str>> = lines.map(|l| l.split(',').collect()).collect();
        assert_eq!(rows.len(), count);
        assert!(
            rows.windows(2).all(|w| w[0][0] < w[1][0]),
            "rows sorted by file"
        );
        assert_eq!(summary.jpeg + summary.png, count);
        assert_eq!(summary.text + summary.xmp + summary.untagged, count);
        let all = files(dir.path());
        let pictures = all
            .keys()
            .filter(|p| p.extension().is_some_and(|e| e == "jpg" || e == "png"))
            .count();
        assert_eq!(pictures, count);
        let mut kinds = BTreeMap::new();
        let (mut removed_total, mut false_total) = (0, 0);
        for r in &rows {
            assert_eq!(r.len(), 10, "{r:?}");
            let file = dir.path().join(r[0]);
            let img = image::open(&file).unwrap();
            assert!((100..=236).contains(&img.width()) && (100..=236).contains(&img.height()));
            let true_tags = split(r[6]);
            let written = split(r[7]);
            let removed = split(r[8]);
            let wrong = split(r[9]);
            assert!(true_tags.contains(&r[2].to_string()) && true_tags.contains(&r[4].to_string()));
            assert!(split(r[5]).iter().all(|s| true_tags.contains(s)));
            assert!(removed.len() <= 1 && wrong.len() <= 1);
            assert!(removed.iter().all(|t| true_tags.contains(t)));
            assert!(wrong.iter().all(|t| !true_tags.contains(t)));
            let mut expected: Vec<String> = true_tags
                .iter()
                .filter(|t| !removed.contains(t))
                .chain(&wrong)
                .cloned()
                .collect();
            let mut got = written.clone();
            expected.sort();
            got.sort();
            *kinds.entry(r[1]).or_insert(0) += 1;
            let txt = file.with_extension("txt");
            let xmp = file.with_extension("xmp");
            match r[1] {
                "none" => {
                    assert!(written.is_empty() && removed.is_empty() && wrong.is_empty());
                    assert!(!txt.exists() && !xmp.exists());
                }
                kind => {
                    assert_eq!(got, expected, "{}", r[0]);
                    let side = if kind == "txt" { txt } else { xmp };
                    assert_eq!(read_sidecar(&side), written, "{}", side.display());
                }
            }
            removed_total += removed.len();
            false_total += wrong.len();
        }
        assert_eq!(
            (removed_total, false_total),
            (summary.removed, summary.false_tags)
        );
        assert_eq!(kinds.len(), 3, "all three sidecar kinds appear: {kinds:?}");
        assert!(
            removed_total > 0 && false_total > 0,
            "both kinds of noise appear"
        );
    }

    #[test]
    fn typed_variants_normalise_back_to_the_tag() {
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let mut varied = 0;
        for _ in 0..500 {
            let typed = as_typed("festival-lights", &mut rng);
            varied += usize::from(typed != "festival-lights");
            assert_eq!(normalise(&typed), "festival-lights", "{typed:?}");
        }
        assert!((5..60).contains(&varied), "{varied}");
    }
}
