"""Family and link functions against outside implementations.

Deviances against scikit-learn's ``mean_*_deviance`` metrics (and statsmodels' GLM families
where scikit-learn has none), variance functions and log-likelihoods against the
distributions of ``scipy.stats``, links against statsmodels' link classes, a numerical
derivative (``scipy.differentiate``) and DuckDB's own evaluation of the SQL inverse.
"""

from __future__ import annotations

import duckdb
import numpy as np
import pytest
import statsmodels.api as sm
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from scipy.differentiate import derivative
from sklearn import metrics

import tallgam as tg
from tallgam.errors import SpecError
from tallgam.families.links import LINKS

N = 2000
TWEEDIE_POWERS = (1.05, 1.2, 1.5, 1.8, 1.95)


def _rng(seed: int) -> np.random.Generator:
    return np.random.default_rng(seed)


def _counts(rng, n=N):
    return rng.poisson(rng.uniform(0.2, 6.0, n)).astype(float)


def _positive(rng, n=N):
    return rng.gamma(2.0, 1.5, n)


def _means(rng, n=N):
    return rng.uniform(0.05, 8.0, n)


def _rel(a, b) -> float:
    return float(abs(a - b) / abs(b))


# ---------------------------------------------------------------------------------------
# deviance


@pytest.mark.parametrize("weighted", [False, True])
def test_poisson_deviance_matches_sklearn(weighted):
    # Reference: sklearn.metrics.mean_poisson_deviance (y may be 0).
    rng = _rng(1)
    y, mu = _counts(rng), _means(rng)
    w = rng.uniform(0.1, 3.0, N) if weighted else None
    fam = tg.get_family("poisson")
    ref = metrics.mean_poisson_deviance(y, mu, sample_weight=w)
    ours = fam.deviance(y, mu, w) / (N if w is None else w.sum())
    assert _rel(ours, ref) < 1e-12
    assert _rel(np.mean(fam.unit_deviance(y, mu)), metrics.mean_poisson_deviance(y, mu)) < 1e-12


@pytest.mark.parametrize("weighted", [False, True])
def test_gamma_deviance_matches_sklearn(weighted):
    # Reference: sklearn.metrics.mean_gamma_deviance.
    rng = _rng(2)
    y, mu = _positive(rng), _means(rng)
    w = rng.uniform(0.1, 3.0, N) if weighted else None
    fam = tg.get_family("gamma")
    ref = metrics.mean_gamma_deviance(y, mu, sample_weight=w)
    ours = fam.deviance(y, mu, w) / (N if w is None else w.sum())
    assert _rel(ours, ref) < 1e-12


@pytest.mark.parametrize("power", TWEEDIE_POWERS)
def test_tweedie_deviance_matches_sklearn(power):
    # Reference: sklearn.metrics.mean_tweedie_deviance(power=p), y with exact zeros.
    rng = _rng(3)
    y = np.where(rng.uniform(size=N) < 0.4, 0.0, _positive(rng))
    mu = _means(rng)
    w = rng.uniform(0.1, 3.0, N)
    fam = tg.get_family("tweedie", power=power)
    ref = metrics.mean_tweedie_deviance(y, mu, sample_weight=w, power=power)
    assert _rel(fam.deviance(y, mu, w) / w.sum(), ref) < 1e-12


@pytest.mark.parametrize("power", TWEEDIE_POWERS)
def test_tweedie_unit_deviance_row_by_row(power):
    # Reference: sklearn.metrics.mean_tweedie_deviance on one row is that row's unit
    # deviance; checks every row, not just the sum.
    rng = _rng(4)
    y = np.where(rng.uniform(size=200) < 0.3, 0.0, _positive(rng, 200))
    mu = _means(rng, 200)
    ours = tg.get_family("tweedie", power=power).unit_deviance(y, mu)
    ref = np.array([metrics.mean_tweedie_deviance(y[i:i + 1], mu[i:i + 1], power=power)
                    for i in range(200)])
    np.testing.assert_allclose(ours, ref, rtol=1e-10, atol=1e-13)


@pytest.mark.parametrize("name, power", [("gaussian", 0), ("poisson", 1), ("gamma", 2),
                                         ("inverse_gaussian", 3)])
