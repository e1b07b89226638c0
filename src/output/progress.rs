//! Progress of the long stages on stderr, in one of three forms ([`LogFormat`]): animated bars on a
//! terminal (count, rate, ETA, the stage's name), plain timestamped lines for batch logs ([`PlainLog`]:
//! one at each stage change and one every interval), or nothing. The counts are kept either way.

use std::io::IsTerminal;
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use indicatif::{MultiProgress, ProgressBar, ProgressDrawTarget, ProgressStyle};

/// How progress is shown on stderr.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
#[value(rename_all = "lowercase")]
pub enum LogFormat {
    /// Animated progress bars (for a terminal).
    Bar,
    /// Timestamped lines at each stage change and at an interval (for batch logs).
    Plain,
    /// Nothing.
    None,
}

/// Creates the bars of a run; made once by the command line.
#[derive(Debug, Clone, Copy)]
pub struct Progress {
    format: LogFormat,
}

impl Progress {
    /// Bars on a terminal, plain lines otherwise; nothing when `quiet` is set.
    pub fn new(quiet: bool) -> Self {
        Progress::choose(None, quiet)
    }

    /// `format` as asked (default: bars when stderr is a terminal, plain lines otherwise); nothing
    /// when `quiet` is set, whatever the format.
    pub fn choose(format: Option<LogFormat>, quiet: bool) -> Self {
        let format = match (quiet, format) {
            (true, _) => LogFormat::None,
            (false, Some(f)) => f,
            (false, None) if std::io::stderr().is_terminal() => LogFormat::Bar,
            (false, None) => LogFormat::Plain,
        };
        Progress { format }
    }

    /// Progress that never shows anything (tests, library use).
    pub fn hidden() -> Self {
        Progress {
            format: LogFormat::None,
        }
    }

    /// How progress is shown.
    pub fn format(&self) -> LogFormat {
        self.format
    }

    /// Whether bars are drawn.
    pub fn is_shown(&self) -> bool {
        self.format == LogFormat::Bar
    }

    /// A bar for one stage: `name` labels it, `unit` names what is counted ("evaluations", "draws"),
    /// `total` is the count at which the stage ends, where known (a spinner with the rate otherwise).
    /// It draws only in the bar format.
    pub fn stage(&self, name: &str, unit: &str, total: Option<u64>) -> Bar {
        self.group().stage(name, unit, total)
    }

    /// A group of bars drawn together, one line each (several bars made with [`Progress::stage`]
    /// would overwrite each other's line).
    pub fn group(&self) -> BarGroup {
        BarGroup {
            multi: self
                .is_shown()
                .then(|| MultiProgress::with_draw_target(ProgressDrawTarget::stderr())),
        }
    }
}

/// Bars drawn together on stderr, one line each; draws nothing unless made in the bar format.
#[derive(Debug, Clone)]
pub struct BarGroup {
    multi: Option<MultiProgress>,
}

