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
