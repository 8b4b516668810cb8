//! Indexing progress: a bar with rate and ETA on a terminal, periodic log
//! lines otherwise.

use std::io::IsTerminal;
use std::sync::Mutex;
use std::time::{Duration, Instant};

use indicatif::{ProgressBar, ProgressStyle};
use vitrine_engine::ingest::IndexProgress;

pub enum Progress {
    Bar(ProgressBar),
    Lines(Mutex<LineState>),
}

pub struct LineState {
    total: u64,
    done: u64,
    started: Instant,
    last_line: Instant,
}

const LINE_EVERY: Duration = Duration::from_secs(10);

impl Progress {
    pub fn for_stderr() -> Self {
        if std::io::stderr().is_terminal() {
            let bar = ProgressBar::new(0);
            bar.set_style(
                ProgressStyle::with_template("{bar:40} {pos}/{len} images  {per_sec}  eta {eta}")
                    .unwrap_or_else(|_| ProgressStyle::default_bar()),
            );
            Progress::Bar(bar)
        } else {
            Progress::Lines(Mutex::new(LineState {
                total: 0,
                done: 0,
                started: Instant::now(),
                last_line: Instant::now(),
            }))
        }
    }
}

impl IndexProgress for Progress {
    fn begin(&self, files_to_process: u64) {
        match self {
            Progress::Bar(bar) => {
                bar.set_length(files_to_process);
                bar.set_position(0);
            }
            Progress::Lines(state) => {
                let mut state = state.lock().unwrap_or_else(|p| p.into_inner());
                state.total = files_to_process;
                state.done = 0;
                state.started = Instant::now();
                state.last_line = Instant::now();
                eprintln!("embedding {files_to_process} images");
            }
        }
    }

    fn advance(&self, files_done: u64) {
        match self {
            Progress::Bar(bar) => bar.inc(files_done),
            Progress::Lines(state) => {
                let mut state = state.lock().unwrap_or_else(|p| p.into_inner());
                state.done += files_done;
                if state.last_line.elapsed() >= LINE_EVERY {
                    state.last_line = Instant::now();
                    let rate = state.done as f64 / state.started.elapsed().as_secs_f64().max(1e-9);
                    let eta = (state.total - state.done.min(state.total)) as f64 / rate.max(1e-9);
                    eprintln!(
                        "{}/{} images, {rate:.1} images/s, eta {eta:.0} s",
                        state.done, state.total
                    );
                }
            }
        }
    }

    fn finish(&self) {
        if let Progress::Bar(bar) = self {
            bar.finish_and_clear();
        }
    }
}
