"""Tests of fit() and the Fit result."""

from __future__ import annotations

import json

import numpy as np
import pytest
import scipy.linalg

import fitdyn
from fitdyn.analysis import CAUTION, SCHEMA, Fit


def _noise_free(A, xs, x0, times, trajectories=1):
    return fitdyn.simulate(A, xs, x0, times, trajectories=trajectories, seed=0)


A_SPIRAL = np.array([[-0.2, -1.0], [1.0, -0.2]])
A_NODE = np.array([[-1.0, 0.3], [0.2, -0.4]])


def test_fit_recovers_noise_free_spiral_and_reports():
    rec = _noise_free(A_SPIRAL, [1.0, 2.0], [3.0, 0.0], np.linspace(0, 20, 401))
    res = fitdyn.fit(rec, method="trajectory", bootstrap=0)
    assert isinstance(res, Fit)
    np.testing.assert_allclose(res.matrix, A_SPIRAL, atol=1e-6)
    np.testing.assert_allclose(res.equilibrium, [1.0, 2.0], atol=1e-6)
    assert res.label == "stable spiral"
    assert res.stability == "asymptotically stable"
    # common practice, no source: decay rate -Re(lambda), period 2 pi / |Im lambda|
    assert res.period == pytest.approx(2 * np.pi / 1.0, rel=1e-6)
    assert res.time_constants == pytest.approx([5.0, 5.0], rel=1e-6)
    assert res.damping_ratio == pytest.approx(0.2 / np.hypot(0.2, 1.0), rel=1e-6)
    text = res.summary()
    assert "stable spiral" in text and "Caution" in text


def test_to_dict_layout_is_versioned_and_json_serialisable(tmp_path):
    rec = _noise_free(A_NODE, [0.5, -0.5], [2.0, 1.0], np.linspace(0, 10, 201))
    res = fitdyn.fit(rec, method="integral", bootstrap=0)
    d = res.to_dict()
    for key in (
        "schema",
        "method",
        "channels",
        "time_unit",
        "matrix",
        "equilibrium",
        "eigenvalues",
        "classification",
        "uncertainty",
        "cleaning",
        "warnings",
    ):
        assert key in d
    assert d["schema"] == SCHEMA == "fitdyn/1"
    assert d["uncertainty"] is None
    assert d["classification"]["label"] == "stable node"
    assert len(d["eigenvalues"]) == 2 and len(d["eigenvalues"][0]) == 2
    assert d["caution"] == CAUTION
    path = tmp_path / "out.json"
    res.to_json(path)
    back = json.loads(path.read_text())
    np.testing.assert_allclose(back["matrix"], d["matrix"])


def test_known_equilibrium_is_used():
    rec = _noise_free(A_NODE, [0.5, -0.5], [2.0, 1.0], np.linspace(0, 10, 201))
    res = fitdyn.fit(rec, method="integral", equilibrium=[0.5, -0.5], bootstrap=0)
    assert res.estimate.equilibrium_known
    np.testing.assert_allclose(res.equilibrium, [0.5, -0.5])
    assert "(given, not estimated)" in res.summary()


def test_fitted_curve_matches_matrix_exponential():
    # source: scipy.linalg.expm as the reference propagator
    times = np.linspace(0, 8, 161)
    rec = _noise_free(A_NODE, [0.5, -0.5], [2.0, 1.0], times)
    res = fitdyn.fit(rec, method="discrete", bootstrap=0)  # exact on noise-free uniform samples
    ref = np.array(
        [
            np.array([0.5, -0.5]) + scipy.linalg.expm(A_NODE * t) @ np.array([1.5, 1.5])
            for t in times
        ]
    )
    np.testing.assert_allclose(res.fitted(), ref, atol=1e-9)
    assert np.max(np.abs(res.residuals())) < 1e-9


def test_html_repr_escapes_user_strings():
    rec = _noise_free(A_NODE, [0.0, 0.0], [2.0, 1.0], np.linspace(0, 10, 101))
    import dataclasses

    rec = dataclasses.replace(rec, channels=("<b>x</b>", "y"), source="<script>s</script>")
    res = fitdyn.fit(rec, method="integral", bootstrap=0)
    page = res._repr_html_()
    assert "<script>s</script>" not in page and "&lt;script&gt;" in page


