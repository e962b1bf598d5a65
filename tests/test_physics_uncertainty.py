"""Calibration physics and uncertainty propagation against outside references."""
import math

import numpy as np
import pytest
from scipy.optimize import brentq
from uncertainties import ufloat, umath

from analysis import physics
from analysis.pipeline import calibrated_results
from analysis.uncertainty import Input, gum, monte_carlo


def test_littrow_wavelength_solves_the_general_grating_equation():
    # Palmer, Diffraction Grating Handbook: m*lambda = d*(sin(alpha) + sin(beta)); Littrow
    # is alpha = beta. Solve the general equation numerically, independently of our closed form.
    for lpm, lam, m in [(1200, 632.8, 1), (1500, 936.0, 1), (600, 1064.0, 2), (2400, 405.0, 1)]:
        d = 1e6 / lpm
        theta = brentq(lambda a: d * (2 * math.sin(a)) - m * lam, 1e-6, math.pi / 2 - 1e-9)
        assert physics.littrow_angle_deg(lam, lpm, m) == pytest.approx(math.degrees(theta), rel=1e-12)
        assert physics.littrow_wavelength_nm(math.degrees(theta), lpm, m) == pytest.approx(lam, rel=1e-12)


def test_littrow_hand_value():
    # Hand-worked: 1200 lines/mm, 632.8 nm, first order: sin(theta) = 0.6328 * 1.2 / 2 = 0.37968.
    # sin(22.3 deg) = 0.379456 (series in 0.389208 rad), cos(22.3 deg) = 0.92521, so
    # theta = 22.3 deg + (0.37968 - 0.379456) / 0.92521 rad = 22.3 + 0.01387 = 22.3139 deg.
    assert physics.littrow_angle_deg(632.8, 1200) == pytest.approx(22.3139, abs=1e-4)


def test_tuning_rate_is_the_derivative():
    # Palmer: d(lambda)/d(theta) = 2 d cos(theta) / m; check against a numerical derivative.
    a, h = 44.3, 1e-6
    num = (physics.littrow_wavelength_nm(a + h, 1500) - physics.littrow_wavelength_nm(a - h, 1500)) / (2 * h)
    assert physics.tuning_nm_per_deg(a, 1500) == pytest.approx(num, rel=1e-8)


def test_chip_length_hand_worked():
    # delta_lambda = lambda^2 / (2 n_g L) (Saleh & Teich; Coldren et al.). By hand, for a
    # 1310 nm chip of our own, n_g = 3.58, L = 450 um:
    # 1310^2 / (2 * 3.58 * 450000) = 1716100 / 3222000 = 0.5326195 nm.
    assert physics.chip_length_um(1310.0, 0.5326195, 3.58) == pytest.approx(450.0, rel=1e-6)


def test_group_index_not_phase_index():
    # Using n instead of n_g is wrong by n_g/n (Coldren et al., group index and mode spacing).
    L_g = physics.chip_length_um(940.0, 0.15, 3.64)
    L_n = physics.chip_length_um(940.0, 0.15, 3.41)
    assert L_n / L_g == pytest.approx(3.64 / 3.41)


INPUTS = [Input("sp", 45.58, 0.05), Input("c", 3000.0, 0.0), Input("k", 2.0e-4, 2.0e-6),
          Input("a0", 44.0, 0.05), Input("lpm", 1500.0, 0.5), Input("ng", 3.62, 0.05)]


def _length(sp, c, k, a0, lpm, ng):
    return physics.length_from_steps(sp, c, k, a0, lpm, ng)


def test_gum_agrees_with_the_uncertainties_library():
    # First-order propagation by the `uncertainties` package (automatic differentiation).
    u = {i.name: (ufloat(i.value, i.u) if i.u else i.value) for i in INPUTS}
    d = 1e6 / u["lpm"]
    lam = lambda s: 2 * d * umath.sin(umath.radians(u["a0"] + u["k"] * s))  # noqa: E731
    dl = lam(u["c"] + u["sp"] / 2) - lam(u["c"] - u["sp"] / 2)
    L_ref = lam(u["c"]) ** 2 / (2 * u["ng"] * dl) / 1000
    y, uy, budget = gum(_length, INPUTS)
    assert y == pytest.approx(L_ref.nominal_value, rel=1e-10)
    assert uy == pytest.approx(L_ref.std_dev, rel=1e-4)
    # Budget: contributions add in quadrature to u; shares add to 1; sorted largest first.
    assert math.sqrt(sum(r["contribution"] ** 2 for r in budget)) == pytest.approx(uy)
    assert sum(r["share"] for r in budget) == pytest.approx(1.0)
    assert [r["contribution"] for r in budget] == sorted((r["contribution"] for r in budget), reverse=True)


def test_monte_carlo_agrees_with_gum():
    # JCGM 101: for a nearly linear model the Monte Carlo standard deviation matches the GUM u.
    def vec(sp, c, k, a0, lpm, ng):
        d = 1e6 / lpm
        lam = lambda s: 2 * d * np.sin(np.radians(a0 + k * s))  # noqa: E731
        return lam(c) ** 2 / (2 * ng * np.abs(lam(c + sp / 2) - lam(c - sp / 2))) / 1000
    _, uy, _ = gum(_length, INPUTS)
    mc = monte_carlo(vec, INPUTS, draws=200_000)
    assert mc["u"] == pytest.approx(uy, rel=0.03)
    lo, hi = mc["interval95"]
    assert lo < _length(*(i.value for i in INPUTS)) < hi


def test_calibrated_results_budget_names_rig_keys():
    cal = physics.Calibration(2.0e-4, 44.0, 1500.0, 1, 2.0e-6, 0.05, 0.0)
    r = calibrated_results(cal, {"group_index": 3.62, "group_index_u": 0.05}, 45.58, 0.01, 3000.0,
                           mc_draws=20_000)
    names = [b["input"] for b in r["budget"]]
    assert "[chip] group_index" in names and "[stage] deg_per_step" in names
    assert r["length_um_u"] == pytest.approx(r["length_um_monte_carlo"]["u"], rel=0.05)


def test_spacing_uncertainty_covers_pass_to_pass_scatter():
    # Type A evaluation (GUM 4.2): when passes disagree (here the chip drifts in
    # temperature during a 4-pass run), the stated spacing u must include that scatter,
    # so the simulator's true spacing lies within 3 u.
    from daq.rig import load_rig
    from sims.instruments import SimBench
    from sims.trace import simulate_trace
    from analysis.pipeline import analyze_trace
    rig = load_rig(None, ['sim.scenario="drift"', "sim.seed=2", "sweep.passes=4"])
    tr = simulate_trace(rig.sections)
    truth = SimBench(rig.sections).truth()
    r = analyze_trace(tr.position_steps, tr.value, tr.direction, tr.pass_index, rig.sections, rig["counter"])
    assert r["spacing_steps_u"] >= r["spacing_steps_u_fit"]
    assert abs(r["spacing_steps"] - truth["spacing_steps"]) <= 3 * r["spacing_steps_u"]
