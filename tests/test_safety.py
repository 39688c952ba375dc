"""Data safety: outputs never touch inputs, nothing foreign is replaced, no crash,
no hang on hostile input, time-axis faults never merged silently, batch workers end
with their parent and an interrupted batch resumes.

Each test reproduces one case found by trying fitdyn as a hostile user would.
"""

from __future__ import annotations

import importlib
import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import fitdyn
from fitdyn import atomic
from fitdyn.cli import main
from fitdyn.errors import (
    EstimationError,
    FitdynError,
    InputError,
    OutputError,
    ReportError,
    TimeError,
)
from fitdyn.importer import read
from fitdyn.simulate import write_csv

batch_mod = importlib.import_module("fitdyn.batch")
ROOT = Path(__file__).resolve().parent.parent
A_SPIRAL = [[-0.5, 1.0], [-1.0, -0.5]]


def _env() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT), env.get("PYTHONPATH", "")])
    env["OPENBLAS_NUM_THREADS"] = "1"
    return env


def run(args, capsys):
    code = main([str(a) for a in args])
    out, err = capsys.readouterr()
    return code, out, err


def one_line_error(code: int, err: str) -> str:
    assert code == 2, err
    assert "Traceback" not in err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("fitdyn: error: "), err
    return lines[0]


def _recording(path: Path, seed: int = 0, n: int = 80) -> Path:
    rec = fitdyn.simulate(
        A_SPIRAL,
        [1.0, 0.5],
        [2.0, -1.0],
        np.arange(n) * 0.1,
        measurement_noise=0.01,
        seed=seed,
    )
    write_csv(rec, path)
    return path


@pytest.fixture
def source(tmp_path) -> Path:
    return _recording(tmp_path / "s.csv")


# ----------------------------------------------------------------------------------
# 1. outputs never touch inputs
# ----------------------------------------------------------------------------------
@pytest.mark.parametrize(
    "args",
    [
        ["fit", "{s}", "--method", "discrete", "--json", "{s}"],
        ["check", "{s}", "--write-clean", "{s}"],
        ["check", "{s}", "--json", "{s}"],
        ["check", "{s}", "--json", "{link}"],  # a link to the input
        ["check", "{s}", "--json", "{dir}/../{name}"],  # another spelling of it
        ["check", "{s}", "--json", "{dir}/o.json", "--write-clean", "{dir}/o.json"],
    ],
)
def test_an_output_that_is_the_input_is_refused(source, tmp_path, capsys, args):
    link = tmp_path / "link.json"
    link.symlink_to(source)
    sub = tmp_path / "sub"
    sub.mkdir()
    before = source.read_bytes()
    args = [
        a.format(s=source, link=link, dir=sub if "../" in a else tmp_path, name=source.name)
        for a in args
    ]
    code, _, err = run(args, capsys)
    one_line_error(code, err)
    assert source.read_bytes() == before
    assert not (tmp_path / "o.json").exists()


def test_report_dot_and_a_folder_holding_the_input_are_refused(
    source, tmp_path, capsys, monkeypatch
):
    monkeypatch.chdir(tmp_path)
    code, _, err = run(["fit", source.name, "--method", "discrete", "--report", "."], capsys)
    assert "ValueError" not in one_line_error(code, err)
    # elsewhere the current folder is refused too (never swapped out from under us)
    other = tmp_path / "elsewhere"
    other.mkdir()
    monkeypatch.chdir(other)
    code, _, err = run(["fit", source, "--method", "discrete", "--report", "."], capsys)
    assert "current folder" in one_line_error(code, err)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["elsewhere", "s.csv"]
    assert list(other.iterdir()) == []  # no temporary folder left behind


def test_the_library_never_replaces_a_report_folder_holding_the_input(tmp_path):
    data = tmp_path / "data"
    data.mkdir()
    src = _recording(data / "s.csv")
    res = fitdyn.fit(src, method="discrete")
    with pytest.raises(OutputError, match="holds the input"):
        res.report(data, formats=(), kinds=("eigen",))
    assert [p.name for p in data.iterdir()] == ["s.csv"]