def test_deviance_is_tweedie_deviance_at_integer_power(name, power):
    # Reference: sklearn.metrics.mean_tweedie_deviance with power 0 (normal), 1 (Poisson),
    # 2 (gamma) and 3 (inverse Gaussian), the members of the Tweedie class.
    rng = _rng(5)
    y = _counts(rng) if name == "poisson" else _positive(rng)
    mu = _means(rng)
    w = rng.uniform(0.1, 3.0, N)
    fam = tg.get_family(name)
    ref = metrics.mean_tweedie_deviance(y, mu, sample_weight=w, power=power)
    assert _rel(fam.deviance(y, mu, w) / w.sum(), ref) < 1e-12


def test_binomial_deviance_matches_sklearn_log_loss():
    # Reference: sklearn.metrics.log_loss; for 0/1 outcomes the binomial deviance is twice
    # the summed log loss.
    rng = _rng(6)
    mu = rng.uniform(0.01, 0.99, N)
    y = (rng.uniform(size=N) < mu).astype(float)
    w = rng.uniform(0.1, 3.0, N)
    ref = 2.0 * metrics.log_loss(y, mu, sample_weight=w, normalize=False, labels=[0.0, 1.0])
    assert _rel(tg.get_family("binomial").deviance(y, mu, w), ref) < 1e-12


def test_binomial_proportion_deviance_matches_statsmodels():
    # Reference: statsmodels.genmod.families.Binomial().deviance with var_weights = trials
    # (proportions y, trials as prior weights).
    rng = _rng(7)
    trials = rng.integers(1, 20, N).astype(float)
    mu = rng.uniform(0.02, 0.98, N)
    y = rng.binomial(trials.astype(int), mu) / trials
    ref = sm.families.Binomial().deviance(y, mu, var_weights=trials)
    assert _rel(tg.get_family("binomial").deviance(y, mu, trials), ref) < 1e-12


@pytest.mark.parametrize("theta", [0.3, 1.0, 5.0, 200.0])
def test_negative_binomial_deviance_matches_statsmodels(theta):
    # Reference: statsmodels.genmod.families.NegativeBinomial(alpha = 1/θ).deviance
    # (scikit-learn has no negative binomial deviance).
    rng = _rng(8)
    y, mu = _counts(rng), _means(rng)
    w = rng.uniform(0.1, 3.0, N)
    ref = sm.families.NegativeBinomial(alpha=1.0 / theta).deviance(y, mu, var_weights=w)
    fam = tg.get_family("negative_binomial", theta=theta)
    assert _rel(fam.deviance(y, mu, w), ref) < 1e-12


# ---------------------------------------------------------------------------------------
# variance functions: mean and variance of the scipy.stats distribution with mean μ and
# dispersion φ/w must be μ and φ·V(μ)/w.

PHI = 0.7


def _scipy_distribution(name: str, mu, phi_w, theta=None):
    """The scipy.stats distribution of a family with mean μ and dispersion φ/w."""
    if name == "gaussian":
        return stats.norm(mu, np.sqrt(phi_w))
    if name == "gamma":  # shape w/φ, scale μφ/w
        return stats.gamma(1.0 / phi_w, scale=mu * phi_w)
    if name == "inverse_gaussian":  # IG(μ, λ = w/φ) is invgauss(μ/λ, scale=λ)
        lam = 1.0 / phi_w
        return stats.invgauss(mu / lam, scale=lam)
    if name == "poisson":
        return stats.poisson(mu)
    if name == "negative_binomial":
        return stats.nbinom(theta, theta / (theta + mu))
    raise AssertionError(name)


@pytest.mark.parametrize("name", ["gaussian", "gamma", "inverse_gaussian"])
def test_variance_function_matches_scipy_continuous(name):
    # Reference: scipy.stats.norm / gamma / invgauss .mean() and .var().
    rng = _rng(9)
    mu, w = _means(rng, 50), rng.uniform(0.2, 4.0, 50)
    dist = _scipy_distribution(name, mu, PHI / w)
    np.testing.assert_allclose(dist.mean(), mu, rtol=1e-12)
    np.testing.assert_allclose(dist.var(), PHI * tg.get_family(name).variance(mu) / w,
                               rtol=1e-12)


@pytest.mark.parametrize("name, theta", [("poisson", None), ("negative_binomial", 0.4),
                                         ("negative_binomial", 3.0)])
