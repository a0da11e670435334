//! Progress reporting on stderr: an indicatif bar with ETA on a terminal, plain periodic log lines
//! when stderr is a file or pipe (batch logs stay readable), nothing with `--quiet`.

use std::io::IsTerminal;
use std::time::{Duration, Instant};

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

/// How progress is shown.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum ProgressMode {
    /// Bar on a terminal, log lines otherwise.
    Auto,
    /// Plain log lines, whatever stderr is.
    Log,
    /// Nothing.
    Quiet,
}

/// Tracks work done against a total and reports it.
pub struct Progress {
    label: String,
    total: f64,
    done: f64,
    /// Work done before this run (resumed): not counted in the rate.
    base: f64,
    start: Instant,
    last_log: Instant,
    log_every: Duration,
    bar: Option<ProgressBar>,
    log: bool,
    /// No log line yet: the first piece of work done prints one at once.
    first: bool,
}

fn fmt_secs(s: f64) -> String {
    let s = s.max(0.0).round() as u64;
    if s >= 3600 {
        format!("{}h{:02}m{:02}s", s / 3600, s / 60 % 60, s % 60)
    } else if s >= 60 {
        format!("{}m{:02}s", s / 60, s % 60)
    } else {
        format!("{s}s")
    }
}

impl Progress {
    /// Starts reporting `label` with `total` units of work (any unit; point-pixel updates here).
    pub fn new(label: &str, total: f64, mode: ProgressMode) -> Progress {
        let tty = std::io::stderr().is_terminal();
        let (bar, log) = match mode {
            ProgressMode::Quiet => (None, false),
            ProgressMode::Auto if tty => {
                let bar =
                    ProgressBar::with_draw_target(Some(1_000_000), ProgressDrawTarget::stderr());
                bar.set_style(
                    ProgressStyle::with_template("{msg} [{bar:40}] {percent:>3}% elapsed {elapsed_precise} eta {eta_precise}")
                        .expect("static template")
                        .progress_chars("=> "),
                );
                bar.set_message(label.to_string());
                (Some(bar), false)
            }
            _ => (None, true),
        };
        let now = Instant::now();
        Progress {
            label: label.to_string(),
            total: total.max(1.0),
            done: 0.0,
            base: 0.0,
            start: now,
            last_log: now,
            log_every: Duration::from_secs(10),
            bar,
            log,
            first: true,
        }
    }

    /// Interval between plain log lines (default 10 s).
    pub fn set_log_interval(&mut self, d: Duration) {
        self.log_every = d;
    }

    /// Counts `work` units as done before this run (a resumed run): they show in the share,
    /// not in the rate the ETA comes from.
    pub fn skip(&mut self, work: f64) {
        self.done = (self.done + work).min(self.total);
        self.base = self.done;
        if let Some(bar) = &self.bar {
            bar.set_position((self.done / self.total * 1_000_000.0) as u64);
            bar.reset_eta();
        }
    }

    /// Adds `work` units done. With log lines, the first call prints one at once (a long run
    /// shows it is under way after its first piece of work), then one per interval.
    pub fn advance(&mut self, work: f64) {
        self.done = (self.done + work).min(self.total);
        let frac = self.done / self.total;
        if let Some(bar) = &self.bar {
            bar.set_position((frac * 1_000_000.0) as u64);
        }
        if self.log && (self.first || self.last_log.elapsed() >= self.log_every) {
            self.first = false;
            self.last_log = Instant::now();
            let el = self.start.elapsed().as_secs_f64();
            let now = self.done - self.base;
            let eta = if now > 0.0 {
                (self.total - self.done) * el / now
            } else {
                f64::NAN
            };
            eprintln!(
                "fringemill: {}: {:5.1}% elapsed {} eta {}",
                self.label,
                100.0 * frac,
                fmt_secs(el),
                if eta.is_finite() {
                    fmt_secs(eta)
                } else {
                    "?".into()
                }
            );
        }
    }

    /// Ends the report without claiming completion (interrupted work).
    pub fn abandon(self) {
        if let Some(bar) = self.bar {
            bar.abandon();
        }
    }

    /// Ends the report.
    pub fn finish(self) {
        if let Some(bar) = self.bar {
            bar.finish_and_clear();
        }
        if self.log {
            eprintln!(
                "fringemill: {}: done in {}",
                self.label,
                fmt_secs(self.start.elapsed().as_secs_f64())
            );
        }
    }
}

/// Peak resident memory of this process in bytes (Linux: VmHWM of /proc/self/status), if known.
pub fn peak_rss_bytes() -> Option<u64> {
    let s = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = s.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kb: u64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb * 1024)
}
