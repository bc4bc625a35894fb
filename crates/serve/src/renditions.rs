//! Smaller copies of pictures for the page, made on first request and kept in the store
//! folder (`thumbnails/`), so a grid of forty pictures decodes each original once, ever.
//!
//! A copy's file name carries the picture's id and the start of its content hash, so a
//! picture that changed gets a new copy and never shows a stale one. The folder is a
//! cache like the rest of the store: deleting it loses nothing.

use std::io::{ErrorKind, Write};
use std::path::{Path, PathBuf};

use image::codecs::jpeg::JpegEncoder;
use image::imageops::FilterType;
use image::ImageReader;
use tagweave_collection::ItemRecord;

use crate::ServeError;

/// Folder inside the store that holds the copies.
pub const CACHE_DIR: &str = "thumbnails";

/// Which copy of a picture.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Rendition {
    /// For grids: fits in a 240-pixel square.
    Thumbnail,
    /// For the picture page: fits in 1200 pixels.
    Large,
}

impl Rendition {
    pub fn max_side(self) -> u32 {
        match self {
            Rendition::Thumbnail => 240,
            Rendition::Large => 1200,
        }
    }
}

/// JPEG quality of the copies: small files, no visible blocks at these sizes.
const QUALITY: u8 = 85;

/// Makes and caches reduced copies of the pictures of one collection.
pub struct Renditions {
    root: PathBuf,
    cache: PathBuf,
}

impl Renditions {
    pub fn new(collection_root: &Path, store_dir: &Path) -> Renditions {
        Renditions {
            root: collection_root.to_path_buf(),
            cache: store_dir.join(CACHE_DIR),
        }
    }

    /// Where the copy of `item` at `size` is kept.
    pub fn cache_path(&self, item: &ItemRecord, size: Rendition) -> PathBuf {
        let hash: String = item.content_hash.chars().take(16).collect();
        self.cache
            .join(format!("{}-{}-{}.jpg", item.id, hash, size.max_side()))
    }

    /// JPEG bytes of the picture reduced to fit `size` (never enlarged), from the cache
    /// when there. The picture is found by its indexed path, never by anything a request
    /// says.
    pub fn jpeg(&self, item: &ItemRecord, size: Rendition) -> Result<Vec<u8>, ServeError> {
        let cached = self.cache_path(item, size);
        if let Ok(bytes) = std::fs::read(&cached) {
            return Ok(bytes);
        }
        let source = self.root.join(&item.rel_path);
        let bytes = if item.format.is_camera_raw() {
            reduce_raw(&source, size.max_side())?
        } else {
            reduce(&source, size.max_side())?
        };
        self.keep(&cached, &bytes)?;
        Ok(bytes)
    }

    /// Writes a copy under a temporary name and renames it into place, so a reader never
    /// sees half a file even when two requests make the same copy at once.
    fn keep(&self, path: &Path, bytes: &[u8]) -> Result<(), ServeError> {
        let cache_error = |source| ServeError::Cache {
            path: path.to_path_buf(),
            source,
        };
        std::fs::create_dir_all(&self.cache).map_err(cache_error)?;
        let suffix: u64 = rand::random();
        let temp = self.cache.join(format!(".partial-{suffix:016x}"));
        let written = std::fs::File::create(&temp)
            .and_then(|mut f| f.write_all(bytes))
            .and_then(|()| std::fs::rename(&temp, path));
        if let Err(e) = written {
            let _ = std::fs::remove_file(&temp);
            return Err(cache_error(e));
        }
        Ok(())
    }
}

/// A camera RAW's preview (as the scan describes it), as JPEG fitting in `max_side` pixels.
fn reduce_raw(path: &Path, max_side: u32) -> Result<Vec<u8>, ServeError> {
    if !path.exists() {
        return Err(ServeError::PictureGone {
            path: path.to_path_buf(),
        });
    }
    let options = tagweave_vision::DecodeOptions {
        long_side: max_side,
        ..tagweave_vision::DecodeOptions::default()
    };
    let preview = tagweave_vision::load_working_image(path, &options)?;
    let mut out = Vec::new();
    JpegEncoder::new_with_quality(&mut out, QUALITY)
        .encode(
            preview.rgb(),
            preview.width(),
            preview.height(),
            image::ExtendedColorType::Rgb8,
        )
        .map_err(|source| ServeError::Picture {
            path: path.to_path_buf(),
            source,
        })?;
    Ok(out)
}

