//! Generates the Saltmarrow demo archive: invented pictures, sidecars and their ground truth.
//!
//! Usage: `tagweave-demo-archive OUT_DIR [--seed N] [--count N]`

mod archive;
mod paint;
mod raster;
mod scene;

use std::path::PathBuf;
use std::process::ExitCode;

const USAGE: &str = "usage: tagweave-demo-archive OUT_DIR [--seed N] [--count N]";

#[derive(Debug, thiserror::Error)]
pub enum Error {
    #[error("{0}\n{USAGE}")]
    Usage(String),
    #[error("cannot create folder {path}: {source}; check that its parent exists and is writable")]
    CreateDir {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("cannot write {path}: {source}; check free space and write permission")]
    Write {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("cannot remove the old generated file {path}: {source}; delete it by hand and rerun")]
    Remove {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("cannot encode picture {path}: {source}")]
    Encode {
        path: PathBuf,
        source: image::ImageError,
    },
}

#[derive(Debug, PartialEq, Eq)]
struct Args {
    out: PathBuf,
    seed: u64,
    count: usize,
}

fn parse_args(args: impl IntoIterator<Item = String>) -> Result<Args, Error> {
    let mut out = None;
    let (mut seed, mut count) = (1901, 400);
    let mut args = args.into_iter();
    while let Some(a) = args.next() {
        match a.as_str() {
            "--seed" | "--count" => {
                let v = args
                    .next()
                    .ok_or_else(|| Error::Usage(format!("{a} needs a number")))?;
                let bad = || Error::Usage(format!("{a} needs a whole number, got {v:?}"));
                if a == "--seed" {
                    seed = v.parse().map_err(|_| bad())?;
                } else {
                    count = v.parse().map_err(|_| bad())?;
                }
            }
            _ if a.starts_with('-') => return Err(Error::Usage(format!("unknown option {a}"))),
            _ if out.is_none() => out = Some(PathBuf::from(a)),
            _ => return Err(Error::Usage(format!("only one OUT_DIR, got a second: {a}"))),
        }
    }
    if !(1..=9999).contains(&count) {
        return Err(Error::Usage(format!(
            "--count must be 1 to 9999, got {count}"
        )));
    }
    let out = out.ok_or_else(|| Error::Usage("OUT_DIR is missing".into()))?;
    Ok(Args { out, seed, count })
}

fn run() -> Result<(), Error> {
    let args = parse_args(std::env::args().skip(1))?;
    std::fs::create_dir_all(&args.out).map_err(|source| Error::CreateDir {
        path: args.out.clone(),
        source,
    })?;
    let s = archive::generate(&args.out, args.seed, args.count)?;
    println!(
        "wrote {} pictures to {} (seed {}): {} jpeg, {} png; sidecars {} txt, {} xmp, {} none; \
         {} tags left off, {} wrong tags; truth in TRUTH.csv",
        args.count,
        args.out.display(),
        args.seed,
        s.jpeg,
        s.png,
        s.text,
        s.xmp,
        s.untagged,
        s.removed,
        s.false_tags
    );
    Ok(())
}

fn main() -> ExitCode {
    match run() {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {e}");
            ExitCode::FAILURE
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse(s: &str) -> Result<Args, Error> {
        parse_args(s.split_whitespace().map(String::from))
    }

    #[test]
    fn arguments_in_any_order_with_defaults() {
        let a = parse("--count 12 out --seed 7").unwrap();
        assert_eq!(
            a,
            Args {
                out: "out".into(),
                seed: 7,
                count: 12
            }
        );
        let d = parse("demo").unwrap();
        assert_eq!((d.seed, d.count), (1901, 400));
    }

    #[test]
    fn bad_arguments_say_what_is_wrong() {
        for (line, needle) in [
            ("", "OUT_DIR is missing"),
            ("out --seed", "--seed needs a number"),
            ("out --count ten", "whole number"),
            ("out --count 0", "1 to 9999"),
            ("out --verbose", "unknown option --verbose"),
            ("a b", "second"),
        ] {
            let e = parse(line).unwrap_err().to_string();
            assert!(e.contains(needle) && e.contains("usage:"), "{line:?}: {e}");
        }
    }
}
