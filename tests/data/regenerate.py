#!/usr/bin/env python3
"""Regenerate the real-data CSV files used by plumbline's tests.

Requires: pip install causaldata pandas statsmodels scikit-learn numpy

Writes, next to this script:
  nsw_mixtape.csv     Dehejia-Wahba NSW experimental subsample (445 rows)
  nhefs_complete.csv  NHEFS complete-case data (1,566 rows)
  SOURCES.md          provenance and licence notes

Column layout of both CSVs: unit_id, treatment, outcome, then numeric features.
"""

import importlib.metadata
from pathlib import Path

import causaldata
import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent


def fmt_f32(v):
    """Shortest decimal that round-trips the stored float32 value."""
    return np.format_float_positional(np.float32(v), trim="-")


def write_nsw():
    raw = causaldata.nsw_mixtape.load_pandas().data
    raw = raw.drop(columns=["data_id"])
    n_treated = int((raw["treat"] == 1).sum())
    n_control = int((raw["treat"] == 0).sum())
    assert (n_treated, n_control) == (185, 260), (n_treated, n_control)

    out = pd.DataFrame({"unit_id": np.arange(1, len(raw) + 1)})
    out["treatment"] = raw["treat"].astype(int).to_numpy()
    out["outcome"] = [fmt_f32(v) for v in raw["re78"]]
    for c in ["age", "educ", "black", "hisp", "marr", "nodegree"]:
        out[c] = raw[c].astype(int).to_numpy()
    for c in ["re74", "re75"]:
        out[c] = [fmt_f32(v) for v in raw[c]]
    out.to_csv(HERE / "nsw_mixtape.csv", index=False)
    print(f"nsw_mixtape.csv: {len(out)} rows, treated={n_treated}, controls={n_control}")
    return len(out)


def write_nhefs():
    raw = causaldata.nhefs_complete.load_pandas().data
    assert raw["seqn"].is_unique
    out = pd.DataFrame({"unit_id": raw["seqn"].astype(int).to_numpy()})
    out["treatment"] = raw["qsmk"].astype(int).to_numpy()
    out["outcome"] = raw["wt82_71"].astype(float).round(6).to_numpy()
    # categorical columns are stored as string categories in the .dta file
    for c in ["sex", "race", "age", "education", "smokeintensity", "smokeyrs",
              "exercise", "active"]:
        out[c] = raw[c].astype(str).astype(float).astype(int).to_numpy()
    wt71 = raw["wt71"].astype(float)
    assert np.allclose(wt71, wt71.round(2), atol=1e-9, rtol=0)  # two decimals in source
    out["wt71"] = wt71.round(2).to_numpy()
    assert set(out["education"]) <= {1, 2, 3, 4, 5}
    assert set(out["exercise"]) <= {0, 1, 2} and set(out["active"]) <= {0, 1, 2}
    assert not out.isna().any().any()
    out.to_csv(HERE / "nhefs_complete.csv", index=False)
    print(f"nhefs_complete.csv: {len(out)} rows, treated={int(out.treatment.sum())}, "
          f"controls={int((out.treatment == 0).sum())}")
    assert len(out) == 1566
    return len(out)


def write_sources(n_nsw, n_nhefs):
    md = importlib.metadata.metadata("causaldata")
    version = md["Version"]
    licence = md.get("License")
    author = md.get("Author")
    text = f"""# Test data sources

Both CSV files are produced by `regenerate.py` from the PyPI package
`causaldata` version {version} (author as stated in the package metadata:
{author}). The data are redistributed here solely for testing plumbline. Values are
unchanged apart from column selection/renaming, writing numbers as decimal
text, and rounding `wt82_71` to 6 decimals.

Licence as stated by the package metadata (`License:` field of
`pip show causaldata`): **{licence}**. The installed distribution ships no
separate licence file.

## nsw_mixtape.csv ({n_nsw} rows)

- Package dataset: `causaldata.nsw_mixtape` (the Dehejia-Wahba sample of the
  National Supported Work Demonstration; 185 treated, 260 controls).
- Original publications: Dehejia, R. and Wahba, S. (1999), "Causal Effects in
  Nonexperimental Studies: Reevaluating the Evaluation of Training Programs",
  Journal of the American Statistical Association 94(448), 1053-1062; built
  on LaLonde, R. (1986), American Economic Review 76(4), 604-620 (the
  package's copyright note for this dataset says "Lalonde 1986").
- Columns: `unit_id` (row number 1..n, added here), `treatment` (= `treat`),
  `outcome` (= `re78`, real earnings 1978), features `age, educ, black, hisp,
  marr, nodegree, re74, re75`. The constant text column `data_id` is dropped.
  Earnings are stored as float32 in the package; they are written as the
  shortest decimal that round-trips the float32 value.

## nhefs_complete.csv ({n_nhefs} rows)

- Package dataset: `causaldata.nhefs_complete` (complete cases of the NHANES I
  Epidemiologic Follow-up Study; the package docstring says 1556
  observations, the data actually hold 1566).
- Original publication/use: Hernan, M. A. and Robins, J. M., *Causal
  Inference: What If* (Chapman & Hall/CRC), chapters 12-13, NHEFS data;
  survey data originally from the US National Center for Health Statistics
  (the package's copyright note says "CDC").
- Columns: `unit_id` (= `seqn`), `treatment` (= `qsmk`, quit smoking
  1971-1982), `outcome` (= `wt82_71`, weight change in kg, rounded to 6
  decimals), features `sex, race, age, education` (integer code 1..5),
  `smokeintensity, smokeyrs, exercise` (0,1,2), `active` (0,1,2), `wt71`.
"""
    (HERE / "SOURCES.md").write_text(text)
    print(f"causaldata version {version}; licence field: {licence}")


def main():
    n_nsw = write_nsw()
    n_nhefs = write_nhefs()
    write_sources(n_nsw, n_nhefs)


if __name__ == "__main__":
    main()
