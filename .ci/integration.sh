#!/usr/bin/env bash
# End-to-end check of the service, the Python client and the deploy/ files.
# CI calls it from the repository root after `cargo test`:
#
#   bash .ci/integration.sh
#
# It installs what it needs (promtool from Debian's prometheus package, the
# Python client's requirements from PyPI), builds the release binary, starts
# `plumbline serve` on free loopback ports with a temporary data directory,
# and checks:
#   - promtool accepts deploy/prometheus/plumbline-rules.yml and its unit tests;
#   - the server becomes ready (/readyz) and healthy (/healthz);
#   - clients/python/example.py streams the committed simulated dataset,
#     recomputes with a refit and gets a scoreboard ranking every model plus
#     the two baselines;
#   - the Python client's unit tests (clients/python/tests) pass;
#   - a three-arm dataset streamed through the client (arm labels, costs,
#     predictions per arm) gets a board for each contrast with the model
#     that predicts the true effects first on both, an arm policy report,
#     a per-contrast comparison and a per-contrast overlap report;
#   - a recompute of a dataset with no outcomes fails as documented
#     (FAILED_PRECONDITION), which the service counts in
#     plumbline_recompute_failures_total;
#   - every plumbline_* name used in the rules file is on the live /metrics,
#     with its `# TYPE` line;
#   - SIGTERM stops the server with exit status 0.
# The last line is `integration: N passed, N failed`; the exit status is
# non-zero when anything failed.
set -euo pipefail
cd "$(dirname "$0")/.."
root="$(pwd)"

rules="deploy/prometheus/plumbline-rules.yml"
rules_test="deploy/prometheus/plumbline-rules.test.yml"
client_dir="clients/python"

passed=0
failed=0
server_pid=""
work=""

pass() {
    passed=$((passed + 1))
    echo "integration: PASS: $*"
}
fail() {
    failed=$((failed + 1))
    echo "integration: FAIL: $*" >&2
}
note() { echo "integration: $*"; }

stop_server() {
    if [ -n "$server_pid" ] && kill -0 "$server_pid" 2>/dev/null; then
        kill -TERM "$server_pid" 2>/dev/null || true
        for _ in $(seq 1 100); do
            kill -0 "$server_pid" 2>/dev/null || break
            sleep 0.1
        done
        if kill -0 "$server_pid" 2>/dev/null; then
            kill -KILL "$server_pid" 2>/dev/null || true
        fi
        wait "$server_pid" 2>/dev/null || true
    fi
    server_pid=""
}

on_exit() {
    local rc=$?
    stop_server
    if [ "$rc" -ne 0 ] && [ "$failed" -eq 0 ]; then
        # Aborted by `set -e` outside a check (an install or build step).
        failed=1
        echo "integration: FAIL: aborted (status $rc) before the checks finished" >&2
    fi
    if [ -n "$work" ] && [ "$failed" -gt 0 ] && [ -f "$work/server.log" ]; then
        echo "integration: last lines of the server log:" >&2
        tail -n 30 "$work/server.log" >&2 || true
    fi
    if [ -n "$work" ]; then
        rm -rf "$work"
    fi
    echo "integration: ${passed} passed, ${failed} failed"
    if [ "$failed" -gt 0 ]; then
        exit 1
    fi
    exit 0
}
trap on_exit EXIT

http_get() { # URL -> body on stdout; fails on a non-2xx status
    if command -v curl >/dev/null 2>&1; then
        curl -fsS --max-time 10 "$1"
    else
        python3 -c 'import sys, urllib.request; sys.stdout.write(urllib.request.urlopen(sys.argv[1], timeout=10).read().decode())' "$1"
    fi
}

# ------------------------------------------------------------------ setup

if ! command -v cargo >/dev/null 2>&1; then
    # shellcheck disable=SC1091
    source "$HOME/.cargo/env"
fi

promtool=""
if command -v promtool >/dev/null 2>&1; then
    promtool="$(command -v promtool)"
