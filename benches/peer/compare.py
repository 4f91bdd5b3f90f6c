"""Times `plumbline score` against the numpy / scikit-learn peer (peer.py)
on the same CSV files in the same run, and compares their results.

For each size it simulates a dataset with `plumbline simulate` (once; the
files are reused when present), then runs both programs `--repeat` times,
alternating which goes first, and prints:

- wall time of each program, end to end (process start to exit, reading the
  CSVs included), median and minimum over the repeats, and their CPU time
  (user + system);
- the peer's time split: interpreter start-up, imports (numpy, sklearn) and
  the work itself (reading the CSVs, fitting, estimating);
- the ratio peer / ours, with and without the peer's start-up and imports;
- Kendall's tau-b between the two rankings of the models by corrected PEHE
  (the ten simulated models; also with the two baselines), and of each
  ranking against the true PEHE;
- the out-of-fold loss of each nuisance component side by side, with the
  relative difference (ours - peer) / peer.

Uses only the standard library (the peer itself needs numpy and sklearn).
"""

import argparse
import json
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent


ENV = dict(os.environ)


def timed(cmd, stdout_path):
    """Runs cmd with stdout to a file; (wall seconds, cpu seconds, rc)."""
    with open(stdout_path, "wb") as out:
        t0 = time.perf_counter()
        proc = subprocess.Popen(cmd, stdout=out, stderr=subprocess.DEVNULL, env=ENV)
        _, status, usage = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - t0
    proc.returncode = os.waitstatus_to_exitcode(status)
    return wall, usage.ru_utime + usage.ru_stime, proc.returncode


def kendall_tau_b(a, b):
    conc = disc = ties_a = ties_b = 0
    n = len(a)
    for i in range(n):
        for j in range(i + 1, n):
            da, db = a[i] - a[j], b[i] - b[j]
            if da == 0 and db == 0:
                continue
            if da == 0:
                ties_a += 1
            elif db == 0:
                ties_b += 1
            elif (da > 0) == (db > 0):
                conc += 1
            else:
                disc += 1
    denom = ((conc + disc + ties_a) * (conc + disc + ties_b)) ** 0.5
    return (conc - disc) / denom if denom else 0.0


def read_truth(path):
    truth = {}
    with open(path) as f:
        next(f)
        for line in f:
            name, value = line.strip().split(",")
            truth[name] = float(value)
    return truth


def ours_losses(board):
    nu = board["nuisance"]
    prop = nu["propensity"]["fit"]
    return {
        "propensity log loss": prop["oof_loss"] if prop else None,
        "control-arm outcome loss": nu["outcome_control"]["oof_loss"],
        "treated-arm outcome loss": nu["outcome_treated"]["oof_loss"],
    }, {
        "propensity log loss": prop["learner"] if prop else "logged",
        "control-arm outcome loss": nu["outcome_control"]["learner"],
        "treated-arm outcome loss": nu["outcome_treated"]["learner"],
    }


def peer_losses(result):
    nu = result["nuisance"]
    return {
        "propensity log loss": nu["propensity_log_loss"],
        "control-arm outcome loss": nu["outcome_control_loss"],
        "treated-arm outcome loss": nu["outcome_treated_loss"],
    }


def fmt_s(values):
    return f"{statistics.median(values):7.3f} s (min {min(values):.3f})"


