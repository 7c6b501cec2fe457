//! The progress line on standard error, shown only when it is a terminal.

use std::io::IsTerminal;

use deeptime_engine::{Progress, human_bytes};
use indicatif::{ProgressBar, ProgressStyle};

/// A progress line for one long step, or nothing when stderr is not a terminal.
pub struct Line {
    bar: Option<ProgressBar>,
}

impl Line {
    pub fn start(what: &str) -> Line {
        if !std::io::stderr().is_terminal() {
            return Line { bar: None };
        }
        let bar = ProgressBar::new(1000);
        bar.set_style(
            ProgressStyle::with_template(
                "{prefix} [{bar:30}] {percent:>3}% {elapsed_precise} {msg}",
            )
            .expect("the template is valid")
            .progress_chars("=> "),
        );
        bar.set_prefix(what.to_string());
        Line { bar: Some(bar) }
    }

    /// Shows where the engine is.
    pub fn update(&self, progress: &Progress) {
        if let Some(bar) = &self.bar {
            bar.set_position((progress.done * 1000.0) as u64);
            bar.set_message(format!(
                "{} quads, {} of {}, {} collections",
                progress.store.quads,
                human_bytes(progress.store.bytes),
                human_bytes(progress.store.budget),
                progress.store.collections
            ));
        }
    }

    pub fn finish(self) {
        if let Some(bar) = self.bar {
            bar.finish_and_clear();
        }
    }
}
