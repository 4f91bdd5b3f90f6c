"""The numpy / scikit-learn peer of `plumbline score`.

Does the nuisance and corrected-PEHE work of `plumbline score` on the same
two CSV files (README of this folder: what is and is not comparable):

- 5-fold cross-fitting, folds stratified by arm;
- propensity: HistGradientBoostingClassifier (scikit-learn defaults), fitted
  on the four training folds, predicted for the held-out fold;
- outcome regressions mu0 and mu1: HistGradientBoostingRegressor (or
  Classifier for a 0/1 outcome), each fitted on the training folds' units of
  its own arm only and predicted for every held-out unit;
- propensities clipped to [0.01, 0.99];
- AIPW pseudo-outcome (src/estimate/pseudo.rs):
    phi = tau~ + W (Y - mu1) / pi - (1 - W)(Y - mu0) / (1 - pi),  tau~ = mu1 - mu0
- corrected PEHE per model (src/estimate/estimators/corrected_pehe.rs):
    c = (tau_hat - tau~)^2 + 2 (tau~ - tau_hat)(phi - tau~)
  mean and se = sd(c, ddof=1) / sqrt(n) (src/estimate/stats.rs mean_se),
  for every model of the predictions file and the two built-in baselines
  zero-effect (0 for everyone) and constant-effect (the AIPW ATE).

Out-of-fold losses are computed as plumbline computes them: the propensity
log loss on the unclipped out-of-fold probabilities (kept within 1e-15 of 0
and 1), each outcome arm's squared error on that arm's units.

Prints one JSON object on stdout. Timings: `imports` is the time from the
first line of this script to the end of the numpy / scikit-learn imports,
`work` everything after that (reading the CSVs included); the interpreter's
own start-up is what the driver's wall clock sees beyond the two.
"""

import time

T_START = time.perf_counter()

import argparse  # noqa: E402
import json  # noqa: E402
import sys  # noqa: E402

import numpy as np  # noqa: E402
from sklearn.ensemble import (  # noqa: E402
    HistGradientBoostingClassifier,
    HistGradientBoostingRegressor,
)
from sklearn.model_selection import StratifiedKFold  # noqa: E402

T_IMPORTED = time.perf_counter()

CLIP = 0.01
LOG_LOSS_EPS = 1e-15
NON_FEATURES = ("unit_id", "treatment", "outcome", "propensity")


def read_csv(path):
    """(header, unit ids, float matrix of the other columns)."""
    with open(path, newline="") as f:
        header = f.readline().strip().split(",")
    ids = np.loadtxt(path, delimiter=",", skiprows=1, usecols=0, dtype=str, ndmin=1)
    values = np.loadtxt(
        path,
        delimiter=",",
        skiprows=1,
        usecols=range(1, len(header)),
        dtype=np.float64,
        ndmin=2,
    )
    return header, ids, values


def load(units_path, predictions_path):
    header, ids, values = read_csv(units_path)
    cols = header[1:]
    if header[0] != "unit_id" or "treatment" not in cols or "outcome" not in cols:
        sys.exit(f"{units_path}: expected unit_id, treatment, outcome, features")
    w = values[:, cols.index("treatment")]
    y = values[:, cols.index("outcome")]
    logged = values[:, cols.index("propensity")] if "propensity" in cols else None
    feature_idx = [j for j, c in enumerate(cols) if c not in NON_FEATURES]
    x = np.ascontiguousarray(values[:, feature_idx])

    p_header, p_ids, p_values = read_csv(predictions_path)
    names = p_header[1:]
    if len(p_ids) != len(ids):
        sys.exit("units and predictions files hold different numbers of units")
    if np.array_equal(p_ids, ids):
        effects = p_values
    else:
        order = {u: i for i, u in enumerate(p_ids)}
        effects = p_values[[order[u] for u in ids]]
    return x, w, y, logged, names, effects


def outcome_is_binary(y):
    return bool(np.all((y == 0.0) | (y == 1.0)))


def cross_fit(x, w, y, logged, binary, folds, seed):
    n = len(y)
    splitter = StratifiedKFold(n_splits=folds, shuffle=True, random_state=seed)
    propensity = np.empty(n) if logged is None else logged.copy()
    mu = {0: np.empty(n), 1: np.empty(n)}
    outcome_model = HistGradientBoostingClassifier if binary else HistGradientBoostingRegressor
    for f, (train, held) in enumerate(splitter.split(x, w)):
        if logged is None:
            clf = HistGradientBoostingClassifier(random_state=seed + f)
            clf.fit(x[train], w[train])
            propensity[held] = clf.predict_proba(x[held])[:, 1]
        for arm in (0, 1):
            rows = train[w[train] == arm]
            model = outcome_model(random_state=seed + 100 * (arm + 1) + f)
            model.fit(x[rows], y[rows])
            if binary:
                mu[arm][held] = model.predict_proba(x[held])[:, 1]
            else:
                mu[arm][held] = model.predict(x[held])
    return propensity, mu[0], mu[1]


def log_loss(labels, p):
    p = np.clip(p, LOG_LOSS_EPS, 1.0 - LOG_LOSS_EPS)
    return float(-np.mean(labels * np.log(p) + (1.0 - labels) * np.log(1.0 - p)))


def mean_se(v):
    n = len(v)
    return {"estimate": float(np.mean(v)), "se": float(np.std(v, ddof=1) / np.sqrt(n))}


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--units", required=True)
    ap.add_argument("--predictions", required=True)
    ap.add_argument("--folds", type=int, default=5)
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args()

    x, w, y, logged, names, effects = load(args.units, args.predictions)
    t_read = time.perf_counter()
    binary = outcome_is_binary(y)
    raw_p, mu0, mu1 = cross_fit(x, w, y, logged, binary, args.folds, args.seed)
    t_fit = time.perf_counter()

    treated, control = w == 1.0, w == 0.0
    outcome_loss = (lambda yy, pp: log_loss(yy, pp)) if binary else (
        lambda yy, pp: float(np.mean((yy - pp) ** 2))
    )
    nuisance = {
        "propensity_log_loss": None if logged is not None else log_loss(w, raw_p),
        "outcome_control_loss": outcome_loss(y[control], mu0[control]),
        "outcome_treated_loss": outcome_loss(y[treated], mu1[treated]),
        "outcome_loss": "log_loss" if binary else "squared_error",
    }

    p = np.clip(raw_p, CLIP, 1.0 - CLIP)
    tau_tilde = mu1 - mu0
    phi = tau_tilde + w * (y - mu1) / p - (1.0 - w) * (y - mu0) / (1.0 - p)
    ate = mean_se(phi)

    all_names = ["zero-effect", "constant-effect"] + list(names)
    n = len(y)
    all_effects = np.column_stack(
        [np.zeros(n), np.full(n, ate["estimate"]), effects]
    )
    d = all_effects - tau_tilde[:, None]
    c = d * d - 2.0 * d * (phi - tau_tilde)[:, None]
    models = {name: mean_se(c[:, k]) for k, name in enumerate(all_names)}
    t_end = time.perf_counter()

    json.dump(
        {
            "n_units": int(n),
            "ate": ate,
            "clipped": int(np.sum(p != raw_p)),
            "nuisance": nuisance,
            "corrected_pehe": models,
            "seconds": {
                "imports": T_IMPORTED - T_START,
                "read": t_read - T_IMPORTED,
                "fit": t_fit - t_read,
                "estimate": t_end - t_fit,
                "work": t_end - T_IMPORTED,
            },
        },
        sys.stdout,
        indent=1,
    )
    print()


if __name__ == "__main__":
    main()
