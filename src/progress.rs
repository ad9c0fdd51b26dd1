//! Progress of long steps, as a handle passed from the command line down into the
//! library: the library announces steps (`step`) and finished units of work (`inc`), and
//! never prints. What happens with the announcements is the caller's choice of
//! [`ProgressSink`]: a bar with ETA on a terminal ([`TerminalBar`], indicatif), plain
//! timestamped lines at a bounded rate for logs ([`LogLines`]), or nothing
//! ([`Progress::silent`], e.g. `--quiet` and library users).

use std::io::Write;
use std::sync::mpsc::{RecvTimeoutError, Sender, channel};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant, SystemTime};

/// Receives progress announcements.
pub trait ProgressSink: Send + Sync {
    /// A step starts; `total` units of work when known.
    fn start(&self, step: &str, total: Option<u64>);
    /// `n` more units of the current step are done.
    fn inc(&self, n: u64);
    /// The current step is done.
    fn finish(&self);
    /// The current step (if any) ends without finishing, e.g. on an error.
    fn abort(&self) {
        self.finish();
    }
}

/// A cheap, copyable progress handle (possibly silent). It refers to a sink that lives
/// for the whole process ([`Progress::leak`] is called once per command by the binary),
/// so that engine settings that are `Copy` can carry it.
#[derive(Clone, Copy, Default)]
pub struct Progress {
    sink: Option<&'static dyn ProgressSink>,
}

impl std::fmt::Debug for Progress {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(if self.sink.is_some() {
            "Progress(active)"
        } else {
            "Progress(silent)"
        })
    }
}

/// Progress never changes a result, so settings that differ only in their progress
/// handle compare equal.
impl PartialEq for Progress {
    fn eq(&self, _: &Self) -> bool {
        true
    }
}

impl Progress {
    /// A handle that reports nothing.
    pub fn silent() -> Self {
        Self::default()
    }

    /// A handle that reports to `sink`, which lives for the rest of the process (the
    /// binary makes one per command).
    pub fn leak(sink: Box<dyn ProgressSink>) -> Self {
        Self {
            sink: Some(Box::leak(sink)),
        }
    }

    /// Announces a step (finishing the previous one); `total` units when known.
    pub fn step(&self, name: &str, total: Option<u64>) {
        if let Some(s) = self.sink {
            s.start(name, total);
        }
    }

    /// `n` units of the current step are done.
    pub fn inc(&self, n: u64) {
        if let Some(s) = self.sink {
            s.inc(n);
        }
    }

    /// The current step is done.
    pub fn finish(&self) {
        if let Some(s) = self.sink {
            s.finish();
        }
    }

    /// The current step (if any) ends without finishing (an error stopped it).
    pub fn abort(&self) {
        if let Some(s) = self.sink {
            s.abort();
        }
    }
}

/// A progress bar with elapsed time and ETA (a spinner when the total is unknown), drawn
/// on stderr by indicatif. For interactive terminals.
pub struct TerminalBar {
    bar: Mutex<Option<indicatif::ProgressBar>>,
}

impl Default for TerminalBar {
    fn default() -> Self {
        Self::new()
    }
}

impl TerminalBar {
    /// A bar on stderr.
    pub fn new() -> Self {
        Self {
            bar: Mutex::new(None),
        }
    }
}

impl ProgressSink for TerminalBar {
    fn start(&self, step: &str, total: Option<u64>) {
        use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
        let mut g = self.bar.lock().unwrap_or_else(|e| e.into_inner());
        if let Some(b) = g.take() {
            b.finish_and_clear();
        }
        let b = match total {
            Some(n) => {
                let b = ProgressBar::with_draw_target(Some(n), ProgressDrawTarget::stderr());
                if let Ok(st) = ProgressStyle::with_template(
                    "[{elapsed_precise}] {msg} {wide_bar} {pos}/{len} (ETA {eta})",
                ) {
                    b.set_style(st);
                }
                b
            }
            None => {
                let b = ProgressBar::with_draw_target(None, ProgressDrawTarget::stderr());
                if let Ok(st) = ProgressStyle::with_template("[{elapsed_precise}] {spinner} {msg}")
                {
                    b.set_style(st);
                }
                b
            }
        };
        b.set_message(step.to_string());
        b.enable_steady_tick(Duration::from_millis(200));
        *g = Some(b);
    }

    fn inc(&self, n: u64) {
        if let Some(b) = self.bar.lock().unwrap_or_else(|e| e.into_inner()).as_ref() {
            b.inc(n);
        }
    }

    fn finish(&self) {
        if let Some(b) = self.bar.lock().unwrap_or_else(|e| e.into_inner()).take() {
            b.finish_and_clear();
        }
    }
}

struct LogState {
    step: String,
    total: Option<u64>,
    done: u64,
    started: Instant,
    last_line: Instant,
    ticker: Option<Sender<()>>,
}

/// Plain timestamped lines (`2026-01-01T10:00:00Z ngreach: step ...`) for logs: one at the
/// start and end of each step, and while a step runs at most one every `interval` (with
/// the count and an ETA when the total is known, else the elapsed time).
pub struct LogLines {
    out: Arc<Mutex<Box<dyn Write + Send>>>,
    interval: Duration,
    state: Arc<Mutex<Option<LogState>>>,
}

impl LogLines {
    /// Lines to `out`, progress lines at most every `interval`.
    pub fn new(out: Box<dyn Write + Send>, interval: Duration) -> Self {
        Self {
            out: Arc::new(Mutex::new(out)),
            interval,
            state: Arc::new(Mutex::new(None)),
        }
    }