def test_variance_function_matches_scipy_counts(name, theta):
    # Reference: scipy.stats.poisson / nbinom .mean() and .var() (φ = 1).
    rng = _rng(10)
    mu = _means(rng, 50)
    dist = _scipy_distribution(name, mu, 1.0, theta)
    fam = tg.get_family(name) if theta is None else tg.get_family(name, theta=theta)
    np.testing.assert_allclose(dist.mean(), mu, rtol=1e-12)
    np.testing.assert_allclose(dist.var(), fam.variance(mu), rtol=1e-12)


def test_binomial_variance_matches_scipy():
    # Reference: scipy.stats.binom(n, p).var() / n² is the variance of a proportion,
    # V(μ)/w with w = n trials.
    rng = _rng(11)
    mu = rng.uniform(0.01, 0.99, 50)
    n = rng.integers(1, 30, 50).astype(float)
    np.testing.assert_allclose(stats.binom(n, mu).var() / n ** 2,
                               tg.get_family("binomial").variance(mu) / n, rtol=1e-12)


@pytest.mark.parametrize("power", TWEEDIE_POWERS)
def test_tweedie_variance_matches_statsmodels(power):
    # Reference: statsmodels.genmod.families.Tweedie(var_power=p).variance.
    mu = _means(_rng(12), 50)
    np.testing.assert_allclose(tg.get_family("tweedie", power=power).variance(mu),
                               sm.families.Tweedie(var_power=power).variance(mu), rtol=1e-12)


# ---------------------------------------------------------------------------------------
# log-likelihoods: Σ log f(yᵢ; μᵢ, φ/wᵢ) against scipy.stats logpdf / logpmf sums


@pytest.mark.parametrize("name", ["gaussian", "gamma", "inverse_gaussian"])
def test_loglik_matches_scipy_continuous(name):
    # Reference: scipy.stats.norm.logpdf / gamma.logpdf / invgauss.logpdf with per-row
    # dispersion φ/w (parametrisations in _scipy_distribution).
    rng = _rng(13)
    mu, w = _means(rng), rng.uniform(0.2, 4.0, N)
    dist = _scipy_distribution(name, mu, PHI / w)
    y = dist.rvs(random_state=rng)
    ref = float(np.sum(dist.logpdf(y)))
    assert _rel(tg.get_family(name).loglik(y, mu, w, PHI), ref) < 1e-10


@pytest.mark.parametrize("name, theta", [("poisson", None), ("negative_binomial", 0.4),
                                         ("negative_binomial", 3.0)])
def test_loglik_matches_scipy_counts(name, theta):
    # Reference: scipy.stats.poisson.logpmf / nbinom.logpmf; integer prior weights act as
    # frequencies (w identical rows), so the reference is Σ w · logpmf.
    rng = _rng(14)
    mu = _means(rng)
    w = rng.integers(1, 4, N).astype(float)
    dist = _scipy_distribution(name, mu, 1.0, theta)
    y = dist.rvs(random_state=rng).astype(float)
    fam = tg.get_family(name) if theta is None else tg.get_family(name, theta=theta)
    ref = float(np.sum(w * dist.logpmf(y)))
    assert _rel(fam.loglik(y, mu, w, 1.0), ref) < 1e-10


def test_loglik_matches_scipy_binomial():
    # Reference: scipy.stats.binom.logpmf(successes, trials, μ) with y = successes/trials
    # and the trials as prior weights; 0/1 rows (one trial) included.
    rng = _rng(15)
    mu = rng.uniform(0.02, 0.98, N)
    trials = np.where(rng.uniform(size=N) < 0.3, 1, rng.integers(1, 25, N)).astype(float)
    k = rng.binomial(trials.astype(int), mu).astype(float)
    ref = float(np.sum(stats.binom.logpmf(k, trials, mu)))
    assert _rel(tg.get_family("binomial").loglik(k / trials, mu, trials, 1.0), ref) < 1e-10


# ---------------------------------------------------------------------------------------
# links

SM_LINKS = {
    "identity": sm.families.links.Identity,
    "log": sm.families.links.Log,
    "logit": sm.families.links.Logit,
    "probit": sm.families.links.Probit,
    "cloglog": sm.families.links.CLogLog,
    "inverse": sm.families.links.InversePower,
    "inverse_squared": sm.families.links.InverseSquared,
    "sqrt": sm.families.links.Sqrt,
}

