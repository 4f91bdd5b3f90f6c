//! The demo's final summary as JSON, and the switch that lets a command
//! narrate on stderr while stdout carries one JSON document.

use serde_json::{json, Value};

use crate::api::pb;

/// While alive, whatever the process writes to stdout goes to stderr.
///
/// The demo narrates a run with many `println!`s; under `--format json`
/// the narration must stay on screen without mixing into the JSON a
/// program reads from stdout. Pointing file descriptor 1 at stderr for the
/// narration, and back before the JSON is printed, does that without
/// threading a writer through every line of the narration.
pub struct NarrateOnStderr {
    #[cfg(unix)]
    saved: libc::c_int,
}

impl NarrateOnStderr {
    pub fn start() -> Self {
        use std::io::Write;
        let _ = std::io::stdout().flush();
        #[cfg(unix)]
        {
            // SAFETY: duplicates and replaces standard descriptors of this
            // process; no memory is shared. A failed dup leaves -1 and
            // nothing is redirected.
            let saved = unsafe { libc::dup(1) };
            if saved >= 0 {
                // SAFETY: as above; 2 and 1 are open for the process's life.
                unsafe { libc::dup2(2, 1) };
            }
            Self { saved }
        }
        #[cfg(not(unix))]
        Self {}
    }
}

impl Drop for NarrateOnStderr {
    fn drop(&mut self) {
        use std::io::Write;
        let _ = std::io::stdout().flush();
        #[cfg(unix)]
        if self.saved >= 0 {
            // SAFETY: restores the descriptor saved by `start` and closes
            // the copy; nothing else holds it.
            unsafe {
                libc::dup2(self.saved, 1);
                libc::close(self.saved);
            }
        }
    }
}

/// The demo's summary: the cumulative board's front-runner, the alerts'
/// view, how many events of each kind fired and the notable ones.
pub fn demo_json(
    seconds: f64,
    cumulative: &pb::Scoreboard,
    events: &[pb::Event],
    metrics: &str,
) -> Value {
    let view = cumulative.alerts.clone().unwrap_or_default();
    let mut kinds: Vec<(String, usize)> = Vec::new();
    for e in events {
        match kinds.iter_mut().find(|(k, _)| *k == e.kind) {
            Some((_, n)) => *n += 1,
            None => kinds.push((e.kind.clone(), 1)),
        }
    }
    json!({
        "seconds": seconds,
        "dataset": cumulative.dataset,
        "units": cumulative.units,
        "front_runner": cumulative.front_runner,
        "alerts": {
            "front_runner": (!view.front_runner.is_empty()).then_some(view.front_runner),
            "settled": view.front_runner_settled,
            "watched_units": view.units,
            "heterogeneity": view.heterogeneity,
            "overlap_degraded": view.overlap_degraded,
        },
        "events": kinds.iter().map(|(k, n)| json!({"kind": k, "count": n})).collect::<Vec<_>>(),
        "notable": events.iter().filter(|e| {
            matches!(e.kind.as_str(), "front_runner_changed" | "nuisance_misfit" | "population_drift")
                || e.kind.starts_with("overlap")
        }).map(|e| json!({"id": e.id, "kind": e.kind, "summary": e.summary})).collect::<Vec<_>>(),
        "metrics_url": metrics,
    })
}
