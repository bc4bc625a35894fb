use std::path::PathBuf;

/// Everything that can go wrong while turning pictures into features.
#[derive(Debug, thiserror::Error)]
pub enum VisionError {
    #[error("cannot read {}: {source}", path.display())]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },

    #[error(
        "{}: not a picture format tagweave reads (JPEG, PNG, GIF, BMP, TIFF, WebP, camera RAW with a JPEG preview); \
         convert it or move it out of the collection",
        path.display()
    )]
    UnknownFormat { path: PathBuf },

    #[error(
        "{}: a camera RAW file with no JPEG preview inside; tagweave describes RAW \
         pictures by the preview the camera stores in them, so save it again with a preview \
         or put a JPEG copy of it in the collection",
        path.display()
    )]
    NoPreview { path: PathBuf },

    #[error(
        "{}: the picture data is damaged or cut short ({detail}); \
         re-export the picture or replace the file",
        path.display()
    )]
    Corrupt { path: PathBuf, detail: String },

    #[error(
        "{}: the picture is over the safety limit ({detail}); it may be a decompression \
         bomb — downscale it if it is a real picture, or raise the limit",
        path.display()
    )]
    TooLarge { path: PathBuf, detail: String },

    #[error("cannot learn image features: {0}")]
    NotEnoughData(String),

    #[error("invalid feature options: {0}")]
    InvalidOptions(String),
}