def test_a_symlinked_report_folder_is_refused_and_its_target_kept(source, tmp_path, capsys):
    target = tmp_path / "precious"
    target.mkdir()
    (target / "notes.txt").write_text("mine")
    link = tmp_path / "rep"
    link.symlink_to(target, target_is_directory=True)
    code, _, err = run(["fit", source, "--method", "discrete", "--report", link], capsys)
    assert "symbolic link" in one_line_error(code, err)
    assert link.is_symlink() and (target / "notes.txt").read_text() == "mine"


def test_report_folder_without_a_full_manifest_is_never_replaced(source, tmp_path, capsys):
    res = fitdyn.fit(source, method="discrete")
    folder = tmp_path / "rep"
    res.report(folder, formats=(), kinds=("eigen",))
    # a rerun replaces a folder fitdyn wrote completely
    res.report(folder, formats=(), kinds=("eigen",))
    # a user's file added (even one named like ours) stops the replacement
    (folder / "figure-notes.png").write_bytes(b"mine")
    with pytest.raises(ReportError, match="did not write"):
        res.report(folder, formats=(), kinds=("eigen",))
    assert (folder / "figure-notes.png").read_bytes() == b"mine"
    (folder / "figure-notes.png").unlink()
    # a page edited by hand is kept too
    page = folder / "index.html"
    page.write_text(page.read_text() + "<!-- my edit -->")
    with pytest.raises(ReportError, match="index.html was changed"):
        res.report(folder, formats=(), kinds=("eigen",))
    # an old-style folder: only an index.html carrying our generator tag, no manifest
    old = tmp_path / "old"
    old.mkdir()
    (old / "index.html").write_text('<meta name="generator" content="fitdyn 0.1">')
    (old / "result.json").write_text("{}")
    code, _, err = run(["fit", source, "--method", "discrete", "--report", old, "--quiet"], capsys)
    one_line_error(code, err)
    assert (old / "result.json").read_text() == "{}"


def test_batch_out_inside_the_input_folder_is_refused(tmp_path, capsys):
    runs = tmp_path / "runs"
    runs.mkdir()
    for k in range(3):
        _recording(runs / f"r{k + 1}.csv", seed=k)
    before = {p.name: p.read_bytes() for p in runs.iterdir()}
    for out in (runs / "r2.csv", runs / "new.csv"):
        code, _, err = run(["batch", runs, "--out", out, "--method", "discrete"], capsys)
        one_line_error(code, err)
    # a glob naming a file: the table may not replace it either
    code, _, err = run(
        ["batch", str(runs / "r*.csv"), "--out", runs / "r2.csv", "--method", "discrete"], capsys
    )
    one_line_error(code, err)
    with pytest.raises(OutputError):
        fitdyn.batch(runs, out=runs / "r2.csv", method="discrete", quiet=True)
    assert {p.name: p.read_bytes() for p in runs.iterdir()} == before


def test_json_dir_over_the_data_or_a_foreign_json_is_refused(tmp_path, capsys):
    runs = tmp_path / "runs"
    runs.mkdir()
    _recording(runs / "r1.csv")
    (runs / "r1.json").write_text('{"mine": true}')
    code, _, err = run(
        ["batch", runs, "--out", tmp_path / "t.csv", "--json-dir", runs, "--method", "discrete"],
        capsys,
    )
    one_line_error(code, err)
    assert (runs / "r1.json").read_text() == '{"mine": true}'
    # a separate folder holding a JSON file of the same name fitdyn did not write
    jdir = tmp_path / "json"
    jdir.mkdir()
    (jdir / "r1.json").write_text('{"mine": true}')
    code, _, err = run(
        ["batch", runs / "r1.csv", "--out", tmp_path / "t.csv", "--json-dir", jdir,
         "--method", "discrete"],
        capsys,
    )  # fmt: skip
    assert "fitdyn did not write it" in one_line_error(code, err)
    assert (jdir / "r1.json").read_text() == '{"mine": true}'
    # fitdyn's own earlier result is replaced
    (jdir / "r1.json").unlink()
    for _ in range(2):
        fitdyn.batch(
            [runs / "r1.csv"], out=tmp_path / "t2.csv", json_dir=jdir, seed=1, method="discrete",
            quiet=True,
        )  # fmt: skip
    assert json.loads((jdir / "r1.json").read_text())["schema"] == "fitdyn/1"


