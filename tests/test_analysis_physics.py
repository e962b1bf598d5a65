"""Calibration, Littrow wavelength, chip length and their uncertainty, against outside references.

References named beside each check:
* Littrow grating equation m*lambda = 2*d*sin(theta) and tuning rate 2*d*cos(theta)/m:
  Palmer, Diffraction Grating Handbook.
* Mode spacing delta_lambda = lambda^2/(2*n_g*L): Saleh & Teich, Fundamentals of
  Photonics (resonator modes); Coldren, Corzine & Mashanovitch, Diode Lasers and
  Photonic Integrated Circuits (group index).
* Law of propagation of uncertainty: JCGM 100:2008 (GUM); Monte Carlo: JCGM 101:2008;
  the `uncertainties` package (linear error propagation by automatic differentiation)
  as an independent implementation.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from uncertainties import ufloat, umath

from analysis import physics
from analysis.pipeline import calibrated_results
from analysis.uncertainty import Input, gum, monte_carlo


def test_littrow_wavelength_hand_worked():
    # 1200 lines/mm -> d = 833.333 nm; theta = 30 deg, m = 1: lambda = 2 d sin 30 = d
    # (Palmer). Tuning: 2 d cos(30 deg) = 1443.38 nm/rad = 25.192 nm/deg.
    assert physics.littrow_wavelength_nm(30.0, 1200.0, 1) == pytest.approx(833.3333, abs=1e-3)
    assert physics.littrow_wavelength_nm(30.0, 1200.0, 2) == pytest.approx(416.6667, abs=1e-3)
    assert physics.tuning_nm_per_deg(30.0, 1200.0, 1) == pytest.approx(25.1916, abs=1e-3)
    assert physics.littrow_angle_deg(833.3333, 1200.0) == pytest.approx(30.0, abs=1e-4)


def test_mode_spacing_and_length_hand_worked():
    # Worked by hand with the published formula (Saleh & Teich; Coldren et al.): a 300 um
    # chip with group index 3.6 at 1550 nm: delta_lambda = 1550^2 / (2 * 3.6 * 300e3) nm
    # = 2402500 / 2160000 = 1.112269 nm. And back again.
    dlam = 1550.0 ** 2 / (2 * 3.6 * 300e3)
    assert dlam == pytest.approx(1.112269, abs=1e-6)
    assert physics.chip_length_um(1550.0, 1.112269, 3.6) == pytest.approx(300.0, abs=1e-3)
    # with the phase index (say 3.2) instead, the answer is off by n_g/n (common practice warning)
    assert physics.chip_length_um(1550.0, dlam, 3.2) / 300.0 == pytest.approx(3.6 / 3.2)


def test_spacing_in_steps_to_nm_hand_worked():
    # 1500 lines/mm (d = 666.667 nm), angle 44 deg at step 0, 2e-4 deg/step, mode at
    # 5000 steps: theta = 45 deg, lambda = 2 d sin45 = 942.809 nm, tuning 2 d cos45 =
    # 942.809 nm/rad; 46 steps = 46 * 2e-4 deg = 1.6057e-4 rad -> 0.151384 nm.
    sp, lam = physics.spacing_nm_at(46.0, 5000.0, 2e-4, 44.0, 1500.0, 1)
    assert lam == pytest.approx(942.809, abs=1e-3)
    assert sp == pytest.approx(942.809 * math.radians(46 * 2e-4), rel=1e-5)
    # L = lambda^2 / (2 n_g delta_lambda) from the hand values above, not the code's:
    # 942.809^2 / (2 * 3.62 * 942.809 * 1.6057e-4) nm = 942.809 / 1.16253e-3 nm = 811.0 um
    lam_hand, sp_hand = 2 * (1e6 / 1500) * math.sin(math.radians(45.0)), 942.809 * math.radians(46 * 2e-4)
    assert physics.length_from_steps(46.0, 5000.0, 2e-4, 44.0, 1500.0, 3.62, 1) == \
        pytest.approx(lam_hand ** 2 / (2 * 3.62 * sp_hand) / 1000.0, rel=1e-5)
    assert physics.length_from_steps(46.0, 5000.0, 2e-4, 44.0, 1500.0, 3.62, 1) == pytest.approx(811.0, abs=0.1)


def test_by_count_route_hand_worked():
    # 11 modes whose centres span 2.0 nm at 940 nm: delta_lambda = 2.0 / 10 = 0.2 nm;
    # L = 940^2 / (2 * 3.6 * 0.2) nm = 883600 / 1.44 = 613611 nm = 613.611 um.
    r = physics.length_by_count(11, 2.0, 940.0, 3.6, span_nm_u=0.02, group_index_u=0.036)
    assert r["spacing_nm"] == pytest.approx(0.2)
    assert r["length_um"] == pytest.approx(613.611, abs=1e-3)
    # 1 % on the span and 1 % on n_g, both inversely: u = sqrt(2) % of L
    assert r["length_um_u"] == pytest.approx(613.611 * math.sqrt(2) * 0.01, rel=1e-4)
    with pytest.raises(ValueError):
        physics.length_by_count(1, 2.0, 940.0, 3.6)


RIG = {"stage": {"deg_per_step": 2.0e-4, "deg_per_step_u": 2.0e-6, "angle_at_zero_deg": 44.0,
                 "angle_at_zero_deg_u": 0.05},
       "grating": {"lines_per_mm": 1500.0, "lines_per_mm_u": 0.5, "order": 1},
       "chip": {"group_index": 3.62, "group_index_u": 0.05}}


def _with_uncertainties(sp, sp_u, centre):
    """The same measurement model written with the `uncertainties` package."""
    st, gr, ch = RIG["stage"], RIG["grating"], RIG["chip"]
    k = ufloat(st["deg_per_step"], st["deg_per_step_u"])
    a0 = ufloat(st["angle_at_zero_deg"], st["angle_at_zero_deg_u"])
    lpm = ufloat(gr["lines_per_mm"], gr["lines_per_mm_u"])
    ng = ufloat(ch["group_index"], ch["group_index_u"])
    s = ufloat(sp, sp_u)
    d = 1e6 / lpm

    def lam(x):
        return 2 * d * umath.sin(umath.radians(a0 + k * x))

    dl = lam(centre + s / 2) - lam(centre - s / 2)      # positive: angle grows with steps
    return dl, lam(centre), lam(centre) ** 2 / (2 * ng * dl) / 1000.0


def test_propagation_agrees_with_the_uncertainties_package_and_with_monte_carlo():
    sp, sp_u, centre = 46.2, 0.03, 3000.0
    cal = physics.Calibration.from_sections(RIG)
    r = calibrated_results(cal, RIG["chip"], sp, sp_u, centre, mc_draws=200_000)
    dl, lam, L = _with_uncertainties(sp, sp_u, centre)
    # values and standard uncertainties, against an independent implementation
    assert r["spacing_nm"] == pytest.approx(dl.nominal_value, rel=1e-9)
    assert r["wavelength_nm"] == pytest.approx(lam.nominal_value, rel=1e-9)
    assert r["length_um"] == pytest.approx(L.nominal_value, rel=1e-9)
    assert r["spacing_nm_u"] == pytest.approx(dl.std_dev, rel=1e-3)
    assert r["wavelength_nm_u"] == pytest.approx(lam.std_dev, rel=1e-3)
    assert r["length_um_u"] == pytest.approx(L.std_dev, rel=1e-3)
    # JCGM 101: the Monte Carlo spread agrees with the first-order GUM result here
    # (the model is close to linear over +-1 u), within its own sampling error (~0.2 %)
    mc = r["length_um_monte_carlo"]
    assert mc["u"] == pytest.approx(r["length_um_u"], rel=0.02)
    assert mc["mean"] == pytest.approx(r["length_um"], rel=1e-3)
    lo, hi = mc["interval95"]
    assert lo < r["length_um"] < hi
    assert (hi - lo) / 2 == pytest.approx(1.96 * r["length_um_u"], rel=0.03)


def test_budget_names_the_dominant_inputs():
    # For this rig the 1.4 % group index and the 1 % stage slope dominate. Worked by hand:
    # L = d sin(theta) tan(theta) / (m n_g S delta) with theta = theta0 + delta * c, so
    # dlnL/dln(n_g) = -1 and dlnL/dln(delta) = -1 + (cot theta + 1/(sin theta cos theta))
    # * delta * c (delta * c in radians): the slope also moves the centre angle.
    cal = physics.Calibration.from_sections(RIG)
    centre = 3000.0
    r = calibrated_results(cal, RIG["chip"], 46.2, 0.001, centre, mc_draws=10_000)
    budget = r["budget"]
    names = [b["input"] for b in budget]
    assert names[0] == "[chip] group_index" and names[1] == "[stage] deg_per_step"
    L = r["length_um"]
    by = {b["input"]: b for b in budget}
    assert by["[chip] group_index"]["contribution"] == pytest.approx(L * 0.05 / 3.62, rel=1e-3)
    theta = math.radians(44.0 + 2e-4 * centre)
    tilt = (1 / math.tan(theta) + 1 / (math.sin(theta) * math.cos(theta))) * math.radians(2e-4 * centre)
    assert by["[stage] deg_per_step"]["contribution"] == pytest.approx(L * 0.01 * (1 - tilt), rel=1e-3)
    assert sum(b["share"] for b in budget) == pytest.approx(1.0)
    assert by["centre_steps"]["contribution"] == 0.0


def test_gum_and_monte_carlo_on_a_product_with_a_known_answer():
    # y = a * b with relative uncertainties 3 % and 4 %: u(y)/y = 5 % to first order (GUM
    # eq. 10 for a product); Monte Carlo gives the same spread within its sampling error.
    ins = [Input("a", 2.0, 0.06), Input("b", 5.0, 0.2)]
    y, u, budget = gum(lambda a, b: a * b, ins)
    assert (y, u) == (pytest.approx(10.0), pytest.approx(0.5, rel=1e-6))
    mc = monte_carlo(lambda a, b: a * b, ins, draws=200_000)
    assert mc["u"] == pytest.approx(0.5 * math.sqrt(1 + 0.03 ** 2 * 0.04 ** 2 / 0.05 ** 2), rel=0.01)
    assert [b["input"] for b in budget] == ["b", "a"]
    assert np.isclose(sum(b["share"] for b in budget), 1.0)
