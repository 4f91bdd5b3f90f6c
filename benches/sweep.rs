//! A sweep of candidates scored offline: `plumbline score` (the release
//! binary, as a child process) on generated CSV files, n = 100,000 units
//! with 20 features (Nie & Wager setup B), for 10 and for 1,000 candidate
//! models (`synth::sweep`): wall time and the child's peak resident memory
//! (from wait4), beside the size of the predictions as f64.
//!
//! `cargo bench --bench sweep` (a few minutes, most of it writing and
//! reading the 1,000-column CSV). `PLUMBLINE_BENCH_UNITS=20000` and
//! `PLUMBLINE_BENCH_SWEEP=10,100,1000` change the sizes. The recompute of
//! the service at the same sizes is `PLUMBLINE_BENCH_MODELS=1000 cargo
//! bench --bench service`.

use std::io::{BufWriter, Write};
use std::process::{Command, Stdio};
use std::time::Instant;

use plumbline::synth::{draw, effect_moments, sweep, Design};

const FEATURES: usize = 20;

fn sizes(var: &str, default: &[usize]) -> Vec<usize> {
    std::env::var(var)
        .ok()
        .map(|v| v.split(',').filter_map(|x| x.trim().parse().ok()).collect())
        .unwrap_or_else(|| default.to_vec())
}

/// Runs the command to its end; its wall seconds and peak resident MiB.
/// The child is reaped by wait4, which (unlike std's wait) reports its own
/// peak memory.
#[allow(clippy::zombie_processes)]
fn run_measured(command: &mut Command) -> (f64, f64, bool) {
    let t = Instant::now();
    let child = command
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .expect("start plumbline score");
    let pid = child.id() as libc::pid_t;
    let mut status = 0;
    // SAFETY: an all-zero rusage is a valid value for wait4 to fill in.
    let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
    // SAFETY: pid is our own child, not yet waited for; both pointers are
    // to live locals.
    let waited = unsafe { libc::wait4(pid, &mut status, 0, &mut usage) };
    assert_eq!(waited, pid, "wait4");
    let seconds = t.elapsed().as_secs_f64();
    let ok = libc::WIFEXITED(status) && libc::WEXITSTATUS(status) == 0;
    (seconds, usage.ru_maxrss as f64 / 1024.0, ok)
}

fn main() {
    let units = sizes("PLUMBLINE_BENCH_UNITS", &[100_000])[0];
    let counts = sizes("PLUMBLINE_BENCH_SWEEP", &[10, 1000]);
    let dir = std::env::temp_dir().join(format!("plumbline-sweep-{}", std::process::id()));
    std::fs::create_dir_all(&dir).expect("temp dir");
    let data = draw(Design::NieWagerB, units, FEATURES, 1.0, 1);
    let (_, var_tau) = effect_moments(Design::NieWagerB, 100_000, 2);
    let units_csv = dir.join("units.csv");
    {
        let mut w = BufWriter::new(std::fs::File::create(&units_csv).expect("units.csv"));
        let names: Vec<String> = (1..=FEATURES).map(|j| format!("x{j}")).collect();
        writeln!(w, "unit_id,treatment,outcome,{}", names.join(",")).expect("write");
        for i in 0..units {
            write!(w, "u{i},{},{}", data.treatment[i], data.outcome[i]).expect("write");
            for j in 0..FEATURES {
                write!(w, ",{}", data.features[[i, j]]).expect("write");
            }
            writeln!(w).expect("write");
        }
    }
    println!(
        "{:>6}  {:>8}  {:>10}  {:>10}  {:>13}",
        "models", "units", "score s", "peak MiB", "predictions MiB"
    );
    for &m in &counts {
        let cands = sweep(&data.tau, var_tau, m, 3);
        let predictions_csv = dir.join(format!("predictions-{m}.csv"));
        {
            let mut w =
                BufWriter::new(std::fs::File::create(&predictions_csv).expect("predictions.csv"));
            let names: Vec<&str> = cands.iter().map(|c| c.predictions.name.as_str()).collect();
            writeln!(w, "unit_id,{}", names.join(",")).expect("write");
            for i in 0..units {
                write!(w, "u{i}").expect("write");
                for c in &cands {
                    write!(w, ",{:.6}", c.predictions.effects[i]).expect("write");
                }
                writeln!(w).expect("write");
            }
        }
        drop(cands);
        let (seconds, peak, ok) = run_measured(
            Command::new(env!("CARGO_BIN_EXE_plumbline"))
                .arg("score")
                .arg("--units")
                .arg(&units_csv)
                .arg("--predictions")
                .arg(&predictions_csv)
                .args(["--format", "json"]),
        );
        assert!(ok, "plumbline score failed on {m} models");
        println!(
            "{m:>6}  {units:>8}  {seconds:>10.2}  {peak:>10.0}  {:>13.0}",
            (units * m * 8) as f64 / (1024.0 * 1024.0)
        );
        let _ = std::fs::remove_file(&predictions_csv);
    }
    let _ = std::fs::remove_dir_all(&dir);
}
