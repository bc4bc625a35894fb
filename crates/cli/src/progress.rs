//! Progress bars on a terminal, silence elsewhere (indicatif hides itself when stderr is
//! not a terminal, so pipes and CI logs stay clean).

use indicatif::{ProgressBar, ProgressStyle};

pub fn bar(message: &'static str) -> ProgressBar {
    let bar = ProgressBar::new(0);
    bar.set_style(
        ProgressStyle::with_template("{msg:>26} [{bar:32}] {pos}/{len} ({eta} left)")
            .map(|style| style.progress_chars("=> "))
            .unwrap_or_else(|_| ProgressStyle::default_bar()),
    );
    bar.set_message(message);
    bar
}