elif [ -x /usr/bin/promtool ]; then
    promtool=/usr/bin/promtool
else
    note "installing promtool (Debian package prometheus)"
    export DEBIAN_FRONTEND=noninteractive
    apt-get update -qq
    apt-get install -y -qq --no-install-recommends prometheus >/dev/null
    if [ -x /usr/bin/promtool ]; then
        promtool=/usr/bin/promtool
    else
        promtool="$(command -v promtool)"
    fi
fi
note "promtool: $promtool ($("$promtool" --version 2>&1 | head -n 1))"

note "installing the Python client's requirements"
export PIP_ROOT_USER_ACTION=ignore PIP_DISABLE_PIP_VERSION_CHECK=1
python3 -m pip install --quiet -r "$client_dir/requirements.txt"
bash "$client_dir/generate.sh"

note "building the release binary"
cargo build --release --quiet
bin="${CARGO_TARGET_DIR:-$root/target}/release/plumbline"

work="$(mktemp -d "${TMPDIR:-/tmp}/plumbline-integration.XXXXXX")"

# ------------------------------------------------------------------ rules

if "$promtool" check rules "$rules"; then
    pass "promtool check rules $rules"
else
    fail "promtool check rules $rules"
fi
# promtool resolves rule_files relative to the test file.
if (cd "$(dirname "$rules_test")" && "$promtool" test rules "$(basename "$rules_test")"); then
    pass "promtool test rules $rules_test"
else
    fail "promtool test rules $rules_test"
fi

# ----------------------------------------------------------------- server

read -r grpc_port metrics_port < <(python3 - <<'EOF'
import socket
socks = [socket.socket() for _ in range(2)]
for s in socks:
    s.bind(("127.0.0.1", 0))
print(*(s.getsockname()[1] for s in socks))
for s in socks:
    s.close()
EOF
)
grpc_addr="127.0.0.1:$grpc_port"
metrics_url="http://127.0.0.1:$metrics_port"
mkdir -p "$work/data"
note "starting plumbline serve: gRPC $grpc_addr, metrics $metrics_url, data $work/data"
"$bin" serve --data-dir "$work/data" --listen "$grpc_addr" --metrics-listen "127.0.0.1:$metrics_port" \
    >"$work/server.log" 2>&1 &
server_pid=$!

ready=0
for _ in $(seq 1 240); do
    if ! kill -0 "$server_pid" 2>/dev/null; then
        break
    fi
    if http_get "$metrics_url/readyz" >/dev/null 2>&1; then
        ready=1
        break
    fi
    sleep 0.25
done
if [ "$ready" -eq 1 ]; then
    pass "server ready on $metrics_url/readyz"
else
    fail "server not ready within 60 s (or exited)"
    exit 1
fi
if [ "$(http_get "$metrics_url/healthz" 2>/dev/null || true)" = "ok" ]; then
    pass "/healthz answers ok"
else
    fail "/healthz did not answer ok"
fi

# ---------------------------------------------------------------- example

if python3 "$client_dir/example.py" "$grpc_addr" --dataset integration-nie-wager-d; then
    pass "clients/python/example.py against the live server"
else
    fail "clients/python/example.py against the live server"
fi

# The client's frames and defaults, against messages built in the test (no
# server), and its history default against the binary's --help.
if PLUMBLINE_BIN="$bin" python3 -m unittest discover -s "$client_dir/tests"; then
    pass "clients/python/tests (frames and defaults)"
else
    fail "clients/python/tests (frames and defaults)"
fi

# A three-arm dataset through the client: arms drawn by a softmax of x1
# (confounded, the probabilities logged), effects of text 1 + x1 and of mail
# 0.5 - x2; "good" predicts them, "flat" says 0.2 for both.
if PYTHONPATH="$root/$client_dir" python3 - "$grpc_addr" <<'EOF'; then
import math
import random
import sys

import pandas as pd
import plumbline_client as pc

