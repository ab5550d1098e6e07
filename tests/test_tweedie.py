"""Tests for the Tweedie log-density (compound Poisson–gamma, 1 < p < 2)."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy import integrate, stats

from tallgam.families.tweedie_density import tweedie_logpdf

# (mu, phi, p): light and heavy point masses, p near both ends, a multimodal density
# (p = 1.1, small phi: peaks at multiples of the gamma jump size) and a singular one
# at y -> 0 (p > 1.5).
CASES = [
    (1.0, 1.0, 1.5),
    (2.0, 0.5, 1.2),
    (0.5, 2.0, 1.8),
    (10.0, 1.0, 1.5),
    (1.0, 0.3, 1.1),
    (3.0, 0.2, 1.95),
    (50.0, 2.0, 1.3),
]


def _p_zero(mu, phi, p):
    return np.exp(-(mu ** (2 - p)) / (phi * (2 - p)))


def _integrate(g, mu, phi, p):
    """∫_0^∞ g(y) f(y) dy, split at mu + 10 sd so quad sees bulk and tail separately."""

    def integrand(y):
        return g(y) * float(np.exp(tweedie_logpdf(y, mu, phi, p)))

    split = mu + 10.0 * np.sqrt(phi * mu**p)
    with warnings.catch_warnings():
        # The y -> 0 singularity for p > 1.5 can make QUADPACK report round-off at
        # tolerances far below the ones asserted here.
        warnings.simplefilter("ignore", integrate.IntegrationWarning)
        body = integrate.quad(integrand, 0.0, split, limit=200, epsabs=1e-13, epsrel=1e-11)
        tail = integrate.quad(integrand, split, np.inf, limit=200, epsabs=1e-13, epsrel=1e-11)
    return body[0] + tail[0]


@pytest.mark.parametrize("mu, phi, p", CASES)
def test_integrates_to_one(mu, phi, p):
    # Any probability distribution: P(Y = 0) + ∫_0^∞ f(y) dy = 1.
    # Measured: |error| <= 4e-13 over CASES.
    total = _p_zero(mu, phi, p) + _integrate(lambda y: 1.0, mu, phi, p)
    assert abs(total - 1.0) < 1e-9


@pytest.mark.parametrize("mu, phi, p", CASES)
def test_mean_and_variance(mu, phi, p):
    # Definition of the Tweedie family (Jørgensen 1987, "Exponential dispersion models",
    # JRSS B 49:127–162): E Y = mu, Var Y = phi mu^p. The atom at 0 adds nothing to the
    # mean and mu^2 P(Y = 0) to the variance. Measured: relative error <= 3e-12.
    mean = _integrate(lambda y: y, mu, phi, p)
    var = _integrate(lambda y: (y - mu) ** 2, mu, phi, p) + mu**2 * _p_zero(mu, phi, p)
    assert mean == pytest.approx(mu, rel=1e-9)
    assert var == pytest.approx(phi * mu**p, rel=1e-9)


@pytest.mark.parametrize(
    "mu, phi, p",
    [(1.0, 1.0, 1.5), (2.0, 0.5, 1.2), (0.5, 2.0, 1.8), (20.0, 0.7, 1.4), (5.0, 3.0, 1.9)],
)
def test_matches_compound_poisson_gamma_sum(mu, phi, p):
    # Compound Poisson–gamma representation (Jørgensen 1987; Dunn & Smyth 2005, §2):
    # Y = Σ_{i<=N} G_i, N ~ Poisson(λ), G_i ~ Gamma(shape α, scale s), with
    # λ = mu^(2-p)/(phi(2-p)), α = (2-p)/(p-1), s = phi(p-1)mu^(p-1).
    # The convolution series is summed directly with scipy.stats, independently of
    # the module's evaluation. Checked to 1e-10 rather than 1e-8 to leave less room for
    # small systematic errors. Measured: relative error <= 3e-14.
    lam = mu ** (2 - p) / (phi * (2 - p))
    alpha = (2 - p) / (p - 1)
    scale = phi * (p - 1) * mu ** (p - 1)
    n = np.arange(1, int(lam + 40 * np.sqrt(lam) + 60))
    y = mu * np.array([1e-3, 0.05, 0.3, 0.8, 1.0, 1.7, 3.0, 6.0])
    dens = np.array(
        [np.sum(stats.poisson.pmf(n, lam) * stats.gamma.pdf(v, n * alpha, scale=scale)) for v in y]
    )
    np.testing.assert_allclose(np.exp(tweedie_logpdf(y, mu, phi, p)), dens, rtol=1e-10)
    np.testing.assert_allclose(
        np.exp(tweedie_logpdf(0.0, mu, phi, p)), stats.poisson.pmf(0, lam), rtol=1e-12
    )


@pytest.mark.parametrize("p", [1.3, 1.5, 1.7, 1.9])
def test_matches_statsmodels_loglike_obs(p):
    # statsmodels 0.15.0: Tweedie(eql=False).loglike_obs evaluates the same density
    # through scipy.special.log_wright_bessel (SciPy 1.17.1). That evaluation is accurate
    # to ~1e-10 for p >= 1.3 but was measured to go wrong for p <= 1.2 (e.g. 1.7 nats at
    # p = 1.05, phi = 1e-3, y ≈ mu ≈ 100; a 60-digit direct sum agrees with this module),
    # so only p >= 1.3 is compared. Measured: relative error <= 3e-10.
    families = pytest.importorskip("statsmodels.genmod.families")
    fam = families.Tweedie(var_power=p, eql=False)
    if not hasattr(fam, "loglike_obs"):
        pytest.skip("statsmodels Tweedie has no loglike_obs")
    rng = np.random.default_rng(11)
    mu = 10 ** rng.uniform(-2, 3, 400)
    y = mu * 10 ** rng.uniform(-2, 0.7, 400)
    y[::10] = 0.0
    for phi in (0.01, 0.1, 1.0, 10.0):
        ours = tweedie_logpdf(y, mu, phi, p)
        theirs = fam.loglike_obs(y, mu, scale=phi)
        np.testing.assert_array_less(np.abs(ours - theirs), 1e-8 * np.maximum(1.0, np.abs(ours)))


# log f, mostly at extreme arguments, from direct summation of the Dunn & Smyth W_j series in
# 60-digit arithmetic (mpmath 1.4.1), computed once for this file.
HIGH_PRECISION = [
    ((1e6, 1e6, 1e-3, 1.5), -7.826693905936821),
    ((1e6, 1e6, 1e-3, 1.99), -11.211566838772363),
    ((1e4, 1e4, 1e-3, 1.01), -2.1162827907441244),
    ((1e6, 1e6, 1e-3, 1.01), -4.441893725581716),
    ((1e6, 1.0, 1e-3, 1.5), -1996002007.8266938),
    ((1e-6, 1e3, 1e-3, 1.5), -63228.76637127552),
    ((100.0, 50.0, 1.0, 1.3), -9.474755381083916),
    ((1.0, 1.0, 1.0, 1.5), -1.0286152203419825),
    ((5.0, 2.0, 0.5, 1.9), -3.426068144266476),
    ((0.01, 2.0, 0.5, 1.1), -24.01928612647277),
]


@pytest.mark.parametrize("args, expected", HIGH_PRECISION)
def test_extreme_values_match_high_precision(args, expected):
    # Source: see HIGH_PRECISION. Measured: relative error <= 7e-15.
    assert tweedie_logpdf(*args) == pytest.approx(expected, rel=1e-12, abs=1e-12)


def test_finite_for_extreme_inputs():
    # Stability requirement: finite log-density over y up to 1e6, phi down to 1e-3,
    # p from 1.01 to 1.99, including y far from mu.
    y, mu, phi = np.meshgrid(
        [0.0, 1e-8, 1e-3, 1.0, 1e3, 1e6],
        [1e-3, 1.0, 1e3, 1e6],
        [1e-3, 1.0, 100.0],
        indexing="ij",
    )
    for p in (1.01, 1.05, 1.5, 1.95, 1.99):
        assert np.all(np.isfinite(tweedie_logpdf(y, mu, phi, p))), p


@pytest.mark.parametrize("p", [1.01, 1.5, 1.99])
def test_small_dispersion_approaches_saddlepoint(p):
    # Saddlepoint approximation (Jørgensen 1997, The Theory of Dispersion Models, §1.5;
    # Dunn & Smyth 2005, §3): log f = -½ log(2π phi y^p) - d(y, mu)/(2 phi) + O(1/j_max),
    # j_max = y^(2-p)/(phi(2-p)) >= 1e5 here. Measured: |difference| <= 8e-5.
    mu, phi = 1e6, 1e-3
    sd = np.sqrt(phi * mu**p)
    y = mu + sd * np.arange(-3.0, 3.5, 1.0)
    dev = 2 * (
        y ** (2 - p) / ((1 - p) * (2 - p)) - y * mu ** (1 - p) / (1 - p) + mu ** (2 - p) / (2 - p)
    )
    saddle = -0.5 * np.log(2 * np.pi * phi * y**p) - dev / (2 * phi)
    np.testing.assert_allclose(tweedie_logpdf(y, mu, phi, p), saddle, rtol=0, atol=1e-3)


def test_broadcasting_and_per_row_dispersion():
    # Interface contract: y, mu, phi broadcast; phi may vary by row (phi / w).
    y = np.array([0.0, 0.4, 1.0, 3.0])
    mu = np.array([[1.0], [2.5]])
    phi = np.array([0.5, 1.0, 2.0, 4.0])
    got = tweedie_logpdf(y, mu, phi, 1.6)
    assert got.shape == (2, 4)
    for i in range(2):
        for k in range(4):
            assert got[i, k] == tweedie_logpdf(y[k], mu[i, 0], phi[k], 1.6)
    assert tweedie_logpdf(1.0, 1.0, 1.0, 1.5).shape == ()


def test_independent_of_batching():
    # Streaming contract: a row's value must not depend on the batch it arrives in
    # (long arrays take the multi-threaded path, short ones the serial path).
    rng = np.random.default_rng(5)
    n = 50_000
    mu = np.exp(rng.normal(0.0, 1.5, n))
    y = np.where(rng.random(n) < 0.3, 0.0, mu * rng.gamma(2.0, 0.5, n))
    phi = rng.uniform(0.1, 5.0, n)
    whole = tweedie_logpdf(y, mu, phi, 1.4)
    pieces = [
        tweedie_logpdf(y[i : i + 1000], mu[i : i + 1000], phi[i : i + 1000], 1.4)
        for i in range(0, n, 1000)
    ]
    np.testing.assert_array_equal(whole, np.concatenate(pieces))
    assert np.all(np.isfinite(whole))


def test_support_and_invalid_arguments():
    # Support of the distribution is y >= 0; mu, phi > 0; 1 < p < 2 for this family.
    out = tweedie_logpdf([-1.0, np.inf, 1.0, 1.0, np.nan], [1, 1, -1, 1, 1], [1, 1, 1, 0, 1], 1.5)
    assert out[0] == -np.inf and out[1] == -np.inf
    assert np.all(np.isnan(out[2:]))
    for bad in (1.0, 2.0, 0.5, 2.5):
        with pytest.raises(ValueError):
            tweedie_logpdf(1.0, 1.0, 1.0, bad)


def test_term_cap_warns():
    # Module contract: when more terms than the cap are significant, say so.
    with pytest.warns(RuntimeWarning, match="truncated"):
        out = tweedie_logpdf(1e10, 1e10, 1e-5, 1.5)
    assert np.isfinite(out)