def test_bad_equilibrium_word_is_a_clear_error():
    rec = _noise_free(A_NODE, [0.0, 0.0], [2.0, 1.0], np.linspace(0, 10, 101))
    from fitdyn.errors import FitdynError

    with pytest.raises(FitdynError, match="equilibrium"):
        fitdyn.fit(rec, equilibrium="guess", bootstrap=0)


def test_data_along_one_eigenvector_give_a_clear_error():
    # a saddle started on its stable eigenvector: the samples lie on one line, so
    # only one direction of A is seen (common practice, no source)
    from fitdyn.errors import EstimationError

    A = np.array([[1.0, 1.0], [4.0, -2.0]])  # eigenvalues 2 and -3
    v = np.array([1.0, -4.0]) / np.sqrt(17.0)  # eigenvector of -3
    rec = _noise_free(A, [0.0, 0.0], 2 * v, np.linspace(0, 2, 81))
    with pytest.raises(EstimationError, match="collinear"):
        fitdyn.fit(rec, method="integral", bootstrap=0)


# ----------------------------------------------------------------------------------
# defaults, warnings and the short views (issue: honest verdicts by default)
# ----------------------------------------------------------------------------------
def _node_rec(noise=0.01):
    return fitdyn.simulate(
        A_NODE, [0.5, -0.5], [2.0, 1.0], np.linspace(0, 10, 201), measurement_noise=noise, seed=3
    )


def test_intervals_are_computed_by_default_with_the_calibrated_count():
    from fitdyn.analysis import CALIBRATED_REPLICATES, DEFAULT_REPLICATES

    res = fitdyn.fit(_node_rec(), method="integral", seed=1, quiet=True)
    assert res.uncertainty is not None
    assert res.uncertainty.replicates == DEFAULT_REPLICATES == 1000
    assert CALIBRATED_REPLICATES == 500
    assert not any("bootstrap replicates" in w for w in res.warnings)
    assert res.to_dict()["verdict"]["confidence"] == 0.95
    # the docstring states the default and where it comes from
    assert "Default 1000" in fitdyn.fit.__doc__ and "500" in fitdyn.fit.__doc__


def test_too_few_replicates_get_a_warning_and_zero_none():
    res = fitdyn.fit(_node_rec(), method="integral", bootstrap=100, seed=1, quiet=True)
    assert any("only 100 bootstrap replicates" in w and "500" in w for w in res.warnings)
    assert "only 100 bootstrap replicates" in res.summary()
    res0 = fitdyn.fit(_node_rec(), method="integral", bootstrap=0)
    assert res0.uncertainty is None
    assert not any("bootstrap replicates" in w for w in res0.warnings)
    v = res0.to_dict()["verdict"]
    assert v["confidence"] is None and v["candidates"] == [] and v["label"] == res0.label
    assert "stability not assessed" in res0.summary()


def test_summary_answers_first_and_shows_derived_intervals():
    res = fitdyn.fit(_node_rec(), method="integral", bootstrap=500, seed=1, quiet=True)
    lines = [ln for ln in res.summary().splitlines() if ln.strip()]
    assert lines[1].startswith("Verdict ")
    assert lines[2].startswith("Eigenvalues")
    assert lines[3].strip().startswith("lambda1") and "Re [" in lines[3]
    tc = next(ln for ln in lines if ln.strip().startswith("time constants"))
    assert tc.count("[") == 2  # both time constants carry their intervals
    # selection notes only with verbose
    quiet_text, loud = res.summary(), res.summary(verbose=True)
    assert "How the estimate was made" not in quiet_text
    assert "How the estimate was made" in loud
    for note in res.estimate.notes:
        assert note.split()[0] in loud
    # the point estimate is named
    assert "Point estimate   the fitted A (JSON 'matrix')" in quiet_text


def test_short_reprs():
    res = fitdyn.fit(_node_rec(), method="integral", bootstrap=0)
    for obj in (res, res.recording):
        r = repr(obj)
        assert "\n" not in r and len(r) < 200 and "array(" not in r
    assert repr(res).startswith("<Fit simulated: integral, stable node (point estimate)")
    assert repr(res.recording).startswith("<Recording simulated: x1, x2; 201 samples in 1 ")