rng = random.Random(3)
arms = ["none", "text", "mail"]
rows = []
for i in range(1500):
    x1, x2 = rng.uniform(-1, 1), rng.uniform(-1, 1)
    w = [1.0, math.exp(0.5 * x1), math.exp(-0.5 * x1)]
    p = [v / sum(w) for v in w]
    a = rng.choices(range(3), weights=p)[0]
    tau = [0.0, 1.0 + x1, 0.5 - x2]
    y = x1 + x2 + tau[a] + rng.uniform(-1, 1)
    rows.append({"unit_id": f"a{i}", "x1": x1, "x2": x2, "arm": arms[a], "p": p[a], "outcome": y,
                 "good:text": tau[1], "good:mail": tau[2]})
df = pd.DataFrame(rows)
name = "integration-three-arms"
with pc.connect(sys.argv[1]) as client:
    client.create_dataset(name, ["x1", "x2"], arms=arms, arm_costs={"mail": 0.1}, seed=7,
                          recompute_every_outcomes=1_000_000, recompute_every_seconds=3600)
    for m in ("good", "flat"):
        client.register_model(name, m)
    client.send_units(name, df, arm="arm", propensity="p")
    for arm in ("text", "mail"):
        preds = pd.DataFrame({"unit_id": df["unit_id"], "good": df[f"good:{arm}"], "flat": 0.2})
        client.send_predictions(name, preds, arm=arm)
    client.send_outcomes(name, df)
    client.recompute(name, refit=True)
    board = client.scoreboard(name)
    policy = client.arm_policy(name)
    pairs = client.arm_policy_pairwise(name)
    text = client.compare_models(name, "good", "flat", arm="text")
    overlap = {arm: client.overlap(name, arm=arm) for arm in ("text", "mail")}
print(board[["arm", "rank", "model", "vs_constant_estimate", "vs_constant_ci_low", "vs_constant_ci_high"]]
      .to_string(index=False))
print(policy[["model", "vs_reference", "vs_reference_ci_low", "vs_reference_ci_high", "share_none",
              "share_text", "share_mail"]].to_string(index=False))
print(pairs.to_string(index=False))
print(f"compare good - flat on text: {text['estimate']:+.4f} [{text['ci_low']:+.4f}, {text['ci_high']:+.4f}]"
      f" over {text['units']} units")
failures = []
if list(board["arm"].unique()) != ["text", "mail"]:
    failures.append(f"contrasts {list(board['arm'].unique())}")
for arm in ("text", "mail"):
    b = board[board["arm"] == arm]
    first = b.loc[b["rank"] == 1, "model"].tolist()
    if first != ["good"] or board.attrs["contrasts"][arm]["front_runner"] != "good":
        failures.append(f"{arm}: ranked first {first}")
if sorted(policy["model"]) != ["flat", "good"]:
    failures.append(f"policy models {list(policy['model'])}")
good = policy.set_index("model").loc["good"]
if not good["vs_reference_ci_low"] > 0:
    failures.append(f"good's choice vs everyone none {good['vs_reference']}")
shares = policy[[f"share_{a}" for a in arms]].sum(axis=1)
if not all(abs(s - 1) < 1e-9 for s in shares):
    failures.append(f"shares sum to {list(shares)}")
if len(pairs) != 1 or text["units"] != 1500 or not text["estimate"] < 0:
    failures.append(f"pairs {len(pairs)}, compare {text}")
for arm, o in overlap.items():
    gp = o.attrs.get("generalized_propensity", [])
    print(f"overlap {arm} vs none: effective share {o.loc[0, 'effective_share']:.3f} / "
          f"{o.loc[1, 'effective_share']:.3f}; generalized propensity of "
          + ", ".join(f"{a['arm']} below eps {a['extreme_share']:.3f}" for a in gp))
    if list(o["arm"]) != [arm, "none"] or [a["arm"] for a in gp] != ["none", arm]:
        failures.append(f"overlap of {arm}: rows {list(o['arm'])}, arms {[a['arm'] for a in gp]}")
if failures:
    print("integration: three arms: " + "; ".join(failures), file=sys.stderr)
    sys.exit(1)
