"""The diagnostics' robust and clustered meats, accumulated over row chunks, equal the meat of
the whole score matrix computed by kernels.meat (the reference written for the fit)."""

import numpy as np
import pytest

from specflow import kernels
from specflow.diag_core import Core
from specflow.diagnostics import Design


def design(cov: str, ndim: int, n: int = 5003, seed: int = 7) -> Design:
    rng = np.random.default_rng(seed)
    Z = rng.normal(size=(n, 3))
    u = rng.normal(size=n)
    X = (Z @ np.array([0.5, 0.2, 0.1]) + 0.5 * u + rng.normal(size=n))[:, None]
    y = 0.3 * X[:, 0] + u + rng.normal(size=n) * (1 + np.abs(Z[:, 0]))
    cols = [rng.integers(0, 37, n), rng.integers(0, 11, n)][:ndim]
    cl = kernels.Clusters.from_columns(cols) if cov == "cluster" else None
    return Design(y=y, X=X, Z=Z, k_exog=2, covariance=cov, clusters=cl, endog_names=("x",),
                  instr_names=("z1", "z2", "z3"), beta=np.array([0.3]), estimator="2sls")


@pytest.mark.parametrize("cov,ndim", [("robust", 1), ("cluster", 1), ("cluster", 2)])
def test_chunked_meat_equals_whole(monkeypatch, cov, ndim):
    d = design(cov, ndim)
    whole = Core(d)
    S = whole._scores(slice(0, d.n))
    ref = kernels.meat(S, cov, d.clusters, k=0)
    monkeypatch.setattr(Core, "CHUNK", 701)  # several chunks, the last one short
    chunked = Core(d)
    m0, raw = chunked.meats
    np.testing.assert_allclose(m0, ref, rtol=1e-10, atol=1e-12)
    if cov == "robust":
        np.testing.assert_allclose(raw, S.T @ S, rtol=1e-10)