    fn line(out: &Mutex<Box<dyn Write + Send>>, text: &str) {
        let mut o = out.lock().unwrap_or_else(|e| e.into_inner());
        let _ = writeln!(o, "{} ngreach: {text}", utc_now());
        let _ = o.flush();
    }

    fn status(s: &LogState) -> String {
        let el = s.started.elapsed().as_secs_f64();
        match s.total {
            Some(t) if s.done > 0 => {
                let eta = el / s.done as f64 * (t.saturating_sub(s.done)) as f64;
                format!(
                    "{}: {}/{} done, {:.0} s elapsed, ETA {:.0} s",
                    s.step, s.done, t, el, eta
                )
            }
            Some(t) => format!("{}: 0/{t} done, {el:.0} s elapsed", s.step),
            None => format!("{}: running, {el:.0} s elapsed", s.step),
        }
    }
}

impl LogLines {
    fn end(&self, word: &str) {
        let old = self.state.lock().unwrap_or_else(|e| e.into_inner()).take();
        if let Some(mut s) = old {
            drop(s.ticker.take());
            let count = s
                .total
                .map_or(String::new(), |t| format!(" ({}/{t})", s.done));
            Self::line(
                &self.out,
                &format!(
                    "{}: {word}{count} after {:.1} s",
                    s.step,
                    s.started.elapsed().as_secs_f64()
                ),
            );
        }
    }
}

impl ProgressSink for LogLines {
    fn start(&self, step: &str, total: Option<u64>) {
        self.finish();
        let total_text = total.map_or(String::new(), |t| format!(" ({t} items)"));
        Self::line(&self.out, &format!("{step}: started{total_text}"));
        // A ticker thread writes a status line every `interval` while the step runs, so
        // that a log shows where a long step is even when it reports no units.
        let (tx, rx) = channel::<()>();
        let (out, state, interval) = (
            Arc::clone(&self.out),
            Arc::clone(&self.state),
            self.interval,
        );
        std::thread::spawn(move || {
            while let Err(RecvTimeoutError::Timeout) = rx.recv_timeout(interval) {
                let g = state.lock().unwrap_or_else(|e| e.into_inner());
                match g.as_ref() {
                    Some(s) if s.last_line.elapsed() >= interval / 2 => {
                        Self::line(&out, &Self::status(s))
                    }
                    Some(_) => {}
                    None => break,
                }
            }
        });
        let now = Instant::now();
        *self.state.lock().unwrap_or_else(|e| e.into_inner()) = Some(LogState {
            step: step.to_string(),
            total,
            done: 0,
            started: now,
            last_line: now,
            ticker: Some(tx),
        });
    }

    fn inc(&self, n: u64) {
        let mut g = self.state.lock().unwrap_or_else(|e| e.into_inner());
        if let Some(s) = g.as_mut() {
            s.done += n;
            if s.last_line.elapsed() >= self.interval {
                s.last_line = Instant::now();
                Self::line(&self.out, &Self::status(s));
            }
        }
    }

    fn finish(&self) {
        self.end("finished");
    }

    fn abort(&self) {
        self.end("stopped");
    }
}

/// The current UTC time as `YYYY-MM-DDTHH:MM:SSZ` (civil-from-days, Hinnant 2013).
pub fn utc_now() -> String {
    let secs = SystemTime::now()
        .duration_since(SystemTime::UNIX_EPOCH)
        .map_or(0, |d| d.as_secs());
    utc_string(secs)
}

fn utc_string(secs: u64) -> String {
    let days = (secs / 86_400) as i64;
    let rem = secs % 86_400;
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    let y = yoe + era * 400 + i64::from(m <= 2);
    format!(
        "{y:04}-{m:02}-{d:02}T{:02}:{:02}:{:02}Z",
        rem / 3600,
        rem % 3600 / 60,
        rem % 60
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[derive(Clone, Default)]
    struct Buf(Arc<Mutex<Vec<u8>>>);
    impl Write for Buf {
        fn write(&mut self, b: &[u8]) -> std::io::Result<usize> {
            self.0.lock().unwrap().extend_from_slice(b);
            Ok(b.len())
        }
        fn flush(&mut self) -> std::io::Result<()> {
            Ok(())
        }
    }

    #[test]
    fn utc_dates() {
        assert_eq!(utc_string(0), "1970-01-01T00:00:00Z");
        assert_eq!(utc_string(951_782_400), "2000-02-29T00:00:00Z");
        assert_eq!(utc_string(1_700_000_000), "2023-11-14T22:13:20Z");
    }

    #[test]
    fn log_lines_are_timestamped_and_rate_limited() {
        let buf = Buf::default();
        let p = Progress::leak(Box::new(LogLines::new(
            Box::new(buf.clone()),
            Duration::from_secs(3600),
        )));
        p.step("survey bins", Some(1000));
        for _ in 0..1000 {
            p.inc(1);
        }
        p.finish();
        let text = String::from_utf8(buf.0.lock().unwrap().clone()).unwrap();
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(lines.len(), 2, "{text}");
        assert!(
            lines[0].ends_with("survey bins: started (1000 items)"),
            "{text}"
        );
        assert!(lines[1].contains("finished (1000/1000) after"), "{text}");
        assert!(
            lines[0].starts_with("20") && lines[0].contains("Z ngreach:"),
            "{text}"
        );
        // Silent handles accept everything.
        Progress::silent().step("x", None);
    }
}
