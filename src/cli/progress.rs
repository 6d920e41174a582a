//! Progress bars on stderr for long runs (`score`, `compare`, `send`): items done of the total,
//! the rate and the time left, redrawn in place. Callers draw them only when stderr is a
//! terminal, so piped output never changes.

use std::io::Write;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::time::{Duration, Instant};

/// Offline inputs (`score`, `compare`) with at least this many segments get a bar.
pub const PROGRESS_MIN_SEGMENTS: usize = 20_000;
/// Width of the bar itself, in characters, when the terminal has room.
pub const BAR_WIDTH: usize = 30;
/// Narrowest bar drawn when the terminal is narrow (the line may then wrap).
pub const MIN_BAR_WIDTH: usize = 10;
/// How often a bar is redrawn.
pub const REDRAW_INTERVAL: Duration = Duration::from_millis(200);
/// ANSI: clear from the cursor to the end of the line (a shorter line leaves no tail behind).
const CLEAR_TO_END: &str = "\x1b[K";

/// "0:07", "12:05", "1:02:03".
pub fn duration_text(seconds: u64) -> String {
    let (h, m, s) = (seconds / 3600, seconds % 3600 / 60, seconds % 60);
    if h > 0 {
        format!("{h}:{m:02}:{s:02}")
    } else {
        format!("{m}:{s:02}")
    }
}

/// The time left at the rate so far ("ETA 0:07"), "ETA --" before there is a rate, and the
/// time taken ("took 0:12") once everything is done.
pub fn eta_text(done: usize, total: usize, elapsed: Duration) -> String {
    if done >= total {
        return format!("took {}", duration_text(elapsed.as_secs_f64().round() as u64));
    }
    let seconds = elapsed.as_secs_f64();
    if done == 0 || seconds <= 0.0 {
        return "ETA --".into();
    }
    let left = (total - done) as f64 * seconds / done as f64;
    format!("ETA {}", duration_text(left.ceil() as u64))
}

/// "5123 segments/s", "-- segments/s" before any time has passed.
pub fn rate_text(done: usize, elapsed: Duration, unit: &str) -> String {
    let seconds = elapsed.as_secs_f64();
    if seconds <= 0.0 {
        return format!("-- {unit}/s");
    }
    let rate = done as f64 / seconds;
    if rate >= 100.0 {
        format!("{rate:.0} {unit}/s")
    } else {
        format!("{rate:.1} {unit}/s")
    }
}

/// `width` characters: '#' for the share done, '-' for the rest (all '#' for an empty total).
pub fn bar(done: usize, total: usize, width: usize) -> String {
    let filled = (done.min(total) * width).checked_div(total).unwrap_or(width);
    "#".repeat(filled) + &"-".repeat(width - filled)
}

/// The whole progress line: "scoring [####------] 12000/40000 segments, 5123 segments/s,
/// ETA 0:05". The bar is [`BAR_WIDTH`] wide, narrower (down to [`MIN_BAR_WIDTH`]) when the
/// line would not fit in `columns`.
pub fn line(label: &str, unit: &str, done: usize, total: usize, elapsed: Duration, columns: Option<usize>) -> String {
    let done = done.min(total);
    let rest = format!("] {done}/{total} {unit}, {}, {}", rate_text(done, elapsed, unit), eta_text(done, total, elapsed));
    let head = format!("{label} [");
    let room = columns.map_or(BAR_WIDTH, |c| c.saturating_sub(head.chars().count() + rest.chars().count() + 1));
    format!("{head}{}{rest}", bar(done, total, room.clamp(MIN_BAR_WIDTH, BAR_WIDTH)))
}

/// Columns of the terminal on stderr, when it is one.
fn stderr_columns() -> Option<usize> {
    #[cfg(unix)]
    {
        let mut ws = libc::winsize { ws_row: 0, ws_col: 0, ws_xpixel: 0, ws_ypixel: 0 };
        // SAFETY: TIOCGWINSZ writes one `winsize` into the valid, exclusively borrowed `ws`.
        let ok = unsafe { libc::ioctl(libc::STDERR_FILENO, libc::TIOCGWINSZ, &mut ws) } == 0;
        (ok && ws.ws_col > 0).then_some(usize::from(ws.ws_col))
    }
    #[cfg(not(unix))]
    None
}

/// A bar drawn on stderr by the code that does the work (`send`'s acknowledgements).
pub struct Bar {
    label: &'static str,
    unit: &'static str,
    total: usize,
    start: Instant,
    last_draw: Option<Instant>,
    /// A line is drawn and not yet ended.
    open: bool,
}

impl Bar {
    /// A bar over `total` items counted in `unit`, its clock started now.
    pub fn new(label: &'static str, unit: &'static str, total: usize) -> Bar {
        Bar { label, unit, total, start: Instant::now(), last_draw: None, open: false }
    }

