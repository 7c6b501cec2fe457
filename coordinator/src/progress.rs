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
            ProgressStyle::with_template("{prefix} {percent:>3}% [{wide_bar}] {elapsed} {msg}")
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
            let store = &progress.store;
            let mut message = format!(
                "{:.1}M quads {}/{}",
                store.quads as f64 / 1e6,
                human_bytes(store.bytes),
                human_bytes(store.budget)
            );
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
