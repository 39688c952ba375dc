"""The bundled demo recordings: the importer's counts and the fitted classes.

The expected values come from data_demo/expected.json, written by
data_demo/make_demo.py alongside the files (the true systems are known because the
data were simulated).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

import fitdyn
from fitdyn.cli import main

DEMO = Path(__file__).resolve().parent.parent / "data_demo"
EXPECTED = json.loads((DEMO / "expected.json").read_text())["files"]
FILES = sorted(EXPECTED)


@pytest.mark.parametrize("name", FILES)
def test_check_reports_the_right_counts(name, tmp_path, capsys):
    exp = EXPECTED[name]
    out = tmp_path / "check.json"
    assert main(["check", str(DEMO / name), "--json", str(out)]) == 0
    printed = capsys.readouterr().out
    d = json.loads(out.read_text())
    for key in ("input_rows", "kept_rows", "merged_rows", "outliers", "trajectories", "gaps"):
        assert d[key] == exp[key], key
    assert d["dropped"] == exp["dropped"]
    assert d["channels"] == exp["channels"]
    assert d["units"] == exp["units"]
    assert d["time_unit"] == exp["time_unit"]
    assert f"input rows      {exp['input_rows']}" in printed


@pytest.mark.parametrize("name", FILES)
def test_defect_rows_are_named_in_the_log(name):
    exp = EXPECTED[name]
    log = fitdyn.read(DEMO / name).log
    assert log.balanced()
    for reason, lines in exp.get("dropped_lines", {}).items():
        assert log.rows_with("dropped", reason) == lines
    assert log.rows_with("merged") == exp.get("merged_lines", [])
    flagged = [f.row for f in log.fates if "outlier" in f.flags]
    assert flagged == exp["outlier_lines"]


@pytest.mark.parametrize("name", FILES)
def test_demo_files_get_their_true_class(name):
    truth = EXPECTED[name]["truth"]
    res = fitdyn.fit(DEMO / name, bootstrap=0)
    assert res.label == truth["class"]
    lam_true = np.array([complex(re, im) for re, im in truth["eigenvalues"]])
    lam_true = fitdyn.linalg2.sort_eigenvalues(lam_true[None])[0]
    err = np.abs(res.eigenvalues - lam_true) / np.abs(lam_true)
    assert np.all(err < 0.35), (res.eigenvalues, lam_true)
