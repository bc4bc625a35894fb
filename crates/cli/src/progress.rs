//! Progress bars on a terminal, silence elsewhere (indicatif hides itself when stderr is
//! not a terminal, so pipes and CI logs stay clean).
//!
//! A bar shows one stage at a time: `stage [=====>    ] done/total (time left)`. A new
//! stage gets a new bar, made whole (name, size, count) before it is first drawn, so no
//! stage is ever shown with another's count; within a stage the count never shows more
//! done than there is (`46/5`): the position and the length change in whichever order keeps
//! `done ≤ total` at every moment, since the bar may be drawn between any two setters.

use std::sync::Mutex;

use indicatif::{ProgressBar, ProgressStyle};

/// The parts of a bar that change within a stage, so the order of the changes can be
/// checked without a terminal.
pub trait Gauge {
    fn position(&self) -> u64;
    fn set_position(&self, position: u64);
    fn set_length(&self, length: u64);
}

impl Gauge for ProgressBar {
    fn position(&self) -> u64 {
        ProgressBar::position(self)
    }
    fn set_position(&self, position: u64) {
        ProgressBar::set_position(self, position);
    }
    fn set_length(&self, length: u64) {
        ProgressBar::set_length(self, length);
    }
}

/// Moves `gauge` to `done` of `total` (`done` capped at `total`), never showing more done
/// than there is on the way.
pub fn advance(gauge: &impl Gauge, done: u64, total: u64) {
    let done = done.min(total);
    if total < gauge.position() {
        gauge.set_position(done);
        gauge.set_length(total);
    } else {
        gauge.set_length(total);
        gauge.set_position(done);
    }
}

/// One progress bar at a time for a command's stages.
pub struct Progress {
    /// The stage shown and its bar; held while the bar changes, as scans report from
    /// several threads.
    shown: Mutex<Option<(String, ProgressBar)>>,
}

fn style() -> ProgressStyle {
    ProgressStyle::with_template("{msg:>30} [{bar:32}] {pos}/{len} ({eta} left)")
        .map(|style| style.progress_chars("=> "))
        .unwrap_or_else(|_| ProgressStyle::default_bar())
}

impl Progress {
    pub fn new() -> Progress {
        Progress {
            shown: Mutex::new(None),
        }
    }

    /// `done` of `total` in `stage`.
    pub fn show(&self, stage: &str, done: usize, total: usize) {
        let (done, total) = (done as u64, total as u64);
        let mut shown = self
            .shown
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner());
        match shown.as_ref() {
            Some((current, bar)) if current == stage => advance(bar, done, total),
            _ => {
                if let Some((_, old)) = shown.take() {
                    old.finish_and_clear();
                }
                let bar = ProgressBar::new(total)
                    .with_style(style())
                    .with_message(stage.to_string())
                    .with_position(done.min(total));
                bar.tick();
                *shown = Some((stage.to_string(), bar));
            }
        }
    }

    /// A line above the bar, on a terminal only (as the bar itself).
    pub fn note(&self, line: &str) {
        let shown = self
            .shown
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner());
        match shown.as_ref() {
            Some((_, bar)) => bar.println(line),
            None => ProgressBar::new(0).println(line),
        }
    }

    pub fn finish(&self) {
        let mut shown = self
            .shown
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner());
        if let Some((_, bar)) = shown.take() {
            bar.finish_and_clear();
        }
    }
}

/// `work` with a spinner named `what` while it runs (on a terminal).
pub fn with_spinner<T>(what: &str, work: impl FnOnce() -> T) -> T {
    let spinner = ProgressBar::new_spinner().with_message(what.to_string());
    spinner.enable_steady_tick(std::time::Duration::from_millis(200));
    let done = work();
    spinner.finish_and_clear();
    done
}

/// Rewrites the store's database compactly when a writer left it much grown (see
/// `Store::compact_if_grown`).
pub fn compact_with_note(store: &mut tagweave_store::Store) -> anyhow::Result<()> {
    with_spinner("tidying the database", || store.compact_if_grown())?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use std::cell::Cell;

    use super::*;

    /// A bar that checks, after every single change, that it never shows more done
    /// than there is.
    #[derive(Default)]
    struct Checked {
        position: Cell<u64>,
        length: Cell<u64>,
    }

    impl Checked {
        fn check(&self) {
            assert!(
                self.position.get() <= self.length.get(),
                "the bar shows {}/{}",
                self.position.get(),
                self.length.get()
            );
        }
    }

    impl Gauge for Checked {
        fn position(&self) -> u64 {
            self.position.get()
        }
        fn set_position(&self, position: u64) {
            self.position.set(position);
            self.check();
        }
        fn set_length(&self, length: u64) {
            self.length.set(length);
            self.check();
        }
    }

    #[test]
    fn the_bar_never_shows_more_done_than_there_is() {
        let gauge = Checked::default();
        for done in 1..=29 {
            advance(&gauge, done, 100);
        }
        // the total shrinks below the count, and a count past the end
        advance(&gauge, 4, 5);
        advance(&gauge, 2, 3);
        advance(&gauge, 9, 3);
        assert_eq!((gauge.position.get(), gauge.length.get()), (3, 3));
    }

    #[test]
    fn a_new_stage_starts_a_whole_new_bar() {
        let progress = Progress::new();
        progress.show("trial run: fine-tuning", 29, 100);
        progress.show("pretraining image layer", 1, 5);
        let shown = progress.shown.lock().unwrap();
        let (stage, bar) = shown.as_ref().unwrap();
        assert_eq!(stage, "pretraining image layer");
        assert_eq!((bar.position(), bar.length()), (1, Some(5)));
    }
}
