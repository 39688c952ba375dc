"""Tests of fitdyn.plan: planning the next experiment by simulation."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

import fitdyn
from fitdyn.cli import main
from fitdyn.errors import InputError
from fitdyn.plan import Design, mc_se, plan

# A stable node whose slow mode (-0.08) is close enough to zero that a short record
# cannot settle its stability under process noise, and a long one can.
SLOW = [[-0.3, 0.2], [0.05, -0.12]]
SMALL = dict(simulations=20, draws=100, rechecks=1, stage_size=20, quiet=True)
# the one-step fit keeps these tests fast; test_auto_* runs what fit does by default
FAST = dict(SMALL, method="discrete")


def _given(**kw):
    base = dict(
        matrix=SLOW,
        x0=[1.0, -0.5],
        step=0.5,
        duration=20.0,
        process_noise=0.01,
        steps=[0.5],
        runs=[1],
        amplitudes=[1.0],
    )
    base.update(FAST)
    base.update(kw)
    return plan(**base)


def test_mc_se_matches_the_binomial_standard_deviation():
    # SE of a proportion = sd of Binomial(n, p) / n (scipy.stats.binom; common practice)
    from scipy.stats import binom

    for p, n in [(0.8, 60), (0.5, 24), (0.05, 200), (1.0, 30), (0.0, 30)]:
        assert mc_se(p, n) == pytest.approx(binom.std(n, p) / n, abs=1e-15)
    assert math.isnan(mc_se(0.5, 0))


def test_every_probability_carries_its_binomial_se():
    res = _given(durations=[10.0, 40.0], seed=1)
    for r in res.rows:
        assert r.n >= 20
        assert r.se == pytest.approx(math.sqrt(r.p * (1 - r.p) / r.n))


def test_longer_record_is_never_predicted_worse_beyond_monte_carlo_error():
    durations = [5.0, 10.0, 20.0, 40.0, 80.0, 160.0, 320.0]
    # intervals "auto": the one-step fit is a regression, so each experiment is bootstrapped
    res = _given(durations=durations, prune=False, seed=7, simulations=40, intervals="auto")
    assert all(r.uncertainty == "bootstrap" for r in res.rows)
    rows = sorted((r for r in res.rows if r.status == "ok"), key=lambda r: r.design.duration)
    assert len(rows) == len(durations)
    for a, b in zip(rows, rows[1:], strict=False):
        slack = 2.5 * math.sqrt(a.se**2 + b.se**2) + 1e-12
        assert b.p >= a.p - slack, (a.design, a.p, b.design, b.p)
    # and the grid spans the answer: short records fail, long ones succeed
    assert rows[0].p < 0.5 < rows[-1].p


def test_longer_record_is_not_worse_for_the_width_target():
    res = _given(
        durations=[10.0, 40.0, 160.0],
        prune=False,
        seed=3,
        target="width",
        width=0.1,
        intervals="spread",
    )
    assert all(r.uncertainty == "spread" for r in res.rows)
    rows = sorted((r for r in res.rows if r.status == "ok"), key=lambda r: r.design.duration)
    widths = [r.median_width for r in rows]
    assert widths[0] > widths[1] > widths[2]
    for a, b in zip(rows, rows[1:], strict=False):
        assert b.p >= a.p - 2.5 * math.sqrt(a.se**2 + b.se**2) - 1e-12


def _ivp_recording(t_end: float, seed: int):
    """A stable spiral integrated by scipy.integrate.solve_ivp (not fitdyn's simulator),
    three runs, with measurement noise."""
    from scipy.integrate import solve_ivp

    A = np.array([[-0.4, 1.0], [-1.0, -0.4]])
    rng = np.random.default_rng(seed)
    t = np.arange(0, t_end, 0.1)
    rows = []
    for k, x0 in enumerate([(2.0, 0.0), (0.0, 2.0), (-1.5, 1.5)]):
        sol = solve_ivp(lambda _t, x: A @ x, (0, t[-1]), x0, t_eval=t, rtol=1e-10, atol=1e-12)
        y = sol.y.T + rng.normal(0, 0.02, sol.y.T.shape)
        rows.append((np.full(t.size, k), t, y))
    import pandas as pd

    return pd.DataFrame(
        {
            "run": np.concatenate([r[0] for r in rows]),
            "time": np.concatenate([r[1] for r in rows]),
            "a": np.concatenate([r[2][:, 0] for r in rows]),
            "b": np.concatenate([r[2][:, 1] for r in rows]),
        }
    )


def test_a_target_already_met_by_the_current_data_is_reported_as_met():
    frame = _ivp_recording(12.0, seed=2)
    fit = fitdyn.fit(frame, method="discrete", trajectory="run", bootstrap=200, seed=1, quiet=True)
    assert fit.uncertainty.p_stable > 0.99  # a clear stable spiral
    kw = dict(steps=[0.2], durations=[6.0], runs=[3], amplitudes=[1.0], seed=4, **FAST)
    res = plan(fit, target="stability", **kw)
    assert res.met_now is True
    assert "already reach the target" in res.summary()
    # an impossibly narrow width is not met by the same data
    res2 = plan(fit, target="width", width=1e-9, **kw)
    assert res2.met_now is False
    assert res2.chosen is None


def test_plan_from_json_equals_plan_from_the_fit(tmp_path):
    from fitdyn.simulate import simulate, write_csv

    rec = simulate(SLOW, [1.0, 2.0], [2.0, 1.0], np.arange(0, 40, 0.5), process_noise=0.01, seed=5)
    src = tmp_path / "run.csv"
    write_csv(rec, src)
    fit = fitdyn.fit(src, quiet=True, seed=2)  # a recorded seed: the same replicates again
    out = tmp_path / "fit.json"
    fit.to_json(out)
    kw = dict(durations=[20.0, 80.0], steps=[0.5], runs=[1, 2], amplitudes=[1.0], seed=11, **SMALL)
    a = plan(fit, **kw).to_dict()
    b = plan(out, **kw).to_dict()
    assert a == b
    # the JSON without its recording: a one-line error naming the fix
    moved = tmp_path / "elsewhere.json"
    d = json.loads(out.read_text())
    d["source"] = str(tmp_path / "missing.csv")
    moved.write_text(json.dumps(d))
    with pytest.raises(InputError, match="--data"):
        plan(moved, **kw)
    assert plan(moved, data=src, **kw).to_dict()["designs"] == a["designs"]


def test_same_seed_same_plan_and_outputs_written(tmp_path):
    kw = dict(durations=[10.0, 40.0], seed=21)
    a = _given(**kw)
    b = _given(**kw)
    assert a.to_dict() == b.to_dict()
    c = _given(durations=[10.0, 40.0], seed=22)
    assert [r.p for r in c.rows] != [r.p for r in a.rows] or c.to_dict() != a.to_dict()
    a.plot(tmp_path / "p.png")
    a.write_table(tmp_path / "t.md")
    a.to_json(tmp_path / "p.json")
    assert (tmp_path / "p.png").read_bytes()[:4] == b"\x89PNG"
    assert (tmp_path / "t.md").read_text().startswith("| step |")
    assert json.loads((tmp_path / "p.json").read_text())["schema"] == "fitdyn-plan/1"
    assert not list(tmp_path.glob(".*.tmp"))  # atomic writes leave no temporaries


def test_chosen_is_the_cheapest_design_reaching_the_target():
    res = _given(durations=[5.0, 20.0, 80.0], runs=[1, 2], prune=False, seed=9)
    ok = [r for r in res.rows if r.status == "ok" and r.p >= res.probability]
    if ok:
        best = min(r.design.cost("samples") for r in ok)
        assert res.rows[res.chosen].design.cost("samples") == best
    else:
        assert res.chosen is None
    costs = [r.design.cost("samples") for r in res.rows]
    assert costs == sorted(costs)


def test_drawn_systems_recheck_reports_its_own_probability():
    frame = _ivp_recording(8.0, seed=3)
    fit = fitdyn.fit(frame, method="discrete", trajectory="run", bootstrap=100, seed=2, quiet=True)
    res = plan(
        fit,
        target="stability",
        steps=[0.2],
        durations=[4.0, 8.0],
        runs=[3],
        amplitudes=[1.0],
        seed=5,
        **SMALL,
    )
    assert res.basis.systems is not None and res.basis.systems.shape[0] > 50
    checked = [r for r in res.rows if r.n_drawn]
    assert checked and all(0 <= r.p_drawn <= 1 for r in checked)
    assert all(r.se_drawn == pytest.approx(mc_se(r.p_drawn, r.n_drawn)) for r in checked)


def test_auto_chooses_per_family_and_counts_the_budget():
    # what fit does by default (auto), on a tiny grid; the budget stops iterative fits
    res = _given(durations=[10.0, 20.0], seed=4, method="auto", budget=0)
    for r in res.rows:
        assert r.estimator != "-"
        if r.status != "ok":  # an iterative estimator over the zero budget
            assert "budget" in r.status
    assert any("budget" in n for n in res.notes)


def test_bootstrap_intervals_mode_runs_per_experiment():
    res = _given(durations=[40.0], seed=2, intervals="bootstrap", replicates=30, simulations=10)
    (row,) = res.rows
    assert row.n == 10 and row.status == "ok"
    assert 0 <= row.p <= 1


def test_design_cost_and_samples():
    d = Design(step=0.5, duration=10.0, runs=3, amplitude=2.0)
    assert d.samples_per_run == 21
    assert d.total_samples == 63
    assert d.cost("time") == 30.0
    assert d.times()[-1] == pytest.approx(10.0)


@pytest.mark.parametrize(
    "kw, match",
    [
        (dict(target="speed"), "target must be one of"),
        (dict(target="width"), "needs a width"),
        (dict(target="width", width="abc"), "percentage"),
        (dict(probability=1.5), "probability"),
        (dict(simulations=3), "simulations"),
        (dict(durations=[-1.0]), "durations"),
    ],
)
def test_bad_arguments_raise_one_line(kw, match):
    with pytest.raises(InputError, match=match) as info:
        _given(**kw)
    assert "\n" not in str(info.value)


@pytest.mark.parametrize(
    "argv",
    [
        ["plan", "--target", "width"],
        ["plan", "x.json", "--target", "stability", "0.1"],
        ["plan", "--matrix=-1,0;0,-2", "--x0", "1,1"],
        ["plan", "--matrix=-1,0;0,-2", "--x0", "1,1", "--step", "0.1", "--duration", "5"],
        ["plan", "missing.json"],
    ],
)
def test_cli_bad_options_exit_2_with_one_line(argv, capsys):
    assert main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("fitdyn: error:")
    assert len(err.splitlines()) == 1


def test_cli_plan_from_a_given_matrix(tmp_path, capsys):
    argv = [
        "plan",
        "--matrix=-0.3,0.2;0.05,-0.12",
        "--method",
        "discrete",
        "--x0",
        "1,-0.5",
        "--step",
        "0.5",
        "--duration",
        "20",
        "--process-noise",
        "0.01",
        "--steps",
        "0.5",
        "--runs",
        "1",
        "--amplitudes",
        "1",
        "--durations",
        "10,40",
        "--simulations",
        "20",
        "--seed",
        "1",
        "--table",
        str(tmp_path / "t.txt"),
        "--json",
        str(tmp_path / "p.json"),
    ]
    assert main(argv) == 0
    out = capsys.readouterr().out
    assert "fitdyn plan" in out and "Caution" in out
    d = json.loads((tmp_path / "p.json").read_text())
    assert len(d["designs"]) == 2
    assert (tmp_path / "t.txt").read_text().startswith("step")
