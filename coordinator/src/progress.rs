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
                "{prefix} {percent:>3}% [{wide_bar}] {elapsed} eta {eta} {msg}",
            )
            .expect("the template is valid")
            .progress_chars("=> "),
        );
        bar.set_prefix(what.to_string());
        Line { bar: Some(bar) }
    }

    /// Shows where the engine is.
    pub fn update(&self, progress: &Progress) {
        self.update_part(0.0, 1.0, progress, "");
    }

    /// Shows where the engine is in one part of a longer job: `before` of
    /// the whole was done before this part, which is `share` of the whole.
    /// `note` leads the message (the generation and population, say).
    pub fn update_part(&self, before: f64, share: f64, progress: &Progress, note: &str) {
        if let Some(bar) = &self.bar {
            let done = (before + share * progress.done).clamp(0.0, 1.0);
            bar.set_position((done * 1000.0) as u64);
            let store = &progress.store;
            let mut message = if note.is_empty() {
                format!(
                    "{:.1}M quads {}/{}",
                    store.quads as f64 / 1e6,
                    human_bytes(store.bytes),
                    human_bytes(store.budget)
                )
            } else {
                format!("{note}{}", human_bytes(store.bytes))
            };
            if store.collections > 0 {
                message.push_str(&format!(" {} gc", store.collections));
            }
            bar.set_message(message);
        }
    }

    pub fn finish(self) {
        if let Some(bar) = self.bar {
            bar.finish_and_clear();
        }
    }
}
