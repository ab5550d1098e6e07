"""The REML criterion's analytic gradient and Hessian in log λ against central differences
(common practice for checking derivative code), on a problem with a single penalty and a
pair of overlapping penalties (as a surface has)."""

from __future__ import annotations

import numpy as np
import pytest

from tallgam.solve import smoothing as sm


def second_difference(k: int) -> np.ndarray:
    d = np.diff(np.eye(k), 2, axis=0)
    return d.T @ d


@pytest.mark.parametrize("scale", [None, 2.0])
def test_reml_gradient_and_hessian_match_finite_differences(scale):
    rng = np.random.default_rng(0)
    p = 20
    X = rng.normal(size=(200, p))
    blocks = [
        sm.PenaltyBlock(sl=slice(2, 10), matrices=[second_difference(8)], first=0),
        sm.PenaltyBlock(sl=slice(10, 20), matrices=[
            np.kron(second_difference(5), np.eye(2)),
            np.kron(np.eye(5), np.array([[1.0, -1.0], [-1.0, 1.0]]))], first=1),
    ]
    prob = sm.WorkingProblem(A=X.T @ X, u=5 * rng.normal(size=p), e=1000.0,
                             anchor=np.zeros(p), blocks=blocks, n=200, scale=scale)
    crit = sm._Criterion(prob, "reml", np.ones(3), np.ones(3, bool), 1.0)
    rho = np.array([0.3, -1.0, 2.0])
    _, grad, _ = crit(rho)
    hess = crit.last_hessian
    h = 1e-5
    grad_fd = np.array([(crit(rho + h * e)[0] - crit(rho - h * e)[0]) / (2 * h)
                        for e in np.eye(3)])
    hess_fd = np.array([(crit(rho + h * e)[1] - crit(rho - h * e)[1]) / (2 * h)
                        for e in np.eye(3)])
    assert np.max(np.abs(grad - grad_fd)) < 1e-6
    assert np.max(np.abs(hess - hess_fd)) < 1e-7 * max(1.0, np.max(np.abs(hess)))


def test_separable_penalties_use_closed_form_log_determinant():
    # two penalties on disjoint coordinates: log|λ1 S1 + λ2 S2|₊ = Σ rank·log λ + const
    s = second_difference(6)
    m1 = np.zeros((12, 12))
    m2 = np.zeros((12, 12))
    m1[:6, :6] = s
    m2[6:, 6:] = s
    blk = sm.PenaltyBlock(sl=slice(0, 12), matrices=[m1, m2], first=0)
    assert blk.groups == [[0], [1]] and blk.rank == 8
    lam = np.array([3.0, 0.25])
    value, grad, hess = blk.logdet(lam)
    direct = np.sum(np.log(np.linalg.eigvalsh(3.0 * s)[2:])) + np.sum(
        np.log(np.linalg.eigvalsh(0.25 * s)[2:]))
    assert value == pytest.approx(direct, rel=1e-12)
    assert list(grad) == [4, 4] and not hess.any()
