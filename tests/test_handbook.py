"""Handbook formulas checked against systems fitted from simulated measurements.

Each test simulates a textbook system with scipy.integrate.solve_ivp (reference
library), fits it with fitdyn's estimators and compares the fitted matrix with the
handbook formula.  Sources are named beside each check; "from memory" marks values
and attributions recalled rather than looked up.  Labels come from
fitdyn.classify.classify.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from fitdyn.classify import classify
from fitdyn.estimators import estimate
from fitdyn.recording import KEPT, CleaningLog, Recording, RowFate


def recording(rhs, starts, t, noise=0.0, seed=0) -> Recording:
    """Solve ``dx/dt = rhs(t, x)`` from each start (solve_ivp, tight tolerances),
    sample at ``t`` and add measurement noise of ``noise`` times each channel's sd."""
    rng = np.random.default_rng(seed)
    values = []
    for x0 in starts:
        sol = solve_ivp(rhs, (t[0], t[-1]), x0, t_eval=t, rtol=1e-11, atol=1e-12, method="DOP853")
        values.append(sol.y.T)
    V = np.concatenate(values)
    if noise:
        V = V + noise * V.std(axis=0) * rng.standard_normal(V.shape)
    R = len(starts)
    n = V.shape[0]
    traj = np.repeat(np.arange(R), t.size)
    return Recording(
        times=np.tile(t, R),
        values=V,
        trajectory=traj,
        segment=traj.copy(),
        outlier=np.zeros(n, dtype=bool),
        source_rows=np.arange(n),
        channels=("x1", "x2"),
        units=(None, None),
        time_unit="s",
        trajectory_names=tuple(str(r + 1) for r in range(R)),
        log=CleaningLog("handbook", tuple(RowFate(i, KEPT) for i in range(n))),
        source="handbook",
    )


def linear(A):
    A = np.asarray(A, dtype=float)
    return lambda t, x: A @ x


@pytest.mark.parametrize("method", ["trajectory", "integral", "auto"])
def test_series_rlc_natural_response(method):
    # Series RLC, state (current i, capacitor voltage v): L di/dt = -R i - v,
    # C dv/dt = i.  Natural response: neper frequency alpha = R / (2 L), resonant
    # frequency omega0 = 1 / sqrt(L C); underdamped when alpha < omega0
    # (Nilsson & Riedel, Electric Circuits, from memory).
    R, L, C = 2.0, 1.0, 0.1
    A = [[-R / L, -1 / L], [1 / C, 0.0]]
    t = np.linspace(0, 5, 300)
    rec = recording(linear(A), [[0.0, 10.0]], t, noise=0.01, seed=1)
    est, _ = estimate(rec, method)
    alpha = -np.trace(est.matrix) / 2
    omega0 = np.sqrt(np.linalg.det(est.matrix))
    assert alpha == pytest.approx(R / (2 * L), rel=0.02)
    assert omega0 == pytest.approx(1 / np.sqrt(L * C), rel=0.01)
    assert classify(est.matrix)[0] == "stable spiral"
    assert np.allclose(est.equilibrium, 0.0, atol=0.05)


@pytest.mark.parametrize("method", ["derivative", "trajectory"])
@pytest.mark.parametrize(
    "damping, label", [(0.8, "stable spiral"), (15.0, "stable node")], ids=["under", "over"]
)
def test_mass_spring_damper(method, damping, label):
    # m x'' + c x' + k x = 0: natural frequency omega_n = sqrt(k / m), damping ratio
    # zeta = c / (2 sqrt(k m)); zeta < 1 oscillates, zeta > 1 does not
    # (Ogata, Modern Control Engineering, from memory).
    m, k, c = 2.0, 18.0, damping
    A = [[0.0, 1.0], [-k / m, -c / m]]
    t = np.linspace(0, 8 if damping < 1 else 4, 800)
    rec = recording(linear(A), [[0.1, 0.0], [0.0, -0.2]], t, noise=0.002, seed=2)
    est, _ = estimate(rec, method)
    omega_n = np.sqrt(np.linalg.det(est.matrix))
    zeta = -np.trace(est.matrix) / (2 * omega_n)
    assert omega_n == pytest.approx(np.sqrt(k / m), rel=0.01)
    assert zeta == pytest.approx(c / (2 * np.sqrt(k * m)), rel=0.05)
    assert classify(est.matrix)[0] == label