# A mean domain per link where statsmodels' formulas keep full precision too.
MEANS = {
    "identity": np.linspace(-50.0, 50.0, 201),
    "log": np.geomspace(1e-6, 1e6, 201),
    "logit": np.linspace(1e-4, 1 - 1e-4, 201),
    "probit": np.linspace(1e-4, 1 - 1e-4, 201),
    "cloglog": np.linspace(1e-4, 1 - 1e-4, 201),
    "inverse": np.r_[np.geomspace(1e-3, 1e3, 100), -np.geomspace(1e-3, 1e3, 100)],
    "inverse_squared": np.geomspace(1e-3, 1e3, 201),
    "sqrt": np.geomspace(1e-6, 1e6, 201),
}


def test_every_link_is_covered():
    assert set(LINKS) == set(SM_LINKS) == set(MEANS)


@pytest.mark.parametrize("name", sorted(SM_LINKS))
def test_link_matches_statsmodels(name):
    # Reference: statsmodels.genmod.families.links (g, g⁻¹ and dμ/dη = inverse_deriv).
    ours, ref = tg.get_link(name), SM_LINKS[name]()
    mu = MEANS[name]
    eta = ref(mu)
    np.testing.assert_allclose(ours.link(mu), eta, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(ours.inverse(eta), ref.inverse(eta), rtol=1e-12)
    np.testing.assert_allclose(ours.mu_eta(eta), ref.inverse_deriv(eta), rtol=1e-10)


def _mean_strategy(name: str):
    unit = st.floats(1e-12, 1 - 1e-12)
    positive = st.floats(1e-100, 1e100)
    return {
        "identity": st.floats(-1e12, 1e12),
        "log": positive,
        "logit": unit,
        "probit": unit,
        "cloglog": unit,
        "inverse": st.one_of(positive, positive.map(lambda v: -v)),
        "inverse_squared": st.floats(1e-50, 1e50),
        "sqrt": positive,
    }[name]


@pytest.mark.parametrize("name", sorted(LINKS))
@settings(max_examples=150, deadline=None)
@given(data=st.data())
def test_link_round_trip(name, data):
    # Property (definition of a link): g⁻¹(g(μ)) = μ over the link's mean domain.
    mu = np.array([data.draw(_mean_strategy(name))])
    lnk = tg.get_link(name)
    np.testing.assert_allclose(lnk.inverse(lnk.link(mu)), mu, rtol=1e-11)


@pytest.mark.parametrize("name", sorted(LINKS))
@settings(max_examples=60, deadline=None)
@given(data=st.data())
def test_mu_eta_is_derivative_of_inverse(name, data):
    # Reference: scipy.differentiate.derivative (adaptive finite differences with an error
    # estimate) of the inverse link, at η = g(μ) over a moderate mean range.
    lo_hi = {"identity": (-1e3, 1e3), "logit": (1e-4, 1 - 1e-4), "probit": (1e-4, 1 - 1e-4),
             "cloglog": (1e-4, 1 - 1e-4)}.get(name, (1e-3, 1e3))
    mu = data.draw(st.floats(*lo_hi))
    if name == "inverse" and data.draw(st.booleans()):
        mu = -mu
    lnk = tg.get_link(name)
    eta = float(lnk.link(np.array([mu]))[0])
    # first step a tenth of |η|, so the differences never cross the pole of 1/η or 1/√η
    # (1e-3 when that underflows to zero: a denormal η such as 5e-324)
    res = derivative(lnk.inverse, eta, initial_step=0.1 * abs(eta) or 1e-3)
    got = float(lnk.mu_eta(np.array([eta]))[0])
    assert got == pytest.approx(float(res.df), rel=1e-7, abs=1e-300)


@pytest.mark.parametrize("name", sorted(LINKS))
def test_sql_inverse_matches_duckdb(name):
    # Reference: DuckDB evaluates the exported SQL text of g⁻¹; it must agree with the
    # numpy inverse used in fitting (probit is refused: DuckDB has no normal CDF).
    lnk = tg.get_link(name)
    eta = SM_LINKS[name]()(MEANS[name])
    if name == "probit":
        with pytest.raises(SpecError):
            lnk.sql_inverse("eta")
        return
    con = duckdb.connect()
    con.register("t", {"i": np.arange(eta.size), "eta": eta})
    got = np.array([r[0] for r in con.execute(
        f"SELECT {lnk.sql_inverse('eta')} FROM t ORDER BY i").fetchall()])
    np.testing.assert_allclose(got, lnk.inverse(eta), rtol=1e-13)
