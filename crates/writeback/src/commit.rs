//! Writing planned edits: refuse if the file moved on, keep the original once, replace
//! atomically.

use std::fs::Permissions;
use std::io::ErrorKind;
use std::path::{Path, PathBuf};

use crate::atomic::{write_atomically, Mode};
use crate::error::WritebackError;
use crate::plan::{is_symlink, PicturePlan, SidecarEdit};

/// Where the first version of a changed sidecar is kept: `NAME.txt` → `NAME.txt.orig`.
/// The crawler takes such a file for neither a picture nor a sidecar (its extension is
/// `orig`), so it is left alone and only counted among the other files.
pub fn original_path(sidecar: &Path) -> PathBuf {
    let mut name = sidecar.file_name().unwrap_or_default().to_os_string();
    name.push(".orig");
    sidecar.with_file_name(name)
}

/// Writes one edit. Refuses when the file no longer holds the bytes it was planned from (or,
/// for a new sidecar, when a file of that name appeared). Before the first change to a file
/// its original is saved as [`original_path`]; an existing one is never overwritten. The new
/// contents replace the file atomically: a crash leaves the old file or the new, never a mix.
pub fn commit_edit(edit: &SidecarEdit) -> Result<(), WritebackError> {
    let permissions = check_unchanged(edit)?;
    let last_check = || check_unchanged(edit).map(drop);
    if edit.created {
        return write_atomically(
            &edit.sidecar,
            &edit.after,
            Mode::CreateNew,
            None,
            &last_check,
        )
        .map_err(|e| match e {
            WritebackError::Io { source, .. } if source.kind() == ErrorKind::AlreadyExists => {
                WritebackError::ChangedOnDisk {
                    path: edit.sidecar.clone(),
                }
            }
            other => other,
        });
    }
    let original = original_path(&edit.sidecar);
    if !exists(&original)? {
        let kept = write_atomically(
            &original,
            &edit.before,
            Mode::CreateNew,
            permissions.clone(),
            &last_check,
        );
        match kept {
            // Someone made it meanwhile: theirs stays.
            Err(WritebackError::Io { source, .. }) if source.kind() == ErrorKind::AlreadyExists => {
            }
            other => other?,
        }
    }
    write_atomically(
        &edit.sidecar,
        &edit.after,
        Mode::Replace,
        permissions,
        &last_check,
    )
}

/// Writes all edits of one picture, after first checking that none of its files changed,
/// so a stale plan is refused before anything is written. Should a later file still fail
/// (a full disk), the files already written stay written: each is whole, and the tags they
/// gained are read by the next scan, so nothing is lost and applying again finishes the rest.
pub fn commit_plan(plan: &PicturePlan) -> Result<(), WritebackError> {
    for edit in &plan.edits {
        check_unchanged(edit)?;
    }
    plan.edits.iter().try_for_each(commit_edit)
}

/// The file's permissions when it still holds `edit.before` (none for a file to create).
fn check_unchanged(edit: &SidecarEdit) -> Result<Option<Permissions>, WritebackError> {
    let path = &edit.sidecar;
    let changed = || WritebackError::ChangedOnDisk { path: path.clone() };
    if is_symlink(path) {
        return Err(WritebackError::Symlink { path: path.clone() });
    }
    if edit.created {
        return if exists(path)? {
            Err(changed())
        } else {
            Ok(None)
        };
    }
    let now = match std::fs::read(path) {
        Ok(now) => now,
        Err(e) if e.kind() == ErrorKind::NotFound => return Err(changed()),
        Err(e) => return Err(WritebackError::io(path, "read")(e)),
    };
    if now != edit.before {
        return Err(changed());
    }
    let metadata = std::fs::metadata(path).map_err(WritebackError::io(path, "read"))?;
    Ok(Some(metadata.permissions()))
}

fn exists(path: &Path) -> Result<bool, WritebackError> {
    match std::fs::symlink_metadata(path) {
        Ok(_) => Ok(true),
        Err(e) if e.kind() == ErrorKind::NotFound => Ok(false),
        Err(e) => Err(WritebackError::io(path, "look at")(e)),
    }
}

/// A unified diff (`-`/`+` lines with two lines of context) of what [`commit_edit`] would
/// write, for a dry run.
pub fn diff(edit: &SidecarEdit) -> String {
    let before = String::from_utf8_lossy(&edit.before);
    let after = String::from_utf8_lossy(&edit.after);
    let old = if edit.created {
        "/dev/null".to_string()
    } else {
        format!("a/{}", edit.sidecar_rel)
    };
    let new = format!("b/{}", edit.sidecar_rel);
    similar::TextDiff::from_lines(before.as_ref(), after.as_ref())
        .unified_diff()
        .context_radius(2)
        .header(&old, &new)
        .to_string()
}
