"""Tests of the equilibrium classification in fitdyn.classify.

Check values come from textbook worked examples and handbook formulas (sources named
beside each, "from memory" where recalled rather than looked up) and from the rules
of the trade for the trace-determinant plane (common practice, no source).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from fitdyn import linalg2
from fitdyn.classify import (
    BOUNDARY,
    DEFAULT_RTOL,
    GENERIC,
    LABELS,
    STABILITY,
    classify,
    classify_codes,
    is_stable_label,
    stability_of,
)

ASYM, STABLE, UNSTABLE = STABILITY

# a fixed non-orthogonal basis, so that examples are not all diagonal
_V = np.array([[1.0, 0.3], [-0.4, 1.0]])


def _with_eigs(l1: float, l2: float) -> np.ndarray:
    return _V @ np.diag([l1, l2]) @ np.linalg.inv(_V)


def _with_pair(re: float, im: float) -> np.ndarray:
    return _V @ np.array([[re, -im], [im, re]]) @ np.linalg.inv(_V)


# one example per class: (matrix, label, stability); rules of the trade (common
# practice, no source), as in the trace-determinant table of ../shared/METHODS.md
EXAMPLES = [
    (_with_eigs(2.0, -3.0), "saddle", UNSTABLE),  # opposite signs
    (np.diag([-1.0, -3.0]), "stable node", ASYM),  # real, distinct, negative
    (_with_eigs(-0.5, -4.0), "stable node", ASYM),
    (_with_eigs(0.5, 4.0), "unstable node", UNSTABLE),  # real, distinct, positive
    (np.array([[-1.0, -2.0], [2.0, -1.0]]), "stable spiral", ASYM),  # -1 +- 2i
    (_with_pair(-0.1, 3.0), "stable spiral", ASYM),
    (_with_pair(0.3, 1.0), "unstable spiral", UNSTABLE),  # positive real part
    (np.array([[0.0, 1.0], [-4.0, 0.0]]), "center", STABLE),  # +- 2i
    (_with_pair(0.0, 0.7), "center", STABLE),
    (-2.0 * np.eye(2), "stable star", ASYM),  # A = lambda I
    (3.0 * np.eye(2), "unstable star", UNSTABLE),
    (np.array([[-1.0, 1.0], [0.0, -1.0]]), "stable degenerate node", ASYM),  # defective
    (np.array([[2.0, 0.0], [5.0, 2.0]]), "unstable degenerate node", UNSTABLE),
    (_V @ np.array([[-1.0, 1.0], [0.0, -1.0]]) @ np.linalg.inv(_V), "stable degenerate node", ASYM),
    # det 0: a line of equilibria; stability from the other eigenvalue (= trace)
    (np.diag([-1.0, 0.0]), "non-isolated equilibria", STABLE),
    (_with_eigs(0.0, -2.5), "non-isolated equilibria", STABLE),
    (np.diag([0.0, 1.5]), "non-isolated equilibria", UNSTABLE),
    (np.array([[1.0, 1.0], [1.0, 1.0]]), "non-isolated equilibria", UNSTABLE),  # eig 0, 2
    # zero matrix: every point fixed, none moves away: stable, not asymptotically
    (np.zeros((2, 2)), "non-isolated equilibria", STABLE),
    # nilpotent: x1 grows linearly in time: unstable
    (np.array([[0.0, 1.0], [0.0, 0.0]]), "non-isolated equilibria", UNSTABLE),
]


def _exact(A: np.ndarray) -> bool:
    """Whether A has integer entries (exact, so exact ties on a boundary hold)."""
    return bool(np.all(A == np.round(A)))


BOUNDARY_EXAMPLES = [(A, lab, stab) for A, lab, stab in EXAMPLES if lab in BOUNDARY]


def test_labels_are_the_trade_words():
    assert LABELS == (
        "saddle",
        "stable node",
        "unstable node",
        "stable spiral",
        "unstable spiral",
        "center",
        "stable star",
        "unstable star",
        "stable degenerate node",
        "unstable degenerate node",
        "non-isolated equilibria",
    )
    assert GENERIC + BOUNDARY == LABELS
    assert set(GENERIC) == {
        "saddle",
        "stable node",
        "unstable node",
        "stable spiral",
        "unstable spiral",
    }
    assert STABILITY == ("asymptotically stable", "stable (not asymptotically)", "unstable")
    assert DEFAULT_RTOL == 1e-6


def test_strogatz_worked_example():
    # Strogatz, Nonlinear Dynamics and Chaos, 2nd ed., example 5.2.1 (from memory):
    # x' = x + y, y' = 4x - 2y has eigenvalues 2 and -3: a saddle
    A = np.array([[1.0, 1.0], [4.0, -2.0]])
    np.testing.assert_allclose(linalg2.eigvals(A), [2.0, -3.0], rtol=1e-15)
    assert classify(A) == ("saddle", "unstable")


@pytest.mark.parametrize(("A", "label", "stability"), EXAMPLES)
def test_rules_of_the_trade(A, label, stability):
    assert classify(A) == (label, stability)
    if label in GENERIC or _exact(A):
        # rtol = 0: exact ties still count (examples built through _V are rounded)
        assert classify(A, rtol=0.0) == (label, stability)
    if label != "non-isolated equilibria":
        assert stability_of(label) == stability
        assert is_stable_label(label) == (stability == ASYM)


def test_every_label_has_an_example():
    assert {lab for _, lab, _ in EXAMPLES} == set(LABELS)


def test_stability_of_every_label():
    assert stability_of("non-isolated equilibria") is None
    assert not is_stable_label("non-isolated equilibria")
    assert stability_of("center") == STABLE
    assert stability_of("saddle") == UNSTABLE
    for lab in LABELS:
        if lab.startswith("stable "):
            assert stability_of(lab) == ASYM and is_stable_label(lab)
        if lab.startswith("unstable "):
            assert stability_of(lab) == UNSTABLE and not is_stable_label(lab)


def test_return_types():
    label, stab = classify([[1.0, 1.0], [4.0, -2.0]])  # nested lists accepted
    assert type(label) is str and type(stab) is str
    A = np.stack([e[0] for e in EXAMPLES[:6]]).reshape(2, 3, 2, 2)
    labels, stabs = classify(A)
    assert labels.shape == stabs.shape == (2, 3) and labels.dtype == object
    codes, scodes = classify_codes(A)
    assert codes.shape == (2, 3) and codes.dtype == np.int8 and scodes.dtype == np.int8
    np.testing.assert_array_equal(np.asarray(LABELS, dtype=object)[codes], labels)
    np.testing.assert_array_equal(np.asarray(STABILITY, dtype=object)[scodes], stabs)


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_non_finite_input_is_refused(bad):
    A = np.stack([np.eye(2), np.array([[bad, 0.0], [0.0, 1.0]]), -np.eye(2)])
    with pytest.raises(ValueError, match="1 of 3 matrices"):
        classify(A)
    with pytest.raises(ValueError, match="NaN or infinite"):
        classify_codes(A[1])


def test_rejects_non_2x2():
    with pytest.raises(ValueError):
        classify(np.eye(3))


# ---------------------------------------------------------------- tolerance


@pytest.mark.parametrize(
    ("A", "label", "stability"),
    # not the zero and nilpotent matrices: see test_perturbed_nilpotent_is_not_flat
    [e for e in BOUNDARY_EXAMPLES if np.any(linalg2.eigvals(e[0]) != 0)],
)
def test_tiny_perturbations_stay_on_the_boundary(A, label, stability):
    # noise-free-ish data: perturbations of relative size 1e-12 keep the boundary class
    # with the default tolerance ...
    rng = np.random.default_rng(20)
    size = 1e-12 * np.max(np.abs(linalg2.eigvals(A)))
    B = A + size * rng.standard_normal((300, 2, 2))
    labels, stabs = classify(B)
    assert np.all(labels == label)
    assert np.all(stabs == stability)
    # ... and rtol = 0 gives generic classes only
    labels0, _ = classify(B, rtol=0.0)
    assert set(labels0) <= set(GENERIC)


def test_perturbed_nilpotent_is_not_flat():
    # documented limitation: [[0, 1], [-e, 0]] has eigenvalues +- i sqrt(e), which
    # are not small against max |lambda| = sqrt(e): a center, not a line of equilibria
    assert classify([[0.0, 1.0], [-1e-12, 0.0]])[0] == "center"
    assert classify([[0.0, 1.0], [1e-12, 0.0]])[0] == "saddle"
    # the exactly singular ones do land there
    assert classify([[0.0, 1.0], [0.0, 0.0]])[0] == "non-isolated equilibria"
    assert classify([[0.0, 0.0], [0.0, 0.0]])[0] == "non-isolated equilibria"


@pytest.mark.parametrize(
    ("A", "expected"),
    [
        # center, trace moved by +-1e-3
        (np.array([[1e-3, 1.0], [-1.0, 0.0]]), "unstable spiral"),
        (np.array([[0.0, 1.0], [-1.0, -1e-3]]), "stable spiral"),
        # degenerate node, defective pair split by a 1e-3 entry
        (np.array([[-1.0, 1.0], [1e-3, -1.0]]), "stable node"),
        (np.array([[-1.0, 1.0], [-1e-3, -1.0]]), "stable spiral"),
        (np.array([[1.0, 1.0], [-1e-3, 1.0]]), "unstable spiral"),
        # non-isolated, zero eigenvalue moved by +-1e-3
        (np.diag([-1.0, 1e-3]), "saddle"),
        (np.diag([-1.0, -1e-3]), "stable node"),
        (np.diag([1.0, 1e-3]), "unstable node"),
        # star: the repeated-eigenvalue test allows a gap of sqrt(rtol) * rho (0.1 %
        # with the default), so a star must be split by more than that
        (np.diag([-1.0, -1.01]), "stable node"),
        (np.array([[-1.0, 1e-2], [-1e-2, -1.0]]), "stable spiral"),
        (np.array([[2.0, 3e-2], [0.0, 2.02]]), "unstable node"),
    ],
)
def test_larger_perturbations_leave_the_boundary(A, expected):
    assert classify(A)[0] == expected


def test_repeated_eigenvalue_window_is_sqrt_rtol():
    # documented design: eigenvalues closer than sqrt(rtol) * rho count as repeated
    assert classify(np.diag([-1.0, -1.0 - 1e-4]))[0] == "stable star"
    assert classify(np.diag([-1.0, -1.0 - 2e-3]))[0] == "stable node"
    assert classify(np.diag([-1.0, -1.0 - 1e-4]), rtol=1e-10)[0] == "stable node"
    # a defective pair with a small nilpotent part: star within sqrt(rtol) * rho
    assert classify([[-1.0, 1e-4], [0.0, -1.0]])[0] == "stable star"
    assert classify([[-1.0, 1e-2], [0.0, -1.0]])[0] == "stable degenerate node"


def test_random_perturbations_of_size_1e_minus_3_leave_the_boundary():
    # perturbations of relative size 1e-3 in random directions; the quantity that
    # defines each boundary (trace, det, disc over rho) moves by ~1e-3 (rho^2) unless the
    # direction happens to be nearly tangent to the boundary, so draws where it moved
    # by less than 10 rtol are set aside (and must be few)
    rng = np.random.default_rng(21)
    cases = [
        (np.array([[0.0, 1.0], [-1.0, 0.0]]), 0),  # center: trace
        (np.diag([-1.0, 0.0]), 1),  # non-isolated: det
        (np.array([[-1.0, 1.0], [0.0, -1.0]]), 2),  # degenerate node: disc
    ]
    for A, which in cases:
        B = A + 1e-3 * rng.standard_normal((500, 2, 2))
        inv = linalg2.invariants(B)[which]
        rho = np.max(np.abs(linalg2.eigvals(B)), axis=-1)
        moved = np.abs(inv) > 10 * DEFAULT_RTOL * rho ** (1 if which == 0 else 2)
        assert moved.mean() > 0.95
        labels, _ = classify(B[moved])
        assert set(labels) <= set(GENERIC)


def test_rtol_zero_gives_generic_classes():
    rng = np.random.default_rng(22)
    A = rng.standard_normal((20000, 2, 2))
    labels, _ = classify(A, rtol=0.0)
    assert set(labels) == set(GENERIC)  # all five appear, nothing else
    # the default tolerance changes nothing for generic random matrices
    np.testing.assert_array_equal(classify(A)[0], labels)


def test_generic_stability_matches_eigenvalues():
    # rule of the trade: asymptotically stable iff every eigenvalue has negative real
    # part (common practice, no source)
    rng = np.random.default_rng(23)
    A = rng.standard_normal((5000, 2, 2))
    _, stabs = classify(A)
    neg = np.linalg.eigvals(A).real.max(axis=-1) < 0  # reference: numpy.linalg.eigvals
    np.testing.assert_array_equal(stabs == ASYM, neg)
    np.testing.assert_array_equal(stabs == UNSTABLE, ~neg)


def test_batched_equals_elementwise():
    rng = np.random.default_rng(24)
    mats = [e[0] for e in EXAMPLES]
    mats += [e[0] + 1e-12 * rng.standard_normal((2, 2)) for e in BOUNDARY_EXAMPLES if e[0].any()]
    mats += list(rng.standard_normal((60, 2, 2)))
    mats = mats[:84]
    A = np.stack(mats).reshape(4, 3, 7, 2, 2)
    for rtol in (DEFAULT_RTOL, 0.0, 1e-3):
        labels, stabs = classify(A, rtol)
        for idx in np.ndindex(4, 3, 7):
            assert (labels[idx], stabs[idx]) == classify(A[idx], rtol)


@pytest.mark.parametrize("c", [1e-6, 1e-3, 0.37, 3.0, 1e3, 1e6])
def test_time_scale_invariance(c):
    # classify(c A) == classify(A) for c > 0 (a change of time unit)
    rng = np.random.default_rng(25)
    A = np.concatenate(
        [
            np.stack([e[0] for e in EXAMPLES]),
            np.stack([e[0] + 1e-12 * rng.standard_normal((2, 2)) for e in BOUNDARY_EXAMPLES]),
            rng.standard_normal((500, 2, 2)),
        ]
    )
    la, sa = classify(A)
    lc, sc = classify(c * A)
    np.testing.assert_array_equal(lc, la)
    np.testing.assert_array_equal(sc, sa)
    # rtol = 0 on the generic ones (on a boundary, rounding of c A decides)
    generic = np.isin(la, GENERIC)
    np.testing.assert_array_equal(classify(c * A[generic], 0.0)[0], la[generic])


@pytest.mark.parametrize("D", [np.diag([1e3, 1.0]), np.diag([1.0, 1e-4]), np.diag([-2.0, 5.0])])
def test_channel_units_invariance(D):
    # rescaling a channel (D A D^-1): the label depends on the eigenvalues only, except
    # star versus degenerate node, so every other class is kept
    rng = np.random.default_rng(26)
    keep = [e for e in EXAMPLES if "degenerate" not in e[1]]
    A = np.concatenate(
        [
            np.stack([e[0] for e in keep]),
            np.stack(
                [
                    e[0] + 1e-12 * rng.standard_normal((2, 2))
                    for e in BOUNDARY_EXAMPLES
                    if "degenerate" not in e[1] and e[0].any()
                ]
            ),
            rng.standard_normal((500, 2, 2)),
        ]
    )
    B = D @ A @ np.linalg.inv(D)
    la, sa = classify(A)
    lb, sb = classify(B)
    np.testing.assert_array_equal(lb, la)
    np.testing.assert_array_equal(sb, sa)


def test_time_reversal():
    # dx/dt = -A x runs every trajectory backwards: stable <-> unstable, saddles and
    # centers stay (common practice, no source)
    swap = {"saddle": "saddle", "center": "center"}
    for kind in ("node", "spiral", "star", "degenerate node"):
        swap[f"stable {kind}"] = f"unstable {kind}"
        swap[f"unstable {kind}"] = f"stable {kind}"
    for A, label, _ in EXAMPLES:
        if label in swap:
            assert classify(-A)[0] == swap[label]


# ---------------------------------------------------------------- handbook formulas


def _rlc(R: float, L: float, C: float) -> np.ndarray:
    # series RLC natural response, state (q, i): q' = i, L i' = -R i - q / C
    return np.array([[0.0, 1.0], [-1.0 / (L * C), -R / L]])


@pytest.mark.parametrize(
    ("R", "label"),
    [
        (100.0, "stable node"),  # overdamped: alpha > omega0
        (10.0, "stable spiral"),  # underdamped
        (2.0 * np.sqrt(0.5 / 2e-3), "stable degenerate node"),  # critically damped
        (0.0, "center"),  # lossless LC circuit
    ],
)
def test_series_rlc(R, label):
    # alpha = R / (2L), omega0 = 1 / sqrt(LC), eigenvalues
    # -alpha +- sqrt(alpha^2 - omega0^2) (Nilsson & Riedel, Electric Circuits, from memory)
    L, C = 0.5, 2e-3
    A = _rlc(R, L, C)
    alpha, omega0 = R / (2 * L), 1 / np.sqrt(L * C)
    root = np.sqrt(complex(alpha**2 - omega0**2))
    expected = linalg2.sort_eigenvalues(np.array([-alpha + root, -alpha - root]))
    # a repeated root moves by sqrt(rounding of the entries): 1e-8 relative
    rtol = 1e-7 if label == "stable degenerate node" else 1e-14
    np.testing.assert_allclose(linalg2.eigvals(A), expected, rtol=rtol, atol=1e-14 * omega0)
    assert classify(A) == (label, STABLE if R == 0 else ASYM)


def test_series_rlc_underdamped_decay_and_period():
    # R = 10, L = 0.5, C = 2e-3: alpha = 10 1/s, omega_d = sqrt(1000 - 100) = 30 rad/s;
    # the envelope decays at -Re(lambda) = alpha, the period is 2 pi / |Im lambda|
    # (Nilsson & Riedel, from memory; rules of the trade in METHODS.md)
    lam = linalg2.eigvals(_rlc(10.0, 0.5, 2e-3))
    np.testing.assert_allclose(-lam[0].real, 10.0, rtol=1e-14)
    np.testing.assert_allclose(2 * np.pi / abs(lam[0].imag), 2 * np.pi / 30.0, rtol=1e-14)


def _msd(m: float, c: float, k: float) -> np.ndarray:
    # mass-spring-damper m x'' + c x' + k x = 0, state (x, v)
    return np.array([[0.0, 1.0], [-k / m, -c / m]])


@pytest.mark.parametrize(
    ("zeta", "label", "stability"),
    [
        (0.0, "center", STABLE),  # undamped
        (0.2, "stable spiral", ASYM),  # underdamped, zeta < 1
        (0.9, "stable spiral", ASYM),
        (1.0, "stable degenerate node", ASYM),  # critically damped
        (2.0, "stable node", ASYM),  # overdamped
        (-0.2, "unstable spiral", UNSTABLE),  # negative damping (energy fed in)
    ],
)
def test_mass_spring_damper(zeta, label, stability):
    # omega_n = sqrt(k / m), zeta = c / (2 sqrt(k m)); eigenvalues
    # -zeta omega_n +- omega_n sqrt(zeta^2 - 1) (Ogata, Modern Control Engineering,
    # from memory)
    m, k = 2.0, 50.0
    wn = np.sqrt(k / m)
    c = zeta * 2.0 * np.sqrt(k * m)
    A = _msd(m, c, k)
    root = wn * np.sqrt(complex(zeta**2 - 1))
    expected = linalg2.sort_eigenvalues(np.array([-zeta * wn + root, -zeta * wn - root]))
    np.testing.assert_allclose(linalg2.eigvals(A), expected, rtol=1e-7, atol=1e-12)
    assert classify(A) == (label, stability)
    if 0 < zeta < 1:
        # damping ratio back from the eigenvalue: zeta = -Re(lambda) / |lambda|
        lam = linalg2.eigvals(A)[0]
        np.testing.assert_allclose(-lam.real / abs(lam), zeta, rtol=1e-14)


def test_lotka_volterra_linearised_is_a_center():
    # x' = a x - b x y, y' = -c y + d x y linearised at (c/d, a/b):
    # J = [[0, -b c / d], [a d / b, 0]], eigenvalues +- i sqrt(a c)
    # (Murray, Mathematical Biology I, from memory)
    a, b, c, d = 1.2, 0.6, 0.8, 0.3
    J = np.array([[0.0, -b * c / d], [a * d / b, 0.0]])
    np.testing.assert_allclose(
        linalg2.eigvals(J), [1j * np.sqrt(a * c), -1j * np.sqrt(a * c)], rtol=1e-15
    )
    assert classify(J) == ("center", STABLE)


def test_two_compartment_pharmacokinetics_is_a_stable_node():
    # central/peripheral compartments: hybrid rates alpha + beta = k12 + k21 + k10 and
    # alpha beta = k21 k10 (Gibaldi & Perrier, Pharmacokinetics, 2nd ed., from memory)
    k10, k12, k21 = 0.3, 0.5, 0.2
    A = np.array([[-(k10 + k12), k21], [k12, -k21]])
    lam = linalg2.eigvals(A)
    np.testing.assert_allclose(-(lam[0] + lam[1]).real, k12 + k21 + k10, rtol=1e-15)
    np.testing.assert_allclose((lam[0] * lam[1]).real, k21 * k10, rtol=1e-14)
    assert classify(A) == ("stable node", ASYM)


def test_reversible_reaction_is_non_isolated():
    # A <=> B, first order: conservation of A + B makes det = 0; the other eigenvalue is
    # -(k_f + k_r), the relaxation rate (Atkins, Physical Chemistry, from memory)
    kf, kr = 0.7, 0.25
    A = np.array([[-kf, kr], [kf, -kr]])
    np.testing.assert_allclose(linalg2.eigvals(A), [0.0, -(kf + kr)], atol=1e-15)
    assert classify(A) == ("non-isolated equilibria", STABLE)
    # with a slow loss of both species the equilibrium becomes isolated
    assert classify(A - 1e-3 * np.eye(2)) == ("stable node", ASYM)


# ---------------------------------------------------------------- properties

_entries = arrays(
    np.float64, (2, 2), elements=st.floats(-10.0, 10.0, allow_nan=False, allow_infinity=False)
)


@settings(deadline=None, max_examples=200, derandomize=True)
@given(_entries, st.floats(1e-3, 1e3))
def test_property_scale_and_reversal(A, c):
    tau, det, disc = linalg2.invariants(A)
    rho = np.max(np.abs(linalg2.eigvals(A)))
    assume(rho == 0 or rho > 1e-100)  # rho^2 must not underflow
    # away from the tolerance edges, where rounding of c A may decide
    for edge in (abs(tau) / rho, abs(det) / rho**2, abs(disc) / rho**2) if rho > 0 else ():
        assume(abs(edge - DEFAULT_RTOL) > 1e-9 and abs(edge - np.sqrt(DEFAULT_RTOL)) > 1e-9)
    label, stab = classify(A)
    assert classify(c * A) == (label, stab)
    assert label in LABELS and stab in STABILITY
    if label in GENERIC and label != "saddle":
        back = classify(-A)[0]
        assert back.split(" ", 1)[1] == label.split(" ", 1)[1]
        assert back.split(" ", 1)[0] != label.split(" ", 1)[0]
