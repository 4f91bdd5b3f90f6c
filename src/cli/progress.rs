//! Progress on stderr for stages that take more than a second.
//!
//! A stage name is recorded when it starts; a ticker thread writes a line
//! only once the current stage has run for a second, and then every few
//! seconds, so quick runs print nothing. The ticker waits on a condition
//! variable, so [`StderrProgress::finish`] wakes it at once instead of
//! waiting out its tick.

use std::sync::{Arc, Condvar, Mutex};
use std::thread;
use std::time::{Duration, Instant};

use crate::estimate::scoreboard::Progress;

/// How often the ticker looks at the current stage.
const TICK: Duration = Duration::from_millis(200);

struct Current {
    stage: Option<(String, Instant)>,
    last_print: Option<Instant>,
    printed_any: bool,
    done: bool,
}

struct State {
    current: Mutex<Current>,
    /// Signalled by `finish` so the ticker stops without finishing its tick.
    wake: Condvar,
}

pub struct StderrProgress {
    state: Arc<State>,
    ticker: Option<thread::JoinHandle<()>>,
    started: Instant,
}

impl StderrProgress {
    pub fn start() -> Self {
        let state = Arc::new(State {
            current: Mutex::new(Current {
                stage: None,
                last_print: None,
                printed_any: false,
                done: false,
            }),
            wake: Condvar::new(),
        });
        let shared = Arc::clone(&state);
        let started = Instant::now();
        let ticker = thread::spawn(move || {
            let Ok(mut s) = shared.current.lock() else {
                return;
            };
            // `done` is checked under the lock before every wait, so a
            // `finish` that ran before this thread first took the lock is
            // not missed.
            while !s.done {
                s = match shared.wake.wait_timeout(s, TICK) {
                    Ok((guard, _)) => guard,
                    Err(_) => return,
                };
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
        let printed = match self.state.current.lock() {
            Ok(mut s) => {
                s.done = true;
                s.printed_any
            }
            Err(_) => false,
        };
        self.state.wake.notify_all();
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
        if let Ok(mut s) = self.state.current.lock() {
            s.stage = Some((name.to_string(), Instant::now()));
            s.last_print = None;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn finish_does_not_wait_out_a_tick() {
        let p = StderrProgress::start();
        p.stage("a quick stage");
        let t = Instant::now();
        p.finish();
        // The ticker sleeps 200 ms between looks; a woken ticker returns in
        // microseconds. 100 ms leaves room for a busy machine.
        assert!(
            t.elapsed() < Duration::from_millis(100),
            "{:?}",
            t.elapsed()
        );
    }
}
