//! The crate's one error type. Every message names the file (or sheet line) and says what to do.

use std::path::PathBuf;

use tagweave_collection::CollectionError;

#[derive(Debug, thiserror::Error)]
pub enum WritebackError {
    #[error("review sheet {}: {problem}", path.display())]
    Sheet { path: PathBuf, problem: String },

    #[error("review sheet {}, line {line}: {problem}", path.display())]
    SheetLine {
        path: PathBuf,
        line: u64,
        problem: String,
    },

    #[error("review sheet row for {picture}: {problem}")]
    SheetRow { picture: String, problem: String },

    #[error(
        "picture {picture}: the sheet both keeps or adds the tag `{tag}` and marks it `remove`; \
             keep one of the two rows and apply again"
    )]
    Conflict { picture: String, tag: String },

    #[error(transparent)]
    Collection(#[from] CollectionError),

    #[error("picture {picture} is not in the collection at {}; it was moved, renamed or deleted \
             since the sheet was made: fix the `picture` cell or make a new sheet", root.display())]
    PictureNotFound { root: PathBuf, picture: String },

    #[error("sidecar {}: it holds the tags of several pictures ({}); tags written there would \
             reach all of them, so rename it after one whole picture name (e.g. {}.txt) and apply again",
             sidecar.display(), pictures.join(", "), pictures.first().map_or("", String::as_str))]
    SharedSidecar {
        sidecar: PathBuf,
        pictures: Vec<String>,
    },

    #[error("picture {picture}: no free name for a new sidecar ({}); move the file that is in the way",
            tried.join(", "))]
    NoSidecarName { picture: String, tried: Vec<String> },

    #[error("sidecar {}: the tag `{tag}` cannot be written there: {why}", path.display())]
    Unrepresentable {
        path: PathBuf,
        tag: String,
        why: &'static str,
    },

    #[error("sidecar {}: cannot be edited safely ({problem}); nothing was written; add or remove \
             the tags in an XMP-aware editor", path.display())]
    XmpNotEditable { path: PathBuf, problem: String },

    #[error("sidecar {}: the edit would not read back as intended ({problem}); nothing was \
             written; change the tags of this file by hand", path.display())]
    Unverified { path: PathBuf, problem: String },

    #[error("sidecar {}: it changed on disk since the changes were planned; nothing was written \
             to it; run the command again to plan from the new contents", path.display())]
    ChangedOnDisk { path: PathBuf },

    #[error("sidecar {}: it is a symbolic link; replacing it would cut the link, so edit the file \
             it points to by hand", path.display())]
    Symlink { path: PathBuf },

    #[error("{}: cannot {action} ({source}); check the folder's permissions and free space",
            path.display())]
    Io {
        path: PathBuf,
        action: &'static str,
        #[source]
        source: std::io::Error,
    },
}

impl WritebackError {
    pub(crate) fn io(
        path: impl Into<PathBuf>,
        action: &'static str,
    ) -> impl FnOnce(std::io::Error) -> Self {
        let path = path.into();
        move |source| WritebackError::Io {
            path,
            action,
            source,
        }
    }
}
