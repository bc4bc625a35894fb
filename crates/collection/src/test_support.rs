//! Tiny files for the crawl and read tests.

use std::path::{Path, PathBuf};

/// Start of a real JPEG: SOI, then an APP0/JFIF segment.
pub const JPEG: &[u8] = b"\xFF\xD8\xFF\xE0\x00\x10JFIF\x00\x01\x01\x00\x00\x01\x00\x01\x00\x00";
/// PNG signature followed by the start of the IHDR chunk.
pub const PNG: &[u8] = b"\x89PNG\r\n\x1a\n\x00\x00\x00\x0dIHDR\x00\x00\x00\x01\x00\x00\x00\x01";
pub const GIF: &[u8] = b"GIF89a\x01\x00\x01\x00\x00\x00\x00";
pub const WEBP: &[u8] = b"RIFF\x1a\x00\x00\x00WEBPVP8L\x0d\x00\x00\x00";

/// Writes `bytes` at `root/rel`, creating folders as needed.
pub fn put(root: &Path, rel: &str, bytes: &[u8]) -> PathBuf {
    let path = root.join(rel);
    std::fs::create_dir_all(path.parent().unwrap()).unwrap();
    std::fs::write(&path, bytes).unwrap();
    path
}

/// A file mode 000 is still readable by root; tests of unreadable files need to know.
#[cfg(unix)]
pub fn running_as_root(scratch: &Path) -> bool {
    use std::os::unix::fs::PermissionsExt;
    let probe = put(scratch, "probe-unreadable", b"x");
    std::fs::set_permissions(&probe, std::fs::Permissions::from_mode(0o000)).unwrap();
    let readable = std::fs::read(&probe).is_ok();
    std::fs::set_permissions(&probe, std::fs::Permissions::from_mode(0o644)).unwrap();
    std::fs::remove_file(&probe).unwrap();
    readable
}
