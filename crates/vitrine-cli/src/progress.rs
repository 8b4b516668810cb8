//! Progress of long commands (indexing, near-pair checks, calibration): a
//! bar with rate and ETA on a terminal, a log line every few seconds
//! otherwise.

use std::io::IsTerminal;
use std::sync::Mutex;
use std::time::{Duration, Instant};

use indicatif::{ProgressBar, ProgressStyle};
use vitrine_engine::progress::Progress;

pub enum StderrProgress {
    Bar(ProgressBar),
    Lines(Mutex<LineState>),
}

pub struct LineState {
    steps: String,
    total: u64,
    done: u64,
    started: Instant,
    last_line: Instant,
}

const LINE_EVERY: Duration = Duration::from_secs(10);

impl StderrProgress {
    pub fn new() -> Self {
        if std::io::stderr().is_terminal() {
            Self::Bar(ProgressBar::new(0))
        } else {
            Self::Lines(Mutex::new(LineState {
                steps: String::new(),
                total: 0,
                done: 0,
                started: Instant::now(),
                last_line: Instant::now(),
            }))
        }
    }
}

impl Progress for StderrProgress {
    fn begin(&self, steps: &str, total: u64) {
        match self {
            Self::Bar(bar) => {
                let template =
                    format!("{{bar:40}} {{pos}}/{{len}} {steps}  {{per_sec}}  eta {{eta}}");
                bar.set_style(
                    ProgressStyle::with_template(&template)
                        .unwrap_or_else(|_| ProgressStyle::default_bar()),
                );
                bar.set_length(total);
                bar.set_position(0);
                bar.reset_eta();
            }
            Self::Lines(state) => {
                let mut state = state.lock().unwrap_or_else(|p| p.into_inner());
                state.steps = steps.to_owned();
                state.total = total;
                state.done = 0;
                state.started = Instant::now();
                state.last_line = Instant::now();
                eprintln!("{total} {steps} to go");
            }
        }
    }

    fn advance(&self, done: u64) {
        match self {
            Self::Bar(bar) => bar.inc(done),
            Self::Lines(state) => {
                let mut state = state.lock().unwrap_or_else(|p| p.into_inner());
                state.done += done;
                if state.last_line.elapsed() >= LINE_EVERY {
                    state.last_line = Instant::now();
                    let rate = state.done as f64 / state.started.elapsed().as_secs_f64().max(1e-9);
                    let eta = (state.total - state.done.min(state.total)) as f64 / rate.max(1e-9);
                    eprintln!(
                        "{}/{} {}, {rate:.1}/s, eta {eta:.0} s",
                        state.done, state.total, state.steps
                    );
                }
            }
        }
    }

    fn finish(&self) {
        if let Self::Bar(bar) = self {
            bar.finish_and_clear();
        }
    }
}
