"""Tests of the command line: exit codes, one-line errors, outputs."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from fitdyn.cli import main

DEMO = Path(__file__).resolve().parent.parent / "data_demo"


def run(args, capsys):
    code = main([str(a) for a in args])
    out, err = capsys.readouterr()
    return code, out, err


def _write_csv(path: Path, n: int = 120) -> Path:
    t = np.linspace(0, 12, n)
    x = np.exp(-0.5 * t) * 2 + 1
    y = np.exp(-0.1 * t) - 1
    lines = ["time,a,b"] + [f"{ti},{xi},{yi}" for ti, xi, yi in zip(t, x, y, strict=True)]
    path.write_text("\n".join(lines) + "\n")
    return path


def test_missing_file_exits_2_with_one_line(tmp_path, capsys):
    code, out, err = run(["check", tmp_path / "nope.csv"], capsys)
    assert code == 2
    assert "nope.csv" in err
    assert len(err.strip().splitlines()) == 1
    assert "Traceback" not in err


def test_unknown_column_exits_2_and_lists_columns(tmp_path, capsys):
    f = _write_csv(tmp_path / "r.csv")
    code, out, err = run(["check", f, "--channels", "a,zzz"], capsys)
    assert code == 2
    assert "zzz" in err and "b" in err
    assert len(err.strip().splitlines()) == 1


def test_bad_option_values_exit_2(tmp_path, capsys):
    f = _write_csv(tmp_path / "r.csv")
    assert run(["fit", f, "--equilibrium", "1"], capsys)[0] == 2
    assert run(["fit", f, "--confidence", "1.5"], capsys)[0] == 2
    with pytest.raises(SystemExit) as exc:  # argparse's own usage errors
        main(["fit", str(f), "--method", "nonsense"])
    assert exc.value.code == 2


def test_check_prints_summary_and_writes_json(tmp_path, capsys):
    f = _write_csv(tmp_path / "r.csv")
    out_json = tmp_path / "sub" / "check.json"
    clean = tmp_path / "clean.csv"
    code, out, err = run(["check", f, "--json", out_json, "--write-clean", clean], capsys)
    assert code == 0, err
    assert "trajectories" in out
    d = json.loads(out_json.read_text())
    for key in (
        "input_rows",
        "kept_rows",
        "dropped",
        "merged_rows",
        "outliers",
        "trajectories",
        "sampling",
    ):
        assert key in d
    assert d["input_rows"] == 120 and d["kept_rows"] == 120
    assert d["sampling"]["uniform"] is True
    assert d["sampling"]["median_step"] == pytest.approx(12 / 119)
    assert clean.exists()
    # the cleaned file reads back with the same samples
    code, out, err = run(["check", clean], capsys)
    assert code == 0, err


def test_fit_prints_summary_and_json(tmp_path, capsys):
    f = _write_csv(tmp_path / "r.csv")
    out_json = tmp_path / "fit.json"
    code, out, err = run(
        ["fit", f, "--method", "integral", "--bootstrap", "0", "--json", out_json], capsys
    )
    assert code == 0, err
    assert "stable node" in out
    d = json.loads(out_json.read_text())
    assert d["schema"] == "fitdyn/1"
    assert d["classification"]["label"] == "stable node"
    # eigenvalues -0.5 and -0.1 (decoupled channels; common practice, no source)
    re = sorted(e[0] for e in d["eigenvalues"])
    assert re == pytest.approx([-0.5, -0.1], rel=1e-3)


@pytest.mark.parametrize("method", ["discrete", "instrumental", "kalman"])
def test_every_registered_method_is_an_option(tmp_path, capsys, method):
    # the chamber demo: uniform steps, a stable node (data_demo/README.md)
    out_json = tmp_path / "fit.json"
    code, out, err = run(
        ["fit", DEMO / "chamber_cooling.csv", "--method", method, "--gap-factor", "1.5",
         "--outliers", "drop", "--json", out_json, "--quiet", "--bootstrap", "0"],
        capsys,
    )  # fmt: skip
    assert code == 0, err
    d = json.loads(out_json.read_text())
    assert d["method"] == method
    assert d["classification"]["label"] == "stable node"


def test_simulate_writes_a_readable_csv(tmp_path, capsys):
    out = tmp_path / "sim.csv"
    code, _, err = run(
        [
            "simulate",
            "--matrix=-1,0.5;-0.5,-1",
            "--x0",
            "1,1",
            "--samples",
            "150",
            "--step",
            "0.05",
            "--measurement-noise",
            "0.001",
            "--seed",
            "3",
            "--out",
            out,
        ],
        capsys,
    )
    assert code == 0, err
    code, text, err = run(["fit", out, "--method", "integral", "--bootstrap", "0"], capsys)
    assert code == 0, err
    assert "stable spiral" in text


def test_console_entry_points_run():
    res = subprocess.run(
        [sys.executable, "-m", "fitdyn", "--version"], capture_output=True, text=True
    )
    assert res.returncode == 0 and "fitdyn" in res.stdout
    res = subprocess.run(
        [sys.executable, "-m", "fitdyn", "check", "/nonexistent/file.csv"],
        capture_output=True,
        text=True,
    )
    assert res.returncode == 2
    assert "Traceback" not in res.stderr


def test_output_piped_into_a_reader_that_stops_is_no_error(tmp_path):
    # `fitdyn fit ... | head -2`: the reader closes the pipe; no traceback, exit 0
    demo = Path(__file__).resolve().parent.parent / "data_demo" / "chamber_cooling.csv"
    report = tmp_path / "rep"
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "fitdyn",
            "fit",
            str(demo),
            "--bootstrap",
            "0",
            "--report",
            str(report),
        ],  # fmt: skip
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    proc.stdout.readline()
    proc.stdout.close()  # stop reading, as head does
    err = proc.stderr.read().decode()
    assert proc.wait(timeout=120) == 0, err
    assert "Traceback" not in err
    assert (report / "index.html").is_file()  # the files were written before the text


def _subparsers():
    import argparse

    from fitdyn.cli import build_parser

    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return sub.choices


def test_every_option_states_its_default_and_choices():
    import argparse

    for name, p in _subparsers().items():
        for act in p._actions:
            if not act.option_strings or isinstance(act, argparse._HelpAction):
                continue
            text = act.help % {"default": act.default, "choices": ", ".join(act.choices or ())}
            assert text, (name, act.dest)
            if act.choices:
                assert all(str(c) in text for c in act.choices), (name, act.dest)
            flag = isinstance(act, argparse._StoreTrueAction)
            if not (act.required or flag):
                assert "default" in text, (name, act.dest, text)


def test_bootstrap_defaults_fit_1000_batch_0(capsys):
    sub = _subparsers()
    assert sub["fit"].parse_args(["x.csv"]).bootstrap == 1000
    assert sub["batch"].parse_args(["x.csv", "--out", "t.csv"]).bootstrap == 0
    assert sub["fit"].parse_args(["x.csv"]).verbose is False
    with pytest.raises(SystemExit):
        main(["fit", "--help"])
    out = capsys.readouterr().out
    assert "default 1000" in out and "calibrated from 500" in out
    assert "--verbose" in out


def test_fit_summary_answers_first_and_verbose_adds_the_notes(tmp_path, capsys):
    f = _write_csv(tmp_path / "r.csv")
    code, out, err = run(["fit", f, "--bootstrap", "200", "--seed", "1"], capsys)
    assert code == 0, err
    lines = [ln for ln in out.splitlines() if ln.strip()]
    assert lines[1].startswith("Verdict          stable node (P ")
    assert lines[2].startswith("Eigenvalues")
    assert "auto:" not in out  # the estimator-selection notes need --verbose
    assert "only 200 bootstrap replicates" in out
    code, loud, err = run(["fit", f, "--bootstrap", "200", "--seed", "1", "--verbose"], capsys)
    assert code == 0, err
    assert "How the estimate was made" in loud and "auto:" in loud
    # the answer still comes first
    assert [ln for ln in loud.splitlines() if ln.strip()][1] == lines[1]