EOF
    pass "a three-arm dataset through the client: a board per contrast, good first on both, the arm policy"
else
    fail "a three-arm dataset through the client: a board per contrast, good first on both, the arm policy"
fi

# A recompute of a dataset without outcomes must fail with
# FAILED_PRECONDITION; the service counts it in
# plumbline_recompute_failures_total, whose family exists only after a
# failure (see the metric check below).
if PYTHONPATH="$root/$client_dir" python3 - "$grpc_addr" <<'EOF'; then
import sys
import grpc
import plumbline_client as pc

with pc.connect(sys.argv[1]) as client:
    client.create_dataset("integration-empty", ["x1"])
    try:
        client.recompute("integration-empty")
    except pc.PlumblineError as e:
        if e.code == grpc.StatusCode.FAILED_PRECONDITION:
            print(f"integration: recompute of an empty dataset refused as expected: {e.message}")
            sys.exit(0)
        print(f"integration: unexpected status: {e}", file=sys.stderr)
        sys.exit(1)
    print("integration: recompute of an empty dataset succeeded", file=sys.stderr)
    sys.exit(1)
EOF
    pass "Recompute on a dataset with no outcomes fails with FAILED_PRECONDITION"
else
    fail "Recompute on a dataset with no outcomes fails with FAILED_PRECONDITION"
fi

# ---------------------------------------------------------- metric names
#
# Checked empirically against prometheus-client (the service's exporter): a
# family with no series is left out of /metrics entirely, `# HELP` and
# `# TYPE` lines included (a fresh server serves only `# EOF`). So every name
# is checked after the example's recompute (which creates the per-window
# series, front_runner_changes_total at 0 included) and after the provoked failure
# above (which creates recompute_failures_total); none is exempt. A counter
# X_total has `# TYPE X counter`; a histogram X has X_bucket, X_count and
# X_sum samples under `# TYPE X histogram`.

if http_get "$metrics_url/metrics" >"$work/metrics.txt"; then
    note "/metrics: $(grep -c '^plumbline_' "$work/metrics.txt") samples in $(grep -c '^# TYPE ' "$work/metrics.txt") families"
    names="$(grep -oE 'plumbline_[a-z_]+' "$rules" | sort -u)"
    if [ -z "$names" ]; then
        fail "no plumbline_* names found in $rules"
    fi
    for name in $names; do
        family="$(printf '%s' "$name" | sed -E 's/_(total|bucket|count|sum)$//')"
        sample=0
        typed=0
        if grep -qE "^(${name}|${name}_bucket|${name}_count|${name}_sum)(\{| )" "$work/metrics.txt"; then
            sample=1
        fi
        if grep -qE "^# TYPE (${name}|${family}) " "$work/metrics.txt"; then
            typed=1
        fi
        if [ "$sample" -eq 1 ] && [ "$typed" -eq 1 ]; then
            pass "metric $name on /metrics ($(grep -cE "^${name}(_bucket|_count|_sum)?(\{| )" "$work/metrics.txt") series, $(grep -E "^# TYPE (${name}|${family}) " "$work/metrics.txt" | head -n 1))"
        else
            fail "metric $name used in $rules: sample on /metrics: $([ "$sample" -eq 1 ] && echo yes || echo NO), # TYPE line: $([ "$typed" -eq 1 ] && echo yes || echo NO)"
        fi
    done
else
    fail "GET $metrics_url/metrics"
fi

# --------------------------------------------------------------- shutdown

kill -TERM "$server_pid"
status=0
for _ in $(seq 1 300); do
    kill -0 "$server_pid" 2>/dev/null || break
    sleep 0.1
done
if kill -0 "$server_pid" 2>/dev/null; then
    fail "server still running 30 s after SIGTERM"
    stop_server
else
    wait "$server_pid" || status=$?
    server_pid=""
    if [ "$status" -eq 0 ]; then
        pass "SIGTERM stops the server with status 0"
    else
        fail "server exited with status $status after SIGTERM"
    fi
fi
