"""Make the demo recordings in this folder (invented data, fixed seeds).

    python data_demo/make_demo.py

regenerates byte-identical files: chamber_cooling.csv, torsion_rig.csv,
reactor_runaway.csv and expected.json (the counts the importer should report).
Each scenario is simulated with :func:`fitdyn.simulate` (exact discretisation of
dx = A (x - x*) dt + Q^{1/2} dW) and then given the defects a real logger file has.
The data are for demonstrating and testing fitdyn only; they describe no real
equipment.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from fitdyn.atomic import write_text
from fitdyn.linalg2 import eigvals
from fitdyn.simulate import simulate, write_csv

HERE = Path(__file__).resolve().parent


def _fmt(values: np.ndarray, digits: int) -> list[str]:
    return [f"{v:.{digits}f}" for v in values]


def _json(obj: Any, indent: int = 0) -> str:
    """JSON with objects one key a line and lists of numbers on one line."""
    pad = "  " * (indent + 1)
    if isinstance(obj, dict):
        if not obj:
            return "{}"
        items = [f"{pad}{json.dumps(k)}: {_json(v, indent + 1)}" for k, v in obj.items()]
        return "{\n" + ",\n".join(items) + "\n" + "  " * indent + "}"
    if isinstance(obj, float):
        return json.dumps(round(obj, 12))
    if isinstance(obj, list):
        return "[" + ", ".join(_json(v, indent) for v in obj) + "]"
    return json.dumps(obj)


def _truth(A: np.ndarray, xs: np.ndarray, label: str, time_unit: str) -> dict[str, Any]:
    lam = eigvals(A)
    return {
        "matrix": A.tolist(),
        "equilibrium": xs.tolist(),
        "eigenvalues": [[float(z.real), float(z.imag)] for z in lam],
        "trace": float(np.trace(A)),
        "determinant": float(np.linalg.det(A)),
        "class": label,
        "rate_unit": f"1/{time_unit}",
    }


# ----------------------------------------------------------------------------------
# 1. thermal chamber: stable node with two well-separated time constants
# ----------------------------------------------------------------------------------
def chamber() -> dict[str, Any]:
    """Air and wall temperature of a thermal chamber after its heater is switched off.

    Deviations from the set point in K; the chamber relaxes toward an ambient-driven
    equilibrium below the set point.  Eigenvalues -0.5 and -0.05 per s.
    """
    A = np.array([[-0.35, 0.30], [0.15, -0.20]])
    xs = np.array([-4.0, -3.5])
    x0 = np.array([8.0, 3.0])
    Q = np.diag([2e-3, 5e-4])  # K^2 / s
    sd = np.array([0.10, 0.06])  # K
    times = np.arange(300) * 0.5  # s, uniform
    state = simulate(A, xs, x0, times, process_noise=Q, seed=101).values
    rng = np.random.default_rng(102)
    meas = state + rng.standard_normal(state.shape) * sd

    keep = ~((times >= 40.0) & (times < 50.0))  # logger dropout: 20 samples missing
    t, y, x_true = times[keep], meas[keep].copy(), state[keep]
    spike = int(np.flatnonzero(t == 90.0)[0])
    y[spike, 0] += 5.0  # one outlier spike on the air channel
    rep = int(np.flatnonzero(t == 120.0)[0])
    second = x_true[rep] + rng.standard_normal(2) * sd  # a second reading, same time

    t_cells = _fmt(t, 1)
    air, wall = _fmt(y[:, 0], 3), _fmt(y[:, 1], 3)
    rows = [[t_cells[i], air[i], wall[i]] for i in range(t.size)]
    rows.insert(rep + 1, [t_cells[rep], *_fmt(second, 3)])
    frame = pd.DataFrame(rows, columns=["time [s]", "air [K]", "wall [K]"])
    write_csv(frame, HERE / "chamber_cooling.csv")

    line = 2  # data row i (0-based) is on line i + 2 (line 1 is the header)
    return {
        "file": "chamber_cooling.csv",
        "truth": _truth(A, xs, "stable node", "s"),
        "noise": {"process_Q": Q.tolist(), "measurement_sd": sd.tolist()},
        "x0": x0.tolist(),
        "input_rows": len(rows),
        "kept_rows": len(rows) - 1,
        "dropped_rows": 0,
        "dropped": {},
        "merged_rows": 1,
        "merged_lines": [rep + 1 + line],
        "repeated_timestamp_lines": [rep + line, rep + 1 + line],
        "outliers": 1,
        "outlier_lines": [spike + line],
        "samples": len(rows) - 1,
        "trajectories": 1,
        "gaps": 1,
        "gap": {"after_time": 39.5, "resumes_at": 50.0, "missing_samples": int((~keep).sum())},
        "unsorted_lines": [],
        "channels": ["air", "wall"],
        "units": ["K", "K"],
        "time_unit": "s",
        "sampling": "uniform, step 0.5 s",
    }


# ----------------------------------------------------------------------------------
# 2. torsion bench rig: stable spiral, five runs at irregular times
# ----------------------------------------------------------------------------------
def torsion_rig() -> dict[str, Any]:
    """Angle and angular rate of a damped torsion bench, released five times.

    d(angle)/dt = rate, d(rate)/dt = -omega_n^2 (angle - angle*) - 2 zeta omega_n rate
    with omega_n = 2 rad/s and zeta = 0.1: eigenvalues -0.2 +- 1.98997i per s.
    """
    wn, zeta = 2.0, 0.1
    A = np.array([[0.0, 1.0], [-(wn**2), -2.0 * zeta * wn]])
    xs = np.array([0.05, 0.0])  # rest angle offset by a spring preload
    x0 = np.array([[0.45, 0.0], [-0.35, 0.3], [0.30, -0.6], [-0.50, -0.2], [0.20, 0.8]])
    Q = np.array([[0.0, 0.0], [0.0, 2e-3]])  # torque noise only, (rad/s)^2 / s
    sd = np.array([0.01, 0.03])  # rad, rad/s
    rng = np.random.default_rng(201)
    n_per_run = 50
    times = [
        np.round(np.concatenate([[0.0], np.cumsum(rng.uniform(0.2, 0.4, n_per_run - 1))]), 2)
        for _ in range(len(x0))
    ]
    rec = simulate(
        A, xs, x0, times, process_noise=Q, measurement_noise=sd, seed=202, trajectories=5
    )
    run = np.array(rec.trajectory_names)[rec.trajectory]
    rows = [
        [run[i], f"{rec.times[i]:.2f}", f"{rec.values[i, 0]:.4f}", f"{rec.values[i, 1]:.4f}"]
        for i in range(rec.n_samples)
    ]
    # a few rows out of time order (adjacent pairs swapped within runs 2, 3 and 5)
    swapped = [n_per_run + 10, 2 * n_per_run + 25, 4 * n_per_run + 40]
    for i in swapped:
        rows[i], rows[i + 1] = rows[i + 1], rows[i]
    frame = pd.DataFrame(rows, columns=["run", "time [s]", "angle [rad]", "rate [rad/s]"])
    write_csv(frame, HERE / "torsion_rig.csv")

    line = 2
    return {
        "file": "torsion_rig.csv",
        "truth": _truth(A, xs, "stable spiral", "s"),
        "noise": {"process_Q": Q.tolist(), "measurement_sd": sd.tolist()},
        "x0": x0.tolist(),
        "input_rows": len(rows),
        "kept_rows": len(rows),
        "dropped_rows": 0,
        "dropped": {},
        "merged_rows": 0,
        "outliers": 0,
        "outlier_lines": [],
        "samples": len(rows),
        "trajectories": 5,
        "trajectory_names": ["1", "2", "3", "4", "5"],
        "samples_per_trajectory": n_per_run,
        "gaps": 0,
        "unsorted_lines": [[i + line, i + 1 + line] for i in swapped],
        "channels": ["angle", "rate"],
        "units": ["rad", "rad/s"],
        "time_unit": "s",
        "sampling": "irregular, steps 0.2-0.4 s (times rounded to 0.01 s)",
    }


# ----------------------------------------------------------------------------------
# 3. reactor near an unstable operating point: saddle, decimal-comma export
# ----------------------------------------------------------------------------------
def reactor() -> dict[str, Any]:
    """Temperature and concentration of a stirred reactor near an unstable set point.

    Deviations from the nominal recipe point; the operating point is a saddle
    (eigenvalues 0.1 and -0.4 per min), so the record runs away slowly.
    """
    A = np.array([[0.2, 1.5], [-0.04, -0.5]])
    xs = np.array([2.0, -0.10])
    x0 = xs + np.array([-1.0, 0.5])
    Q = np.diag([5e-4, 2e-6])  # K^2/min, (mol/L)^2/min
    sd = np.array([0.05, 0.004])  # K, mol/L
    times = np.arange(200) * 0.2  # min, uniform
    rec = simulate(A, xs, x0, times, process_noise=Q, measurement_noise=sd, seed=301)

    def comma(v: float, digits: int) -> str:
        return f"{v:.{digits}f}".replace(".", ",")

    rows = [
        [comma(rec.times[i], 1), comma(rec.values[i, 0], 3), comma(rec.values[i, 1], 4)]
        for i in range(rec.n_samples)
    ]
    bad_text, empty, dup = 57, 120, 150
    rows[bad_text][2] = "ERR"  # a non-numeric cell (sensor fault code)
    rows[empty][1] = ""  # a missing cell
    rows.insert(dup + 1, list(rows[dup]))  # the exporter wrote one line twice
    comments = [
        "stirred reactor, pilot run 7: deviations from the nominal recipe point",
        "logger export; decimal comma, ';' separated",
        "invented demo data for fitdyn",
    ]
    frame = pd.DataFrame(rows, columns=["time [min]", "temperature [K]", "concentration [mol/L]"])
    write_csv(frame, HERE / "reactor_runaway.csv", sep=";", comments=comments)

    line = len(comments) + 2  # comments, then the header, then data
    return {
        "file": "reactor_runaway.csv",
        "truth": _truth(A, xs, "saddle", "min"),
        "noise": {"process_Q": Q.tolist(), "measurement_sd": sd.tolist()},
        "x0": x0.tolist(),
        "comment_lines": len(comments),
        "separator": ";",
        "decimal": ",",
        "input_rows": len(rows),
        "kept_rows": len(rows) - 3,
        "dropped_rows": 3,
        "dropped": {"non-numeric value": 1, "missing value": 1, "duplicate row": 1},
        "dropped_lines": {
            "non-numeric value": [bad_text + line],
            "missing value": [empty + line],
            "duplicate row": [dup + 1 + line],
        },
        "merged_rows": 0,
        "outliers": 0,
        "outlier_lines": [],
        "samples": len(rows) - 3,
        "trajectories": 1,
        "gaps": 0,
        "double_steps_after_times": [
            round(float(times[bad_text - 1]), 1),
            round(float(times[empty - 1]), 1),
        ],
        "unsorted_lines": [],
        "channels": ["temperature", "concentration"],
        "units": ["K", "mol/L"],
        "time_unit": "min",
        "sampling": "uniform, step 0.2 min (two single samples lost to bad cells)",
    }


def main() -> None:
    facts = {"schema": "fitdyn-demo/1", "line_numbers": "1-based file lines", "files": {}}
    for make in (chamber, torsion_rig, reactor):
        info = make()
        facts["files"][info.pop("file")] = info
    write_text(HERE / "expected.json", _json(facts) + "\n")
    for name, info in facts["files"].items():
        print(f"{name:22s} {info['truth']['class']:14s} rows {info['input_rows']}")


if __name__ == "__main__":
    main()
