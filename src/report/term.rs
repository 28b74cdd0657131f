//! The terminal: colour for tables (only on a TTY, never when `NO_COLOR` is set, see
//! no-color.org) and a progress line on stderr for long runs (only on a TTY, never under
//! `--quiet`). Renderers take a `Paint` so the same table prints plain into files and pipes.

use std::io::{IsTerminal, Write};
use std::time::{Duration, Instant};

/// Whether table renderers colour their output.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct Paint {
    pub colour: bool,
}

/// What a painted word means; the colours are chosen by meaning, not by position.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Tone {
    /// Runs on the accelerator, passed.
    Good,
    /// Stays on the CPU, a note.
    Warn,
    /// Failed, blocked.
    Bad,
    /// Secondary text.
    Dim,
    /// Headings.
    Strong,
}

impl Paint {
    /// Colour when stdout is a terminal and `NO_COLOR` is absent or empty.
    pub fn for_stdout() -> Paint {
        let no_color = std::env::var_os("NO_COLOR").is_some_and(|v| !v.is_empty());
        Paint {
            colour: !no_color && std::io::stdout().is_terminal(),
        }
    }

    pub fn paint(self, tone: Tone, text: &str) -> String {
        if !self.colour {
            return text.to_string();
        }
        let code = match tone {
            Tone::Good => "32",
            Tone::Warn => "33",
            Tone::Bad => "1;31",
            Tone::Dim => "2",
            Tone::Strong => "1",
        };
        format!("\x1b[{code}m{text}\x1b[0m")
    }
}

/// A one-line progress indicator on stderr. Silent unless stderr is a terminal and the run
/// is not quiet; it draws nothing during the first 300 ms so quick runs do not flicker.
pub struct Progress {
    enabled: bool,
    delay: Duration,
    started: Instant,
    drawn: bool,
    label: &'static str,
}

/// How long a run goes before the progress line appears; `TILECUT_PROGRESS_AFTER_MS`
/// overrides it (tests set 0 to see the line on short runs).
fn delay() -> Duration {
    std::env::var("TILECUT_PROGRESS_AFTER_MS")
        .ok()
        .and_then(|v| v.parse().ok())
        .map_or(Duration::from_millis(300), Duration::from_millis)
}
const WIDTH: usize = 24;

impl Progress {
    pub fn new(label: &'static str, quiet: bool) -> Progress {
        Progress {
            enabled: !quiet && std::io::stderr().is_terminal(),
            delay: delay(),
            started: Instant::now(),
            drawn: false,
            label,
        }
    }

    /// Draws `done` of `total` as a bar, or only a stage name when `total` is 0.
    pub fn update(&mut self, done: usize, total: usize, stage: &str) {
        if !self.enabled || self.started.elapsed() < self.delay {
            return;
        }
        let line = if total > 0 {
            let filled = (done.min(total) * WIDTH) / total.max(1);
            format!(
                "{} [{}{}] {done}/{total} {stage}",
                self.label,
                "#".repeat(filled),
                " ".repeat(WIDTH - filled)
            )
        } else {
            format!(
                "{}: {stage} ({:.1} s)",
                self.label,
                self.started.elapsed().as_secs_f64()
            )
        };
        let mut err = std::io::stderr().lock();
        let _ = write!(err, "\r\x1b[2K{line}");
        let _ = err.flush();
        self.drawn = true;
    }

    /// Clears the line so the report or the next message starts clean.
    pub fn finish(&mut self) {
        if self.drawn {
            let mut err = std::io::stderr().lock();
            let _ = write!(err, "\r\x1b[2K");
            let _ = err.flush();
            self.drawn = false;
        }
    }
}

/// A `Progress` that callbacks running on several threads (the survey's workers) update.
pub struct SharedProgress(std::sync::Mutex<Progress>);

impl SharedProgress {
    pub fn new(label: &'static str, quiet: bool) -> SharedProgress {
        SharedProgress(std::sync::Mutex::new(Progress::new(label, quiet)))
    }

    pub fn update(&self, done: usize, total: usize, stage: &str) {
        if let Ok(mut p) = self.0.lock() {
            p.update(done, total, stage);
        }
    }

    pub fn finish(&self) {
        if let Ok(mut p) = self.0.lock() {
            p.finish();
        }
    }
}

impl Drop for Progress {
    fn drop(&mut self) {
        self.finish();
    }
}
