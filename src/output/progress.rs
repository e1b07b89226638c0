//! Progress bars on stderr for the long stages (analysis, Hessian, sampling): count, rate, ETA.
//!
//! Quiet when asked to be or when stderr is not a terminal (a log file or a pipe gets no bar
//! animation); the counts are kept either way.

use std::io::IsTerminal;
use std::time::Duration;

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

/// Creates the bars of a run; made once by the pipeline.
#[derive(Debug, Clone, Copy)]
pub struct Progress {
    shown: bool,
}

impl Progress {
    /// Bars are shown unless `quiet` is set or stderr is not a terminal.
    pub fn new(quiet: bool) -> Self {
        Progress {
            shown: !quiet && std::io::stderr().is_terminal(),
        }
    }

    /// Progress that never draws (tests, library use).
    pub fn hidden() -> Self {
        Progress { shown: false }
    }

    /// Whether bars are drawn.
    pub fn is_shown(&self) -> bool {
        self.shown
    }

    /// A bar for one stage: `name` labels it, `unit` names what is counted ("evaluations", "draws"),
    /// `total` is the count at which the stage ends, where known (a spinner with the rate otherwise).
    pub fn stage(&self, name: &str, unit: &str, total: Option<u64>) -> Bar {
        let target = if self.shown {
            ProgressDrawTarget::stderr()
        } else {
            ProgressDrawTarget::hidden()
        };
        // Braces would be read as template keys.
        let unit: String = unit.chars().filter(|c| *c != '{' && *c != '}').collect();
        let template = match total {
            Some(_) => format!(
                "{{prefix:>10}} [{{bar:30}}] {{human_pos}}/{{human_len}} {unit} \
                 ({{per_sec}}, {{elapsed}} elapsed, ETA {{eta}}) {{msg}}"
            ),
            None => format!(
                "{{prefix:>10}} {{spinner}} {{human_pos}} {unit} ({{per_sec}}, {{elapsed}} elapsed) \
                 {{msg}}"
            ),
        };
        let bar = ProgressBar::with_draw_target(total, target);
        // The template is built above from fixed keys, so this only falls back if indicatif changes.
        let style = ProgressStyle::with_template(&template)
            .unwrap_or_else(|_| ProgressStyle::default_bar())
            .progress_chars("=> ");
        bar.set_style(style);
        bar.set_prefix(name.to_string());
        if self.shown {
            bar.enable_steady_tick(Duration::from_millis(200));
        }
        Bar { bar }
    }
}

/// One stage's bar. Cheap to clone; clones count into the same bar (e.g. one per chain thread).
#[derive(Debug, Clone)]
pub struct Bar {
    bar: ProgressBar,
}

impl Bar {
    /// Counts `n` more units done.
    pub fn inc(&self, n: u64) {
        self.bar.inc(n);
    }

    /// Sets the count done.
    pub fn set_position(&self, n: u64) {
        self.bar.set_position(n);
    }

    /// Shows a short status after the counts (e.g. the current cost or acceptance rate).
    pub fn set_message(&self, msg: impl Into<String>) {
        self.bar.set_message(msg.into());
    }

    /// The count done so far.
    pub fn position(&self) -> u64 {
        self.bar.position()
    }

    /// Ends the stage, leaving its final line on screen.
    pub fn finish(&self) {
        self.bar.finish();
    }

    /// Ends the stage with a closing message.
    pub fn finish_with(&self, msg: impl Into<String>) {
        self.bar.finish_with_message(msg.into());
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quiet_bars_draw_nothing_but_count() {
        // Behaviour of indicatif's hidden draw target (indicatif documentation, ProgressDrawTarget::
        // hidden): nothing drawn, state kept.
        let p = Progress::new(true);
        assert!(!p.is_shown());
        let bar = p.stage("sampling", "draws", Some(10));
        assert!(bar.bar.is_hidden());
        let clone = bar.clone();
        bar.inc(3);
        clone.inc(4);
        assert_eq!(bar.position(), 7);
        assert_eq!(bar.bar.length(), Some(10));
        bar.finish();
        assert!(bar.bar.is_finished());
        let spinner = Progress::hidden().stage("analysis", "evaluations", None);
        assert_eq!(spinner.bar.length(), None);
    }

    #[test]
    fn braces_in_a_unit_do_not_break_the_template() {
        let bar = Progress::hidden().stage("x", "{pos}", Some(2));
        bar.inc(1);
        assert_eq!(bar.position(), 1);
    }
}