# -- temporary files -----------------------------------------------------------------
def _dead_pid() -> int:
    p = subprocess.Popen([sys.executable, "-c", "pass"])
    p.wait()
    return p.pid


def test_stale_temporaries_of_killed_runs_are_removed(tmp_path):
    dead = _dead_pid()
    stale_file = tmp_path / f".out.csv.fitdyn-part-{dead}-abc123"
    stale_file.write_bytes(b"x" * 1000)
    stale_dir = tmp_path / f".rep.fitdyn-part-{dead}-q1w2e3"
    stale_dir.mkdir()
    (stale_dir / "index.html").write_text("half")
    alive = tmp_path / f".other.csv.fitdyn-part-{os.getppid()}-zzz"  # a live process
    alive.write_text("busy")
    users = tmp_path / ".out.csv.mine.tmp"  # not our marker: never touched
    users.write_text("keep")
    atomic.write_text(tmp_path / "out.csv", "a,b\n")
    names = sorted(p.name for p in tmp_path.iterdir())
    assert names == sorted([alive.name, users.name, "out.csv"])


def test_sigterm_during_a_write_removes_the_temporary(tmp_path):
    script = textwrap.dedent(
        f"""
        import sys, time
        from fitdyn import atomic
        from fitdyn.safety import exit_on_signals

        def slow(p):
            p.write_text("half")
            print("writing", flush=True)
            time.sleep(60)

        with exit_on_signals():
            atomic.write_with({str(tmp_path / "out.csv")!r}, slow)
        """
    )
    p = subprocess.Popen(
        [sys.executable, "-c", script], env=_env(), stdout=subprocess.PIPE, text=True
    )
    assert p.stdout.readline().strip() == "writing"
    p.send_signal(signal.SIGTERM)
    p.wait(timeout=30)
    assert p.returncode == 128 + signal.SIGTERM
    assert list(tmp_path.iterdir()) == []


# ----------------------------------------------------------------------------------
# 2. spreadsheet-safe CSV
# ----------------------------------------------------------------------------------
def test_inert_text_and_frames():
    assert atomic.inert_text("=HYPERLINK(1)") == "'=HYPERLINK(1)"
    for bad in ("+1", "-x", "@SUM(A1)", "\tx", "\rx"):
        assert atomic.inert_text(bad) == "'" + bad
    assert atomic.inert_text("plain") == "plain" and atomic.inert_text(-1.5) == -1.5
    frame = pd.DataFrame({"=a": ["=1+1", "ok"], "v": [-0.5, 2.0]})
    safe = atomic.inert_frame(frame)
    assert list(safe.columns) == ["'=a", "v"]
    assert list(safe["'=a"]) == ["'=1+1", "ok"]
    assert safe["v"].tolist() == [-0.5, 2.0]
    assert list(frame.columns) == ["=a", "v"]  # the caller's frame is untouched


