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


def _positive(x):
    return x if x.nominal_value > 0 else -x


def _ref_chain(sp, c, k, a0, lpm, ng):
    """The Littrow chain written out for the `uncertainties` package (automatic
    differentiation, first order): (spacing nm, wavelength nm, length um)."""
    d = 1e6 / lpm
    lam = lambda s: 2 * d * umath.sin(umath.radians(a0 + k * s))  # noqa: E731  Palmer
    dl = _positive(lam(c + sp / 2) - lam(c - sp / 2))
    return dl, lam(c), lam(c) ** 2 / (2 * ng * dl) / 1000        # Coldren et al.


# Rigs of our own: the demo bench (940 nm, 1500 lines/mm, ~44.6 deg) and two at high
# Littrow angles (1550 nm on 1200 lines/mm, 68.4 deg; 780 nm on 2400 lines/mm, 69.4 deg),
# where L ~ sin^2(theta)/cos(theta) makes the angle offset weigh as much as the spacing.
HIGH_ANGLE_RIGS = [
    ({"deg_per_step": 2.0e-4, "deg_per_step_u": 2.0e-6, "angle_at_zero_deg": 44.0, "angle_at_zero_deg_u": 0.05},
     {"lines_per_mm": 1500.0, "lines_per_mm_u": 0.5}, 3000.0, 45.6),
    ({"deg_per_step": 2.0e-4, "deg_per_step_u": 1.0e-6, "angle_at_zero_deg": 68.0, "angle_at_zero_deg_u": 0.5},
     {"lines_per_mm": 1200.0, "lines_per_mm_u": 0.3}, 2150.0, 18.3),
    ({"deg_per_step": -1.0e-4, "deg_per_step_u": 5.0e-7, "angle_at_zero_deg": 70.0, "angle_at_zero_deg_u": 0.5},
     {"lines_per_mm": 2400.0, "lines_per_mm_u": 1.0}, 6000.0, 61.0),
]


@pytest.mark.parametrize("stage,grating,centre,spacing", HIGH_ANGLE_RIGS)
def test_live_figures_carry_every_calibration_input(stage, grating, centre, spacing):
    # The dashboard's and the counter-only summary's figures (live_calibration) against the
    # `uncertainties` package on the whole chain: the angle offset and the groove density
    # count as well as the spacing, the step size and n_g.
    sections = {"stage": stage, "grating": grating, "chip": {"group_index": 3.7, "group_index_u": 0.05}}
    live = physics.live_calibration(spacing, 0.02, sections, centre_steps=centre)
    sp, c = ufloat(spacing, 0.02), centre
    k = ufloat(stage["deg_per_step"], stage["deg_per_step_u"])
    a0 = ufloat(stage["angle_at_zero_deg"], stage["angle_at_zero_deg_u"])
    lpm = ufloat(grating["lines_per_mm"], grating["lines_per_mm_u"])
    dl, lam, L = _ref_chain(sp, c, k, a0, lpm, ufloat(3.7, 0.05))
    assert live["spacing_nm"] == pytest.approx(dl.nominal_value, rel=1e-9)
    assert live["spacing_nm_u"] == pytest.approx(dl.std_dev, rel=1e-3)
    assert live["wavelength_nm_u"] == pytest.approx(lam.std_dev, rel=1e-3)
    assert live["length_um"] == pytest.approx(L.nominal_value, rel=1e-9)
    assert live["length_um_u"] == pytest.approx(L.std_dev, rel=1e-3)
    # in frequency: delta_nu = c delta_lambda / lambda^2 = c / (2 n_g L) (Coldren et al.)
    c_si = 299_792_458.0
    assert live["spacing_ghz"] == pytest.approx(c_si / (2 * 3.7 * live["length_um"] * 1e-6) / 1e9, rel=1e-9)
    nu = c_si * dl / lam ** 2                       # nm / nm^2 * m/s = GHz
    assert live["spacing_ghz_u"] == pytest.approx(nu.std_dev, rel=1e-3)


@pytest.mark.parametrize("stage,grating,centre,spacing", HIGH_ANGLE_RIGS)
def test_by_count_route_carries_every_calibration_input(stage, grating, centre, spacing):
    # N modes from the first centre to the last: delta_lambda = W / (N - 1) and
    # L = lambda^2 / (2 n_g delta_lambda) at the mean wavelength, against `uncertainties`.
    cal = physics.Calibration.from_sections({"stage": stage, "grating": grating})
    n = 41
    first, last = centre - 20 * spacing, centre + 20 * spacing
    r = physics.length_by_count_steps(n, first, last, 0.3, cal, 3.7, 0.05)
    k = ufloat(stage["deg_per_step"], stage["deg_per_step_u"])
    a0 = ufloat(stage["angle_at_zero_deg"], stage["angle_at_zero_deg_u"])
    lpm = ufloat(grating["lines_per_mm"], grating["lines_per_mm_u"])
    d = 1e6 / lpm
    lam = lambda s: 2 * d * umath.sin(umath.radians(a0 + k * s))  # noqa: E731
    l0, l1 = lam(ufloat(first, 0.3)), lam(ufloat(last, 0.3))
    L = ((l0 + l1) / 2) ** 2 / (2 * ufloat(3.7, 0.05) * _positive(l1 - l0) / (n - 1)) / 1000
    assert r["length_um"] == pytest.approx(L.nominal_value, rel=1e-9)
    assert r["length_um_u"] == pytest.approx(L.std_dev, rel=1e-3)
    assert r["spacing_nm"] == pytest.approx(_positive(l1 - l0).nominal_value / (n - 1), rel=1e-9)


def test_monte_carlo_agrees_with_gum():
    # JCGM 101: for a nearly linear model the Monte Carlo standard deviation matches the GUM u.
    def vec(sp, c, k, a0, lpm, ng):
        d = 1e6 / lpm
        lam = lambda s: 2 * d * np.sin(np.radians(a0 + k * s))  # noqa: E731
        return lam(c) ** 2 / (2 * ng * np.abs(lam(c + sp / 2) - lam(c - sp / 2))) / 1000
    _, uy, _ = gum(_length, INPUTS)
    mc = monte_carlo(vec, INPUTS, draws=200_000)
    assert mc["u"] == pytest.approx(uy, rel=0.03)
    # and a Monte Carlo of the test's own (plain numpy draws, another seed) agrees with both
    rng = np.random.default_rng(4242)
    y = vec(*(i.value + i.u * rng.standard_normal(200_000) for i in INPUTS))
    assert float(np.std(y, ddof=1)) == pytest.approx(uy, rel=0.03)
    assert float(np.std(y, ddof=1)) == pytest.approx(mc["u"], rel=0.03)
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
    # the Type A figure recomputed here from the passes' spacings (GUM 4.2.3: s / sqrt(n))
    sp = [p["spacing_steps"] for p in r["per_pass"] if p["spacing_steps"] is not None]
    assert len(sp) == 4
    u_a = float(np.std(sp, ddof=1) / np.sqrt(len(sp)))
    assert r["spacing_steps_u"] == pytest.approx(max(u_a, r["spacing_steps_u_fit"]), rel=1e-9)
    assert abs(r["spacing_steps"] - truth["spacing_steps"]) <= 3 * r["spacing_steps_u"]