impl BarGroup {
    /// A bar of the group, as [`Progress::stage`] describes.
    pub fn stage(&self, name: &str, unit: &str, total: Option<u64>) -> Bar {
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
        let mut bar = ProgressBar::with_draw_target(total, ProgressDrawTarget::hidden());
        // The template is built above from fixed keys, so this only falls back if indicatif changes.
        let style = ProgressStyle::with_template(&template)
            .unwrap_or_else(|_| ProgressStyle::default_bar())
            .progress_chars("=> ");
        bar.set_style(style);
        bar.set_prefix(name.to_string());
        if let Some(m) = &self.multi {
            bar = m.add(bar);
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

/// What a run is doing at one moment, for a plain progress line.
#[derive(Debug, Clone, PartialEq)]
pub struct Snapshot {
    /// The stage, in words ("analysis", "warm-up", ...).
    pub stage: String,
    /// Model runs so far, where counted.
    pub runs: Option<u64>,
    /// Chain iterations done and in all, where there are chains.
    pub iterations: Option<(u64, u64)>,
}

/// Plain progress lines for logs: one at each stage change and one every `every`, each with the UTC
/// time, the time since the start, the stage, the model runs and their rate since the line before, and
/// the chains' iterations.
#[derive(Debug)]
pub struct PlainLog {
    label: String,
    every: Duration,
    start: Instant,
    last: Option<(Instant, u64)>,
    stage: Option<String>,
}

impl PlainLog {
    /// Lines labelled `label` (e.g. "varpost sample"), at least every `every`, timed from `start`.
    pub fn new(label: impl Into<String>, every: Duration, start: Instant) -> Self {
        PlainLog {
            label: label.into(),
            every,
            start,
            last: None,
            stage: None,
        }
    }

    /// The line to print at `now`, if one is due: the stage changed or `every` has passed since the
    /// last line.
    pub fn update(&mut self, now: Instant, wall: SystemTime, s: &Snapshot) -> Option<String> {
        let changed = self.stage.as_deref() != Some(s.stage.as_str());
        let late = self
            .last
            .is_none_or(|(t, _)| now.saturating_duration_since(t) >= self.every);
        (changed || late).then(|| self.line(now, wall, s, &s.stage))
    }

    /// The closing line, printed whatever the time: `outcome` says how the run ended; the rate is the
    /// average over the whole run.
    pub fn finish(
        &mut self,
        now: Instant,
        wall: SystemTime,
        s: &Snapshot,
        outcome: &str,
    ) -> String {
        self.last = None;
        self.line(now, wall, s, outcome)
    }

    fn line(&mut self, now: Instant, wall: SystemTime, s: &Snapshot, what: &str) -> String {
        let elapsed = now.saturating_duration_since(self.start);
        let mut text = format!(
            "{} {} [{}]: {what}",
            utc_timestamp(wall),
            self.label,
            clock(elapsed)
        );
        if let Some(runs) = s.runs {
            let (t0, r0) = self.last.unwrap_or((self.start, 0));
            let dt = now.saturating_duration_since(t0).as_secs_f64();
            text.push_str(&format!("; {runs} model runs"));
            // A rate over less than a second says little.
            if dt >= 1.0 {
                text.push_str(&format!(" ({:.1}/s)", runs.saturating_sub(r0) as f64 / dt));
            }
        }
        if let Some((done, total)) = s.iterations {
            let pct = if total > 0 {
                100.0 * done as f64 / total as f64
            } else {
                0.0
            };
            text.push_str(&format!("; chain iterations {done}/{total} ({pct:.0}%)"));
        }
        self.last = Some((now, s.runs.unwrap_or(0)));
        self.stage = Some(s.stage.clone());
        text
    }
}

/// Elapsed time as h:mm:ss.
fn clock(d: Duration) -> String {
    let s = d.as_secs();
    format!("{}:{:02}:{:02}", s / 3600, s / 60 % 60, s % 60)
}

/// A time as `YYYY-MM-DDTHH:MM:SSZ` (UTC; times before 1970 print as 1970-01-01T00:00:00Z).
pub fn utc_timestamp(t: SystemTime) -> String {
    let secs = t.duration_since(UNIX_EPOCH).map_or(0, |d| d.as_secs());
    let (y, m, d) = civil_from_days((secs / 86_400) as i64);
    let s = secs % 86_400;
    format!(
        "{y:04}-{m:02}-{d:02}T{:02}:{:02}:{:02}Z",
        s / 3600,
        s / 60 % 60,
        s % 60
    )
}

/// The proleptic Gregorian date of a day counted from 1970-01-01 (day 0), by eras of 400 years of
/// 146 097 days, with years starting on 1 March so that the leap day comes last.
fn civil_from_days(days: i64) -> (i64, u32, u32) {
    let z = days + 719_468; // days from 0000-03-01
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097); // day of the era, [0, 146096]
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365; // year of the era, [0, 399]
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100); // day of the year from 1 March, [0, 365]
    let mp = (5 * doy + 2) / 153; // month from March, [0, 11]
    let d = (doy - (153 * mp + 2) / 5 + 1) as u32;
    let m = if mp < 10 { mp + 3 } else { mp - 9 } as u32;
    let y = yoe + era * 400 + i64::from(m <= 2);
    (y, m, d)
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

    #[test]
    fn plain_format_draws_no_bar() {
        let p = Progress::choose(Some(LogFormat::Plain), false);
        assert_eq!(p.format(), LogFormat::Plain);
        assert!(!p.is_shown());
        assert!(p.stage("x", "runs", None).bar.is_hidden());
        assert_eq!(
            Progress::choose(Some(LogFormat::Bar), true).format(),
            LogFormat::None
        );
    }

    #[test]
    fn utc_timestamps_match_known_dates() {
        // Common practice, no source: POSIX time counts 86 400 s per day from 1970-01-01T00:00:00Z;
        // 951 782 400 s is 2000-02-29 (a leap day of a year divisible by 400), 4 107 542 400 s is
        // 2100-03-01 (2100 is not a leap year).
        let at = |s: u64| utc_timestamp(UNIX_EPOCH + Duration::from_secs(s));
        assert_eq!(at(0), "1970-01-01T00:00:00Z");
        assert_eq!(at(951_782_400 + 3_723), "2000-02-29T01:02:03Z");
        assert_eq!(at(951_868_800), "2000-03-01T00:00:00Z");
        assert_eq!(at(4_107_542_400 - 1), "2100-02-28T23:59:59Z");
        assert_eq!(at(4_107_542_400), "2100-03-01T00:00:00Z");
    }

    fn snap(stage: &str, runs: u64) -> Snapshot {
        Snapshot {
            stage: stage.into(),
            runs: Some(runs),
            iterations: Some((50, 200)),
        }
    }

    #[test]
    fn plain_lines_come_at_stage_changes_and_intervals() {
        let t0 = Instant::now();
        let wall = UNIX_EPOCH;
        let sec = |s: u64| t0 + Duration::from_secs(s);
        let mut log = PlainLog::new("varpost sample", Duration::from_secs(30), t0);
        let first = log.update(sec(0), wall, &snap("analysis", 0)).unwrap();
        assert_eq!(
            first,
            "1970-01-01T00:00:00Z varpost sample [0:00:00]: analysis; 0 model runs; \
             chain iterations 50/200 (25%)"
        );
        assert!(log.update(sec(10), wall, &snap("analysis", 100)).is_none());
        let change = log.update(sec(20), wall, &snap("warm-up", 200)).unwrap();
        assert!(
            change.contains("[0:00:20]: warm-up; 200 model runs (10.0/s)"),
            "{change}"
        );
        assert!(log.update(sec(49), wall, &snap("warm-up", 300)).is_none());
        let late = log.update(sec(50), wall, &snap("warm-up", 500)).unwrap();
        assert!(late.contains("500 model runs (10.0/s)"), "{late}");
        let end = log.finish(sec(50), wall, &snap("sampling", 500), "finished");
        assert!(
            end.contains(": finished; 500 model runs (10.0/s);"),
            "{end}"
        );
    }
}