    /// `done` items so far: redrawn at most every [`REDRAW_INTERVAL`], and when all are done.
    pub fn update(&mut self, done: usize) {
        if done < self.total && self.last_draw.is_some_and(|t| t.elapsed() < REDRAW_INTERVAL) {
            return;
        }
        self.last_draw = Some(Instant::now());
        draw(&line(self.label, self.unit, done, self.total, self.start.elapsed(), stderr_columns()));
        self.open = true;
    }

    /// End the bar's line (before another message, or at the end), if one is drawn.
    pub fn end(&mut self) {
        if std::mem::take(&mut self.open) {
            eprintln!();
        }
    }
}

fn draw(text: &str) {
    let mut err = std::io::stderr().lock();
    let _ = write!(err, "\r{text}{CLEAR_TO_END}");
    let _ = err.flush();
}

/// A bar redrawn from a background thread while work that counts into `done` runs.
pub struct Progress<'a> {
    done: &'a AtomicUsize,
    total: usize,
    stop: AtomicBool,
}

impl<'a> Progress<'a> {
    /// Progress over `total` segments counted in `done`.
    pub fn new(done: &'a AtomicUsize, total: usize) -> Self {
        Progress { done, total, stop: AtomicBool::new(false) }
    }

    /// Run `work` while drawing progress when `show` is set.
    pub fn run<T: Send>(&self, show: bool, label: &'static str, work: impl FnOnce() -> T + Send) -> T {
        if !show {
            return work();
        }
        let start = Instant::now();
        std::thread::scope(|s| {
            s.spawn(|| {
                let columns = stderr_columns();
                let current = || line(label, "segments", self.done.load(Ordering::Relaxed), self.total, start.elapsed(), columns);
                while !self.stop.load(Ordering::Relaxed) {
                    draw(&current());
                    std::thread::sleep(REDRAW_INTERVAL);
                }
                draw(&current());
                eprintln!();
            });
            let out = work();
            self.stop.store(true, Ordering::Relaxed);
            out
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn durations_and_time_left() {
        assert_eq!((duration_text(7), duration_text(725), duration_text(3723)), ("0:07".to_owned(), "12:05".to_owned(), "1:02:03".to_owned()));
        // A quarter done in 10 s: three quarters take 30 s more at the same rate.
        assert_eq!(eta_text(250, 1000, Duration::from_secs(10)), "ETA 0:30");
        // Partial seconds round up: a run never shows 0:00 left before it is done.
        assert_eq!(eta_text(999, 1000, Duration::from_secs(1)), "ETA 0:01");
        assert_eq!(eta_text(0, 1000, Duration::from_secs(5)), "ETA --");
        assert_eq!(eta_text(1000, 1000, Duration::from_millis(12_400)), "took 0:12");
        assert_eq!((rate_text(5123, Duration::from_secs(1), "segments"), rate_text(3, Duration::from_secs(2), "batches")), ("5123 segments/s".to_owned(), "1.5 batches/s".to_owned()));
        assert_eq!(rate_text(3, Duration::ZERO, "segments"), "-- segments/s");
    }

    #[test]
    fn bars_fill_in_proportion_and_fit_the_terminal() {
        assert_eq!(bar(0, 10, 10), "----------");
        assert_eq!(bar(5, 10, 10), "#####-----");
        assert_eq!(bar(10, 10, 4), "####");
        assert_eq!(bar(0, 0, 4), "####", "nothing to do is done");
        let l = line("scoring", "segments", 10_000, 40_000, Duration::from_secs(2), None);
        assert_eq!(l, format!("scoring [{}{}] 10000/40000 segments, 5000 segments/s, ETA 0:06", "#".repeat(7), "-".repeat(23)));
        // 70 columns: the bar gives up what the line needs, and the line fits.
        let narrow = line("scoring", "segments", 10_000, 40_000, Duration::from_secs(2), Some(70));
        assert!(narrow.chars().count() < 70, "{narrow}");
        let width = |l: &str| l.split_once('[').and_then(|(_, r)| r.split_once(']')).map_or(0, |(b, _)| b.chars().count());
        assert_eq!(width(&narrow), 70 - 1 - (l.chars().count() - BAR_WIDTH));
        // Never narrower than MIN_BAR_WIDTH (the line then wraps rather than lose its bar).
        assert_eq!(width(&line("scoring", "segments", 1, 2, Duration::from_secs(1), Some(20))), MIN_BAR_WIDTH);
        // Wide terminals keep BAR_WIDTH; counts past the total show as the total.
        assert_eq!(width(&line("sending", "segments", 9, 4, Duration::from_secs(1), Some(300))), BAR_WIDTH);
    }
}