def test_batch_table_and_cleaned_csv_are_inert(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    t = np.arange(60) * 0.1
    x = np.exp(-0.3 * t) * np.cos(t)
    y = np.exp(-0.3 * t) * np.sin(t)
    lines = ["run,time,=2*3,+b"] + [f"=1+1,{a},{b},{c}" for a, b, c in zip(t, x, y, strict=True)]
    Path("=evil.csv").write_text("\n".join(lines) + "\n")
    Path("@bad.csv").write_text("time,a,b\n")
    code, _, err = run(["batch", "=evil.csv", "@bad.csv", "--out", "t.csv", "--method",
                        "discrete", "--quiet"], capsys)  # fmt: skip
    assert code == 0, err
    raw = Path("t.csv").read_text()
    cells = [c for line in raw.splitlines() for c in line.split(",")]
    assert not any(c.startswith(atomic.FORMULA_START) and not _number(c) for c in cells)
    table = pd.read_csv("t.csv")
    assert set(table["file"]) == {"'=evil.csv", "'@bad.csv"}
    assert table["channel_1"].iloc[0] == "'=2*3"
    assert table["a11"].dtype == float and (table["a11"] < 0).any()  # numbers stay numbers
    # the cleaned CSV, header included
    code, _, err = run(["check", "=evil.csv", "--write-clean", "clean.csv"], capsys)
    assert code == 0, err
    header = Path("clean.csv").read_text().splitlines()[0]
    assert header.split(",")[2:4] == ["'=2*3", "'+b"]
    clean = pd.read_csv("clean.csv")
    assert set(clean["trajectory"]) == {"'=1+1"}


def _number(cell: str) -> bool:
    try:
        float(cell)
    except ValueError:
        return False
    return True


# ----------------------------------------------------------------------------------
# 3. options validated, extreme values refused, hostile files
# ----------------------------------------------------------------------------------
@pytest.mark.parametrize(
    "extra",
    [
        ["--equilibrium", "nan,nan"],
        ["--equilibrium", "inf,0"],
        ["--confidence", "nan"],
        ["--confidence", "1"],
        ["--bootstrap", "-1"],
        ["--seed", "-1"],
        ["--margin", "nan"],
        ["--margin", "-0.1"],
        ["--gap-factor", "nan"],
        ["--max-bytes", "0"],
    ],
)
def test_bad_fit_options_give_one_line(source, capsys, extra):
    code, _, err = run(["fit", source, "--method", "discrete", *extra], capsys)
    one_line_error(code, err)


@pytest.mark.parametrize(
    "extra",
    [
        ["--step", "0"],
        ["--step", "nan"],
        ["--trajectories", "0"],
        ["--process-noise", "-1"],
        ["--x0", "nan,1"],
        ["--matrix=1,0;0,inf"],
    ],
)
def test_bad_simulate_options_give_one_line(tmp_path, capsys, extra):
    args = ["simulate", "--matrix=-1,0;0,-2", "--x0", "1,1", "--out", tmp_path / "o.csv"]
    code, _, err = run(args + extra, capsys)
    one_line_error(code, err)
    assert not (tmp_path / "o.csv").exists()


@pytest.mark.parametrize(
    "kwargs",
    [
        {"equilibrium": [np.nan, np.nan]},
        {"equilibrium": [1.0]},
        {"confidence": np.nan},
        {"bootstrap": -2},
        {"bootstrap": 1.5},
        {"seed": -1},
        {"margin": np.inf},
        {"rtol": np.nan},
    ],
)
def test_fit_validates_its_arguments(source, kwargs):
    with pytest.raises(FitdynError):
        fitdyn.fit(source, method="discrete", **kwargs)


def _table(tmp_path: Path, name: str, t, x, y) -> Path:
    path = tmp_path / name
    pd.DataFrame({"time": t, "a": x, "b": y}).to_csv(path, index=False)
    return path


@pytest.mark.parametrize("method", ["auto", "discrete", "derivative", "prediction"])
def test_values_near_the_float_limit_are_refused_not_crashed(tmp_path, capsys, method):
    t = np.arange(100) * 0.1
    f = _table(tmp_path, "big.csv", t, np.exp(-0.3 * t) * 1e307, np.exp(-0.5 * t) * 1e307)
    code, _, err = run(["fit", f, "--method", method, "--json", tmp_path / "r.json"], capsys)
    assert "rescale" in one_line_error(code, err)
    assert not (tmp_path / "r.json").exists()


def test_a_time_step_of_1e_300_is_refused(tmp_path, capsys):
    t = np.arange(100) * 0.1
    f = _table(tmp_path, "tiny.csv", t * 1e-299, np.exp(-0.3 * t), np.sin(t))
    code, _, err = run(["fit", f, "--json", tmp_path / "r.json"], capsys)
    assert "time step" in one_line_error(code, err)
    with pytest.raises(InputError, match="time step"):
        fitdyn.fit(f)


def test_an_estimator_crash_becomes_an_estimation_error(source, monkeypatch):
    analysis = importlib.import_module("fitdyn.analysis")

    def broken(*args, **kwargs):
        raise np.linalg.LinAlgError("Singular matrix")

    monkeypatch.setattr(analysis, "estimate", broken)
    with pytest.raises(EstimationError, match="LinAlgError"):
        fitdyn.fit(source)


@pytest.mark.skipif(not os.path.exists("/dev/zero"), reason="no /dev/zero")
def test_devices_fifos_and_folders_are_refused_at_once(tmp_path, capsys):
    fifo = tmp_path / "pipe.csv"
    os.mkfifo(fifo)
    for path, word in (("/dev/zero", "device"), (fifo, "pipe"), (tmp_path, "folder")):
        start = time.monotonic()
        with pytest.raises(InputError, match=word):
            read(path)
        assert time.monotonic() - start < 5  # never waits for a writer or reads forever
        code, _, err = run(["check", path], capsys)
        one_line_error(code, err)


def test_size_and_line_limits_with_short_messages(tmp_path, capsys):
    long = tmp_path / "long.csv"
    long.write_text("time,a,b" + ",1" * 5_000_000)  # 10 MB on one line
    code, _, err = run(["check", long], capsys)
    line = one_line_error(code, err)
    assert "line 1" in line and "--max-line" in line and len(line) < 400
    small = _recording(tmp_path / "small.csv")
    with pytest.raises(InputError, match="more than the limit"):
        read(small, max_bytes=100)
    assert read(small, max_bytes=10**6).n_samples == 80
    # a cell of 300 kB quoted in a message is cut
    cell = "x" * 300_000
    (tmp_path / "cell.csv").write_text(f"time,a,b\n{cell},1,2\n0,1,2\n")
    code, _, err = run(["check", tmp_path / "cell.csv", "--max-line", "10000000"], capsys)
    assert len(one_line_error(code, err)) < 2000


def test_an_unbalanced_quote_is_found_not_swallowing_lines(tmp_path):
    lines = ["time,a,b"] + [f"{k},{np.cos(k / 9):.4f},{np.sin(k / 9):.4f}" for k in range(200)]
    lines[51] = '50,"0.5,0.1'  # line 52 opens a quote that never closes
    path = tmp_path / "q.csv"
    path.write_text("\n".join(lines) + "\n")
    with pytest.raises(InputError, match=r"line 52") as err:
        read(path)
    assert "quote" in str(err.value)
    # a quote closed on the next line is read, and noted
    lines[51] = '50,"0.5'
    lines[52] = '",0.1'
    path.write_text("\n".join(lines) + "\n")
    rec = read(path)
    assert any("line 52: a quoted cell runs on to line 53" in n for n in rec.log.notes)


# ----------------------------------------------------------------------------------
# 4. time-axis faults
# ----------------------------------------------------------------------------------
def _stamped(path: Path, stamps, seed: int = 0) -> Path:
    rng = np.random.default_rng(seed)
    k = np.arange(len(stamps))
    x = np.cos(k / 20) + 0.01 * rng.standard_normal(k.size)
    y = np.sin(k / 20) + 0.01 * rng.standard_normal(k.size)
    lines = ["timestamp,a,b"] + [
        f"{s},{a:.5f},{b:.5f}" for s, a, b in zip(stamps, x, y, strict=True)
    ]
    path.write_text("\n".join(lines) + "\n")
    return path


def test_a_repeated_daylight_saving_hour_is_split_not_merged(tmp_path, capsys):
    # local wall-clock times without an offset: 00:00 .. 01:59, then 01:00 .. 02:59 again
    # (the clocks went back one hour at 02:00), every 36 s: 100 rows repeat an hour
    first = pd.date_range("2024-10-27T00:00:00", "2024-10-27T01:59:24", freq="36s")
    again = pd.date_range("2024-10-27T01:00:00", "2024-10-27T02:59:24", freq="36s")
    stamps = [s.strftime("%Y-%m-%dT%H:%M:%S") for s in first.append(again)]
    path = _stamped(tmp_path / "dst.csv", stamps)
    rec = read(path, outliers="ignore")
    assert rec.log.merged_rows == 0 and rec.log.dropped_rows == 0
    assert rec.n_samples == len(stamps)  # every row kept
    assert rec.trajectory_names == ("1", "1 (part 2)")
    assert rec.samples_per_trajectory() == {"1": first.size, "1 (part 2)": again.size}
    note = next(n for n in rec.log.notes if "time jumps back" in n)
    assert f"row {first.size + 2}" in note  # the header is line 1
    with pytest.raises(TimeError, match=f"row {first.size + 2}"):
        read(path, time_jumps="refuse")
    code, _, err = run(["check", path, "--time-jumps", "refuse"], capsys)
    one_line_error(code, err)
    # asked explicitly: the old merge by time (100 rows averaged)
    merged = read(path, outliers="ignore", time_jumps="sort")
    assert merged.log.merged_rows == 100


def test_a_clock_restart_mid_file_is_split(tmp_path):
    t = np.r_[np.arange(150) * 0.5, np.arange(90) * 0.5 + 0.02]
    rng = np.random.default_rng(1)
    x, y = rng.standard_normal(t.size), rng.standard_normal(t.size)
    path = _table(tmp_path, "restart.csv", t, x, y)
    rec = read(path, outliers="ignore")
    assert rec.samples_per_trajectory() == {"1": 150, "1 (part 2)": 90}
    assert rec.log.merged_rows == 0
    # with a trajectory column the restart is found inside that trajectory
    frame = pd.DataFrame({"run": ["p"] * t.size, "time": t, "a": x, "b": y})
    frame = pd.concat([frame, frame.assign(run="q")], ignore_index=True)
    rec = read(frame, outliers="ignore")
    assert rec.trajectory_names == ("p", "p (part 2)", "q", "q (part 2)")
    assert rec.n_samples == 2 * t.size
    # fit copes with the parts (each one a trajectory)
    res = fitdyn.fit(path, method="discrete")
    assert res.recording.n_trajectories == 2


def test_time_running_backwards_is_refused_unless_sorting_is_asked(tmp_path):
    t = np.arange(100)[::-1] * 0.1
    path = _table(tmp_path, "back.csv", t, np.exp(-0.2 * t), np.cos(t))
    with pytest.raises(TimeError, match="runs backwards"):
        read(path)
    rec = read(path, time_jumps="sort")
    assert np.all(np.diff(rec.times) > 0) and rec.n_samples == 100


def test_a_local_shuffle_is_still_sorted_quietly(tmp_path):
    t = np.arange(40) * 1.0
    order = np.arange(40)
    order[[10, 11]] = order[[11, 10]]
    order[[20, 22]] = order[[22, 20]]
    path = _table(tmp_path, "shuffle.csv", t[order], np.cos(t[order]), np.sin(t[order]))
    rec = read(path, outliers="ignore")
    assert rec.n_trajectories == 1 and rec.n_samples == 40
    assert not any("jumps back" in n for n in rec.log.notes)


# ----------------------------------------------------------------------------------
# 5. batch: workers end with the parent, Ctrl-C is clean, resumable
# ----------------------------------------------------------------------------------
def _state(pid: int) -> str | None:
    try:
        text = Path(f"/proc/{pid}/status").read_text()
    except OSError:
        return None
    for line in text.splitlines():
        if line.startswith("State:"):
            return line.split()[1]
    return None


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_pool_workers_die_with_a_killed_parent(tmp_path):
    script = textwrap.dedent(
        """
        import os, time
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor
        from fitdyn.batch import _init_worker

        if __name__ == "__main__":
            ctx = multiprocessing.get_context("spawn")
            ex = ProcessPoolExecutor(2, mp_context=ctx, initializer=_init_worker,
                                     initargs=(os.getpid(),))
            pids = set()
            futures = [ex.submit(os.getpid) for _ in range(8)]
            pids = {f.result() for f in futures}
            for _ in range(4):
                ex.submit(time.sleep, 120)
            print(" ".join(map(str, sorted(pids))), flush=True)
            time.sleep(120)
        """
    )
    file = tmp_path / "parent.py"
    file.write_text(script)
    p = subprocess.Popen([sys.executable, str(file)], env=_env(), stdout=subprocess.PIPE, text=True)
    pids = [int(x) for x in p.stdout.readline().split()]
    assert pids and all(_state(pid) not in (None, "Z") for pid in pids)
    p.kill()  # SIGKILL: no cleanup code runs in the parent
    p.wait()
    deadline = time.monotonic() + 15
    while time.monotonic() < deadline and any(_state(pid) not in (None, "Z") for pid in pids):
        time.sleep(0.2)
    assert all(_state(pid) in (None, "Z") for pid in pids)


def test_the_parent_watch_thread_ends_an_orphan(tmp_path):
    # the polling fallback alone (as where prctl is missing): a grandchild whose
    # parent exits notices within a few seconds
    script = textwrap.dedent(
        """
        import os, subprocess, sys, time
        child = subprocess.Popen([sys.executable, "-c",
            "import os, time; from fitdyn.batch import _watch_parent; "
            "_watch_parent(os.getppid(), interval=0.2); time.sleep(60)"])
        print(child.pid, flush=True)
        time.sleep(1.5)
        os._exit(0)
        """
    )
    p = subprocess.Popen(
        [sys.executable, "-c", script], env=_env(), stdout=subprocess.PIPE, text=True
    )
    pid = int(p.stdout.readline())
    p.wait(timeout=30)
    deadline = time.monotonic() + 15
    while time.monotonic() < deadline and _state(pid) not in (None, "Z"):
        time.sleep(0.2)
    assert _state(pid) in (None, "Z")


def _slow_runs(root: Path, n: int) -> Path:
    root.mkdir()
    for k in range(n):
        _recording(root / f"r{k:02d}.csv", seed=k, n=150)
    return root


@pytest.mark.parametrize("backend", ["process", "dask"])
def test_ctrl_c_is_clean_under_every_backend(tmp_path, backend):
    if backend == "dask":
        pytest.importorskip("distributed")
    runs = _slow_runs(tmp_path / "runs", 8)
    out = str(tmp_path / "t.csv")
    args = [sys.executable, "-m", "fitdyn", "batch", str(runs), "--out", out, "--workers", "2",
            "--backend", backend, "--bootstrap", "3000", "--seed", "1"]  # fmt: skip
    p = subprocess.Popen(
        args, env=_env(), start_new_session=True, stderr=subprocess.PIPE, text=True
    )
    journal = batch_mod.journal_path(tmp_path / "t.csv")
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and not journal.exists():  # written before fitting
        time.sleep(0.1)
    time.sleep(2.0)  # the workers are starting or fitting now
    # as a terminal sends Ctrl-C: to the whole process group (again every few seconds,
    # as a person would, in case it came while Dask was starting its workers)
    for _ in range(20):
        os.killpg(p.pid, signal.SIGINT)
        try:
            p.wait(timeout=5)
            break
        except subprocess.TimeoutExpired:
            continue
    _, err = p.communicate(timeout=60)
    assert p.returncode == 130, err
    assert "Traceback" not in err and err.strip() == "fitdyn: interrupted"
    assert not (tmp_path / "t.csv").exists()
    leftovers = [q.name for q in tmp_path.iterdir() if atomic.TEMP_MARK in q.name]
    assert leftovers == []


def test_an_interrupted_batch_resumes_without_refitting_or_duplicates(tmp_path, monkeypatch):
    runs = tmp_path / "runs"
    runs.mkdir()
    for k in range(5):
        _recording(runs / f"r{k}.csv", seed=k)
    out = tmp_path / "t.csv"
    opts = {"method": "discrete", "bootstrap": 20, "seed": 4, "quiet": True, "chunk": 1}
    full = fitdyn.batch(runs, **opts)

    real = batch_mod._fit_chunk
    calls: list[str] = []

    def counting(chunk, options):
        calls.extend(Path(task[1]).name for task in chunk)
        if len(calls) == 3:
            raise KeyboardInterrupt
        return real(chunk, options)

    monkeypatch.setattr(batch_mod, "_fit_chunk", counting)
    with pytest.raises(KeyboardInterrupt):
        fitdyn.batch(runs, out=out, **opts)
    assert not out.exists()
    calls.clear()
    monkeypatch.setattr(batch_mod, "_fit_chunk", lambda c, o: (calls.extend(
        Path(t[1]).name for t in c), real(c, o))[1])  # fmt: skip
    resumed = fitdyn.batch(runs, out=out, **opts)
    assert calls == ["r2.csv", "r3.csv", "r4.csv"]  # r0 and r1 came from the journal
    pd.testing.assert_frame_equal(resumed, full, check_exact=True)
    on_disk = pd.read_csv(out)
    assert len(on_disk) == 5 and on_disk["file"].is_unique
    # a rerun with nothing changed fits nothing
    calls.clear()
    again = fitdyn.batch(runs, out=out, **opts)
    assert calls == []
    pd.testing.assert_frame_equal(again, full, check_exact=True)
    # a changed file is fitted again, the others are not
    _recording(runs / "r3.csv", seed=99)
    calls.clear()
    fitdyn.batch(runs, out=out, **opts)
    assert calls == ["r3.csv"]
    # other options: everything again
    calls.clear()
    fitdyn.batch(runs, out=out, **dict(opts, bootstrap=10))
    assert len(calls) == 5


def test_a_torn_journal_line_is_ignored(tmp_path):
    runs = tmp_path / "runs"
    runs.mkdir()
    for k in range(2):
        _recording(runs / f"r{k}.csv", seed=k)
    out = tmp_path / "t.csv"
    first = fitdyn.batch(runs, out=out, method="discrete", seed=2, quiet=True)
    journal = batch_mod.journal_path(out)
    text = journal.read_text()
    journal.write_text(text[: len(text) - 40])  # killed in mid-write of the last row
    again = fitdyn.batch(runs, out=out, method="discrete", seed=2, quiet=True)
    pd.testing.assert_frame_equal(again, first, check_exact=True)
    # compacted on the rerun: the header, r0, then r1 fitted again; the torn line gone
    lines = journal.read_text().splitlines()
    assert len(lines) == 3 and all(json.loads(line) for line in lines)


def test_plan_outputs_never_replace_its_inputs(tmp_path):
    # the plan's table, figure and JSON may not name the fit result it reads
    from fitdyn.cli import main

    src = tmp_path / "fit.json"
    src.write_text("{}", encoding="utf-8")
    before = src.read_bytes()
    for opt in ("--table", "--plot", "--json"):
        assert main(["plan", str(src), opt, str(src), "--quiet"]) == 2
        assert src.read_bytes() == before


def test_library_to_json_never_writes_over_its_input(tmp_path):
    # The library call guards its output as the command line's --json does.
    rec = fitdyn.simulate([[-0.3, 1.0], [-1.0, -0.3]], [1.0, 2.0], [3.0, 0.0],
                          np.linspace(0, 20, 120), measurement_noise=0.05, seed=3)  # fmt: skip
    src = tmp_path / "bench.csv"
    write_csv(rec, src)
    before = src.read_bytes()
    fit = fitdyn.fit(str(src), bootstrap=0, quiet=True)
    with pytest.raises(OutputError, match="input file"):
        fit.to_json(src)
    assert src.read_bytes() == before
    with pytest.raises(OutputError, match="folder"):
        fit.to_json(tmp_path)
    out = tmp_path / "result.json"
    fit.to_json(out)
    assert json.loads(out.read_text())["schema"].startswith("fitdyn/")
