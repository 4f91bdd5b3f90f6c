//! Progress on stderr for stages that take more than a second.
//!
//! A stage name is recorded when it starts; a ticker thread writes a line
//! only once the current stage has run for a second, and then every few
//! seconds, so quick runs print nothing.

use std::sync::{Arc, Mutex};
use std::thread;
use std::time::{Duration, Instant};

use crate::estimate::scoreboard::Progress;

struct Current {
    stage: Option<(String, Instant)>,
    last_print: Option<Instant>,
    printed_any: bool,
    done: bool,
}

pub struct StderrProgress {
    state: Arc<Mutex<Current>>,
    ticker: Option<thread::JoinHandle<()>>,
    started: Instant,
}

impl StderrProgress {
    pub fn start() -> Self {
        let state = Arc::new(Mutex::new(Current {
            stage: None,
            last_print: None,
            printed_any: false,
            done: false,
        }));
        let shared = Arc::clone(&state);
        let started = Instant::now();
        let ticker = thread::spawn(move || loop {
            thread::sleep(Duration::from_millis(200));
            let Ok(mut s) = shared.lock() else { return };
            if s.done {
                return;
            }
            let now = Instant::now();
            if let Some((name, since)) = &s.stage {
                let running = now.duration_since(*since);
                let due = s
                    .last_print
                    .is_none_or(|t| now.duration_since(t) >= Duration::from_secs(5));
                if running >= Duration::from_secs(1) && due {
                    eprintln!(
                        "plumbline: {name} ({:.0} s, {:.0} s in all)",
                        running.as_secs_f64(),
                        now.duration_since(started).as_secs_f64()
                    );
                    s.last_print = Some(now);
                    s.printed_any = true;
                }
            }
        });
        Self {
            state,
            ticker: Some(ticker),
            started,
        }
    }

    /// Stops the ticker; reports the total time if anything was printed.
    pub fn finish(mut self) {
        let printed = match self.state.lock() {
            Ok(mut s) => {
                s.done = true;
                s.printed_any
            }
            Err(_) => false,
        };
        if let Some(t) = self.ticker.take() {
            let _ = t.join();
        }
        if printed {
            eprintln!(
                "plumbline: done in {:.1} s",
                self.started.elapsed().as_secs_f64()
            );
        }
    }
}

impl Progress for StderrProgress {
    fn stage(&self, name: &str) {
        if let Ok(mut s) = self.state.lock() {
            s.stage = Some((name.to_string(), Instant::now()));
            s.last_print = None;
        }
    }
}
