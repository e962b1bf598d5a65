"""The spacing fit's standard uncertainty, checked by Monte Carlo against its promise.

The centres are drawn here from models of the test's own (a cubic in mode number plus
independent or AR(1) scatter), with the true spacing known; scipy's Student t is the
reference for 95 % coverage.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import t as student_t

from analysis.modefit import fit_spacing
from analysis.pipeline import fit_notes

TRUE_SPACING = 45.6      # steps per mode at the middle mode (a demo value of our own)


def centres(rng, n, sigma, rho=0.0):
    """Mode centres in steps: a gently bent line plus AR(1) scatter of standard deviation sigma."""
    k = np.arange(n, dtype=float)
    x = k - 0.5 * (n - 1)
    e = rng.standard_normal(n)
    if rho:
        for i in range(1, n):            # stationary AR(1): e_i = rho e_(i-1) + sqrt(1 - rho^2) w_i
            e[i] = rho * e[i - 1] + np.sqrt(1 - rho * rho) * e[i]
    return k, 3000.0 + TRUE_SPACING * x + 2e-3 * x ** 2 + 1e-5 * x ** 3 + sigma * e


def z_scores(n, sigma, rho, trials=1500, seed=5):
    rng = np.random.default_rng(seed)
    z, dof = [], []
    for _ in range(trials):
        k, c = centres(rng, n, sigma, rho)
        sp, u, det = fit_spacing(k, c)
        z.append((sp - TRUE_SPACING) / u)
        dof.append(det["dof"])
    return np.array(z), np.array(dof)


def test_independent_scatter_gets_the_least_squares_error():
    # Independent Gaussian scatter: the least-squares standard error is right (rms z ~ 1,
    # a t with 56 degrees of freedom: sqrt(56/54) = 1.02), and the autocorrelation
    # correction stays close to 1.
    z, _ = z_scores(60, 0.3, 0.0)
    assert 0.9 < np.sqrt(np.mean(z ** 2)) < 1.15


def test_correlated_scatter_widens_the_error_to_what_it_is():
    # AR(1) scatter with rho = 0.6: a least-squares error alone would be too small by about
    # sqrt((1 + rho) / (1 - rho)) = 2 (the effective-sample-size result for a trend, Santer
    # et al. 2000, from memory); the fit's error must cover the scatter of its results.
    # (r1 of residuals is biased low with few modes: at 40 modes the error is still ~1.5x
    # short, at 120 within 20 %)
    z, _ = z_scores(120, 0.3, 0.6)
    rms = np.sqrt(np.mean(z ** 2))
    assert 0.8 < rms < 1.3
    rng = np.random.default_rng(5)
    z_ls = []
    for _ in range(300):
        k, c = centres(rng, 120, 0.3, 0.6)
        sp, u, det = fit_spacing(k, c)
        z_ls.append((sp - TRUE_SPACING) / det["se_least_squares"])
    assert np.sqrt(np.mean(np.square(z_ls))) > 1.6        # what the correction is for


@pytest.mark.parametrize("n", [4, 8, 12])
def test_few_modes_cover_95_percent_with_students_t(n):
    # With few modes the fit has few degrees of freedom: k95 from Student's t (JCGM 100 G.3)
    # at the fit's own dof must give 95 % coverage (binomial 1-sigma for 2000 trials: 0.5 %).
    z, dof = z_scores(n, 0.3, 0.0, trials=2000, seed=n)
    # with so few centres a 5-MAD cut would drop good ones (then claim a precision it has not)
    rng = np.random.default_rng(n + 100)
    assert all(fit_spacing(*centres(rng, n, 0.3))[2]["outliers"] == 0 for _ in range(2000))
    k95 = student_t.ppf(0.975, dof)
    outside = float(np.mean(np.abs(z) > k95))
    assert 0.03 < outside < 0.07
    # and k = 2 would not: the coverage is short by then
    if n <= 8:
        assert float(np.mean(np.abs(z) > 2.0)) > 0.07


def test_notes_say_what_the_uncertainty_leaves_out():
    one = fit_notes({"residual_lag1": 0.0, "se_factor": 1.0, "dof": 80.0}, 1, True)
    assert any("one pass only" in s for s in one)
    assert fit_notes({"residual_lag1": 0.0, "se_factor": 1.0, "dof": 80.0}, 2, True) == []
    wander = fit_notes({"residual_lag1": 0.7, "se_factor": 2.38, "dof": 12.0}, 3, True)
    assert len(wander) == 1 and "0.70" in wander[0] and "2.4 times" in wander[0]


def test_the_order_the_modes_come_in_changes_nothing():
    # unequal weights (modes crossed different numbers of times), AR(1) scatter: the same
    # centres handed over shuffled give the same spacing and the same uncertainty
    rng = np.random.default_rng(3)
    k, c = centres(rng, 60, 0.3, 0.5)
    w = rng.integers(1, 6, k.size).astype(float)
    a = fit_spacing(k, c, w)
    perm = rng.permutation(k.size)
    b = fit_spacing(k[perm], c[perm], w[perm])
    assert b[0] == pytest.approx(a[0], rel=1e-12) and b[1] == pytest.approx(a[1], rel=1e-9)
    assert a[2]["residual_lag1"] > 0.1


def test_an_exact_curve_has_no_autocorrelation_to_credit():
    k = np.arange(40.0)
    sp, u, det = fit_spacing(k, 1000.0 + 45.5 * k)
    assert sp == pytest.approx(45.5) and det["residual_lag1"] == 0.0 and det["se_factor"] == 1.0


def test_a_stopped_run_is_told_to_finish_its_passes():
    # a two-pass run stopped in its first pass: the advice is to finish, not to ask for passes
    stopped = fit_notes({"residual_lag1": 0.0, "se_factor": 1.0, "dof": 80.0}, 1, True, planned_passes=2)
    assert any("resume the run to finish its passes" in s for s in stopped)
    single = fit_notes({"residual_lag1": 0.0, "se_factor": 1.0, "dof": 80.0}, 1, True, planned_passes=1)
    assert any("sweep.passes >= 2" in s for s in single)