@pytest.mark.parametrize("method", ["integral", "trajectory"])
def test_two_compartment_pharmacokinetics(method):
    # Two-compartment model with elimination from the central compartment, amounts
    # (A1, A2): A1' = -(k10 + k12) A1 + k21 A2, A2' = k12 A1 - k21 A2.  The hybrid
    # rate constants satisfy alpha + beta = k12 + k21 + k10 and alpha beta = k21 k10
    # (Gibaldi & Perrier, Pharmacokinetics, 2nd ed., from memory).  All drug is
    # eliminated, so the equilibrium (0, 0) is known.
    k10, k12, k21 = 0.3, 0.5, 0.2  # per hour
    A = [[-(k10 + k12), k21], [k12, -k21]]
    t = np.linspace(0, 48, 97)  # every half hour for two days
    rec = recording(linear(A), [[100.0, 0.0]], t, noise=0.005, seed=3)
    est, _ = estimate(rec, method, equilibrium=[0.0, 0.0])
    assert -np.trace(est.matrix) == pytest.approx(k12 + k21 + k10, rel=0.02)
    assert np.linalg.det(est.matrix) == pytest.approx(k21 * k10, rel=0.05)
    assert classify(est.matrix)[0] == "stable node"


@pytest.mark.parametrize("method", ["trajectory", "integral"])
def test_lotka_volterra_linearised_center(method):
    # x' = a x - b x y, y' = -c y + d x y: equilibrium (c / d, a / b); linearised
    # there the eigenvalues are +- i sqrt(a c), a center (Murray, Mathematical
    # Biology I, from memory).  Small-amplitude data of the nonlinear system.
    a, b, c, d = 1.0, 0.5, 0.75, 0.25

    def rhs(t, z):
        x, y = z
        return [a * x - b * x * y, -c * y + d * x * y]

    eq = np.array([c / d, a / b])
    t = np.linspace(0, 40, 400)
    rec = recording(rhs, [eq * np.array([1.02, 1.0])], t)
    est, _ = estimate(rec, method)
    omega = np.sqrt(a * c)
    assert np.allclose(est.equilibrium, eq, rtol=5e-3)
    assert np.sqrt(np.linalg.det(est.matrix)) == pytest.approx(omega, rel=0.01)
    assert abs(np.trace(est.matrix)) < 0.01 * omega
    jac = np.array([[0.0, -b * c / d], [d * a / b, 0.0]])
    assert np.allclose(est.matrix, jac, atol=0.02 * omega)
    # a practical margin: the nonlinear terms move the fitted trace off zero slightly
    assert classify(est.matrix, rtol=0.02)[0] == "center"


@pytest.mark.parametrize("method", ["integral", "derivative", "trajectory"])
def test_reversible_first_order_reaction(method):
    # A <=> B with rates k_f, k_r: [A]' = -k_f [A] + k_r [B], [B]' = k_f [A] - k_r [B].
    # Mass is conserved, so det = 0 (a line of equilibria), and the relaxation rate
    # toward equilibrium is k_f + k_r (Atkins, Physical Chemistry, from memory).
    kf, kr = 0.4, 0.1
    A = [[-kf, kr], [kf, -kr]]
    t = np.linspace(0, 15, 301)
    starts = [[1.0, 0.0], [0.5, 1.5], [2.0, 0.2]]  # different totals
    rec = recording(linear(A), starts, t)
    est, _ = estimate(rec, method)
    label, stability = classify(est.matrix)
    assert label == "non-isolated equilibria"
    assert stability == "stable (not asymptotically)"
    assert -np.trace(est.matrix) == pytest.approx(kf + kr, rel=1e-4)
    assert est.equilibrium is None
    # with measurement noise the rate is still recovered; the label is then generic
    noisy, _ = estimate(recording(linear(A), starts, t, noise=0.01, seed=4), method)
    assert -np.trace(noisy.matrix) == pytest.approx(kf + kr, rel=0.05)