def run_size(args, n):
    data = Path(args.workdir) / f"{args.design}-n{n}-d{args.features}-s{args.seed}"
    units, preds = data / "units.csv", data / "predictions.csv"
    if not (units.exists() and preds.exists()):
        subprocess.run(
            [
                args.binary, "simulate", "--design", args.design, "--units", str(n),
                "--features", str(args.features), "--models", str(args.models),
                "--seed", str(args.seed), "--out", str(data),
            ],
            check=True,
        )
    ours_cmd = [args.binary, "score", "--units", str(units), "--predictions", str(preds),
                "--format", "json", "--seed", "0"]
    peer_cmd = [args.python, str(HERE / "peer.py"), "--units", str(units),
                "--predictions", str(preds), "--seed", "0"]
    bare_cmd = [args.python, "-c", "pass"]
    ours_out, peer_out = data / "ours.json", data / "peer.json"

    ours_wall, ours_cpu, peer_wall, peer_cpu, peer_inner, bare = [], [], [], [], [], []
    for r in range(args.repeat):
        order = ["ours", "peer"] if r % 2 == 0 else ["peer", "ours"]
        for who in order:
            if who == "ours":
                wall, cpu, rc = timed(ours_cmd, ours_out)
                if rc != 0:
                    sys.exit(f"plumbline score failed (exit {rc}): {' '.join(ours_cmd)}")
                ours_wall.append(wall)
                ours_cpu.append(cpu)
            else:
                wall, cpu, rc = timed(peer_cmd, peer_out)
                if rc != 0:
                    sys.exit(f"peer failed (exit {rc}): {' '.join(peer_cmd)}")
                peer_wall.append(wall)
                peer_cpu.append(cpu)
                peer_inner.append(json.loads(peer_out.read_text())["seconds"])
        bare.append(timed(bare_cmd, os.devnull)[0])

    board = json.loads(ours_out.read_text())
    peer = json.loads(peer_out.read_text())
    truth = read_truth(data / "truth.csv")

    ours_pehe = {m["name"]: m["corrected_pehe"]["estimate"] for m in board["models"]}
    peer_pehe = {k: v["estimate"] for k, v in peer["corrected_pehe"].items()}
    names = list(truth)
    with_baselines = names + ["zero-effect", "constant-effect"]
    tau = kendall_tau_b([ours_pehe[k] for k in names], [peer_pehe[k] for k in names])
    tau_all = kendall_tau_b(
        [ours_pehe[k] for k in with_baselines], [peer_pehe[k] for k in with_baselines]
    )
    tau_ours_truth = kendall_tau_b([ours_pehe[k] for k in names], [truth[k] for k in names])
    tau_peer_truth = kendall_tau_b([peer_pehe[k] for k in names], [truth[k] for k in names])

    work = [s["work"] for s in peer_inner]
    imports = [s["imports"] for s in peer_inner]
    startup = [w - s["work"] - s["imports"] for w, s in zip(peer_wall, peer_inner)]
    ours_med = statistics.median(ours_wall)

    threads = "1 thread each" if args.single_thread else "default threads"
    print(f"\n== {args.design}, n = {n}, d = {args.features}, {args.models} models, "
          f"{args.repeat} repeat(s), {threads} ==")
    print(f"ours  plumbline score (end to end) {fmt_s(ours_wall)}   cpu {fmt_s(ours_cpu)}")
    print(f"peer  python peer.py  (end to end) {fmt_s(peer_wall)}   cpu {fmt_s(peer_cpu)}")
    print(f"      of which interpreter start+exit {fmt_s(startup)}   (bare `python -c pass`: "
          f"{statistics.median(bare):.3f} s)")
    print(f"      of which imports             {fmt_s(imports)}")
    print(f"      of which work (CSV + fit)    {fmt_s(work)}")
    print(f"ratio peer / ours, end to end          {statistics.median(peer_wall) / ours_med:6.2f}x")
    print(f"ratio peer / ours, peer without start-up and imports "
          f"{statistics.median(work) / ours_med:6.2f}x")
    print(f"Kendall tau, ours vs peer ranking by corrected PEHE: {tau:.3f} "
          f"({len(names)} models), {tau_all:.3f} (with the 2 baselines)")
    print(f"Kendall tau against the true PEHE: ours {tau_ours_truth:.3f}, peer {tau_peer_truth:.3f}")
    ol, learners = ours_losses(board)
    pl = peer_losses(peer)
    print(f"{'out-of-fold loss':<28}{'ours':>10}{'peer':>10}{'rel diff':>10}   ours chose")
    rel = {}
    for key in ol:
        o, p = ol[key], pl[key]
        if o is None or p is None:
            print(f"{key:<28}{'-':>10}{'-':>10}")
            continue
        rel[key] = (o - p) / p
        print(f"{key:<28}{o:>10.4f}{p:>10.4f}{100 * rel[key]:>9.2f}%   {learners[key]}")
    return {
        "n": n,
        "ours_wall": ours_wall,
        "ours_cpu": ours_cpu,
        "peer_wall": peer_wall,
        "peer_cpu": peer_cpu,
        "peer_seconds": peer_inner,
        "python_bare_start": bare,
        "ratio_end_to_end": statistics.median(peer_wall) / ours_med,
        "ratio_peer_work_only": statistics.median(work) / ours_med,
        "kendall_tau": tau,
        "kendall_tau_with_baselines": tau_all,
        "kendall_tau_truth": {"ours": tau_ours_truth, "peer": tau_peer_truth},
        "oof_loss": {"ours": ol, "peer": pl, "relative_difference": rel, "ours_learner": learners},
        "corrected_pehe": {"ours": ours_pehe, "peer": peer_pehe, "truth": truth},
    }


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--binary", default=str(HERE.parents[1] / "target" / "release" / "plumbline"))
    ap.add_argument("--python", default=sys.executable, help="interpreter that runs peer.py")
    ap.add_argument("--sizes", type=int, nargs="+", default=[5000, 100000])
    ap.add_argument("--design", default="nie-wager-d")
    ap.add_argument("--features", type=int, default=20)
    ap.add_argument("--models", type=int, default=10)
    ap.add_argument("--seed", type=int, default=1, help="simulation seed")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--workdir", default="/tmp/plumbline-peer")
    ap.add_argument("--json", help="also write the results here")
    ap.add_argument(
        "--single-thread",
        action="store_true",
        help="run both programs on one thread (RAYON_NUM_THREADS=1, OMP_NUM_THREADS=1): "
        "their CPU times then compare the work done, whatever else loads the machine",
    )
    args = ap.parse_args()
    if args.single_thread:
        ENV.update(RAYON_NUM_THREADS="1", OMP_NUM_THREADS="1")
    Path(args.workdir).mkdir(parents=True, exist_ok=True)
    results = [run_size(args, n) for n in args.sizes]
    if args.json:
        Path(args.json).write_text(json.dumps(results, indent=1))


if __name__ == "__main__":
    main()
