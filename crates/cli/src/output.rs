//! What the command prints: standard output that a closed reader ends quietly, and errors
//! that say each cause once.
//!
//! `println!` and `print!` are replaced crate-wide (see `main.rs`) by [`write`]: when the
//! reader of a pipe goes away (`tagweave apply SHEET --dry-run | head`), the command stops
//! printing and exits with 0 instead of panicking.

use std::fmt;
use std::io::{ErrorKind, Write};

/// Writes `args` (and a line end when `line`) to standard output. A closed pipe ends the
/// process quietly with exit code 0: the reader has what it wanted. Any other failure to
/// write ends it with a message and exit code 1.
pub fn write(args: fmt::Arguments, line: bool) {
    let mut out = std::io::stdout().lock();
    let written = out
        .write_fmt(args)
        .and_then(|()| if line { out.write_all(b"\n") } else { Ok(()) });
    match written {
        Ok(()) => {}
        Err(e) if e.kind() == ErrorKind::BrokenPipe => std::process::exit(0),
        Err(e) => {
            eprintln!("tagweave: cannot write to the standard output: {e}");
            std::process::exit(1);
        }
    }
}

/// The error with its causes, each said once. Many errors repeat their cause in their own
/// message (`cannot read a.jpg: No such file or directory`) and give it again as their
/// source; a cause whose words the message already holds is left out.
pub fn describe(error: &anyhow::Error) -> String {
    let mut text = error.to_string();
    for cause in error.chain().skip(1) {
        let said = cause.to_string();
        if !text.contains(&said) {
            text.push_str(": ");
            text.push_str(&said);
        }
    }
    text
}

/// An error as one JSON object, for `--json`: `{"error": MESSAGE}`.
pub fn error_json(message: &str) -> serde_json::Value {
    serde_json::json!({ "error": message })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// An error that, like many, names its cause in its message and gives it as source.
    #[derive(Debug)]
    struct CannotRead(std::io::Error);

    impl fmt::Display for CannotRead {
        fn fmt(&self, f: &mut fmt::Formatter) -> fmt::Result {
            write!(f, "cannot read a.jpg: {}", self.0)
        }
    }

    impl std::error::Error for CannotRead {
        fn source(&self) -> Option<&(dyn std::error::Error + 'static)> {
            Some(&self.0)
        }
    }

    #[test]
    fn each_cause_is_said_once() {
        let io = std::io::Error::new(ErrorKind::NotFound, "no such file");
        let error = anyhow::Error::new(CannotRead(io)).context("a.jpg is not in the index");
        let text = describe(&error);
        assert_eq!(
            text,
            "a.jpg is not in the index: cannot read a.jpg: no such file"
        );
        // anyhow's own chain printing repeats it: what this replaces
        assert_eq!(format!("{error:#}").matches("no such file").count(), 2);
    }

    #[test]
    fn a_cause_the_message_does_not_hold_is_kept() {
        let io = std::io::Error::new(ErrorKind::PermissionDenied, "permission denied");
        let error = anyhow::Error::new(io).context("cannot open the store");
        assert_eq!(describe(&error), "cannot open the store: permission denied");
    }

    #[test]
    fn errors_in_json_are_one_object() {
        let value = error_json("the \"night\" tag");
        assert_eq!(value.to_string(), r#"{"error":"the \"night\" tag"}"#);
    }
}