/// Decodes a picture and encodes it as JPEG fitting in `max_side` pixels.
pub fn reduce(path: &Path, max_side: u32) -> Result<Vec<u8>, ServeError> {
    let picture_error = |source| ServeError::Picture {
        path: path.to_path_buf(),
        source,
    };
    let reader = ImageReader::open(path).map_err(|e| {
        if e.kind() == ErrorKind::NotFound {
            ServeError::PictureGone {
                path: path.to_path_buf(),
            }
        } else {
            picture_error(image::ImageError::IoError(e))
        }
    })?;
    let picture = reader
        .with_guessed_format()
        .map_err(|e| picture_error(image::ImageError::IoError(e)))?
        .decode()
        .map_err(picture_error)?;
    let picture = if picture.width().max(picture.height()) > max_side {
        picture.resize(max_side, max_side, FilterType::Triangle)
    } else {
        picture
    };
    let rgb = picture.to_rgb8();
    let mut out = Vec::new();
    JpegEncoder::new_with_quality(&mut out, QUALITY)
        .encode_image(&rgb)
        .map_err(picture_error)?;
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use image::{ImageFormat, Rgb, RgbImage};

    fn item(id: &str, rel: &str, hash: &str) -> ItemRecord {
        ItemRecord {
            id: id.into(),
            rel_path: rel.into(),
            format: tagweave_collection::ImageFormat::Png,
            stamp: tagweave_collection::FileStamp {
                size: 0,
                mtime_ns: 0,
            },
            content_hash: hash.into(),
            sidecars: Vec::new(),
            tags: Vec::new(),
            accepted: Vec::new(),
        }
    }

    fn gradient(w: u32, h: u32) -> RgbImage {
        RgbImage::from_fn(w, h, |x, y| Rgb([(x % 256) as u8, (y % 256) as u8, 90]))
    }

    #[test]
    fn a_camera_raw_is_shown_from_its_preview() {
        // source: preview.dng, written by tifffile with a JPEG preview made by Pillow
        // (crates/collection/testdata/raw/README.md).
        let temp = tempfile::tempdir().unwrap();
        let root = temp.path().join("pictures");
        std::fs::create_dir_all(&root).unwrap();
        let fixture =
            Path::new(env!("CARGO_MANIFEST_DIR")).join("../collection/testdata/raw/preview.dng");
        std::fs::copy(&fixture, root.join("shot.dng")).unwrap();
        let renditions = Renditions::new(&root, &temp.path().join("store"));
        let mut raw = item("00000000000000bb", "shot.dng", "0123");
        raw.format = tagweave_collection::ImageFormat::Dng;
        let bytes = renditions.jpeg(&raw, Rendition::Thumbnail).unwrap();
        let shown = image::load_from_memory(&bytes).unwrap();
        assert_eq!(
            shown.width().max(shown.height()),
            Rendition::Thumbnail.max_side()
        );
        std::fs::remove_file(root.join("shot.dng")).unwrap();
        let mut gone = item("00000000000000bc", "shot.dng", "4567");
        gone.format = tagweave_collection::ImageFormat::Dng;
        assert!(matches!(
            renditions.jpeg(&gone, Rendition::Thumbnail),
            Err(ServeError::PictureGone { .. })
        ));
    }

    #[test]
    fn copies_fit_their_size_keep_the_shape_and_are_cached() {
        let temp = tempfile::tempdir().unwrap();
        let root = temp.path().join("pictures");
        std::fs::create_dir_all(&root).unwrap();
        gradient(800, 400)
            .save_with_format(root.join("wide.png"), ImageFormat::Png)
            .unwrap();
        let store = temp.path().join("store");
        let renditions = Renditions::new(&root, &store);
        let wide = item("00000000000000aa", "wide.png", "abcdef0123456789ffff");

        let bytes = renditions.jpeg(&wide, Rendition::Thumbnail).unwrap();
        // source: JPEG files start with the SOI marker FF D8 (ITU-T T.81, Annex B).
        assert_eq!(&bytes[..2], &[0xFF, 0xD8]);
        let small = image::load_from_memory(&bytes).unwrap();
        // by hand: 800×400 scaled to fit 240 → 240×120.
        assert_eq!((small.width(), small.height()), (240, 120));
        let cached = renditions.cache_path(&wide, Rendition::Thumbnail);
        assert_eq!(std::fs::read(&cached).unwrap(), bytes);
        assert!(cached.starts_with(store.join(CACHE_DIR)));

        // The cache answers even when the original is gone…
        std::fs::remove_file(root.join("wide.png")).unwrap();
        assert_eq!(renditions.jpeg(&wide, Rendition::Thumbnail).unwrap(), bytes);
        // …but a changed picture (new content hash) is read afresh.
        let changed = item("00000000000000aa", "wide.png", "99999999999999990000");
        assert!(matches!(
            renditions.jpeg(&changed, Rendition::Thumbnail),
            Err(ServeError::PictureGone { .. })
        ));
        assert!(std::fs::read_dir(store.join(CACHE_DIR)).unwrap().all(|e| !e
            .unwrap()
            .file_name()
            .to_string_lossy()
            .starts_with(".partial")));
    }

    #[test]
    fn small_pictures_are_not_enlarged_and_broken_ones_are_errors() {
        let temp = tempfile::tempdir().unwrap();
        gradient(120, 90)
            .save_with_format(temp.path().join("small.png"), ImageFormat::Png)
            .unwrap();
        let large = reduce(&temp.path().join("small.png"), 1200).unwrap();
        let large = image::load_from_memory(&large).unwrap();
        assert_eq!((large.width(), large.height()), (120, 90));

        std::fs::write(
            temp.path().join("broken.png"),
            b"\x89PNG\r\n\x1a\nnot really",
        )
        .unwrap();
        let error = reduce(&temp.path().join("broken.png"), 240).unwrap_err();
        assert!(matches!(error, ServeError::Picture { .. }), "{error}");
        assert!(error.to_string().contains("broken.png"), "{error}");
    }
}
