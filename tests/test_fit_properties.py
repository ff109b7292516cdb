"""Property tests of the fit on simulated data with a known effect (invented data).

The data-generating process: an unobserved confounder ``u`` raises (or lowers) both the
treatment ``x`` and the outcome ``y``; the instrument ``z`` shifts ``x`` and affects ``y``
only through it. With a constant effect ``beta`` the IV estimand is ``beta``; OLS is biased
by ``gamma * delta * Var(u) / Var(x)`` (the omitted-variable formula), so its bias has the
sign of ``gamma * delta``.

Then: numerical trouble (a constant outcome, collinear instruments, an instrument equal to a
control, a single-level cluster, no rows left) is recorded as ``status == "failed"`` with a
reason naming the column, never raised.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from specflow.fit import fit
from specflow.grid import Specification

N = 2000
SETTINGS = settings(max_examples=25, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow])


def make_spec(**kw) -> Specification:
    base = dict(id="p", dataset="d", dataset_path="d.csv", outcome="y", endogenous=("x",),
                instruments=("z",), controls=("c",), covariance="robust")
    base.update(kw)
    return Specification(**base)


def simulate(seed, beta, pi, gamma, delta, n=N) -> pd.DataFrame:
    """y = 1 + beta x + 0.5 c + gamma u + e;  x = pi z + 0.3 c + delta u + v;  u unobserved."""
    rng = np.random.default_rng(seed)
    z, c, u, e, v = rng.normal(size=(5, n))
    g = rng.integers(0, 50, n)
    x = pi * z + 0.3 * c + delta * u + v
    y = 1.0 + beta * x + 0.5 * c + gamma * u + e * (0.5 + 0.5 * np.abs(z))
    return pd.DataFrame(dict(y=y, x=x, z=z, c=c, g=g))


confounding = st.floats(0.7, 1.2).flatmap(lambda a: st.sampled_from([a, -a]))


@SETTINGS
@given(seed=st.integers(0, 2**32 - 1), beta=st.floats(-2.0, 2.0), pi=st.floats(0.5, 1.5),
       gamma=confounding, delta=confounding,
       estimator=st.sampled_from(["2sls", "liml", "fuller", "gmm"]),
       covariance=st.sampled_from(["unadjusted", "robust", "cluster"]))
def test_iv_recovers_effect_and_ols_is_biased(seed, beta, pi, gamma, delta, estimator, covariance):
    df = simulate(seed, beta, pi, gamma, delta)
    sp = make_spec(estimator=estimator, covariance=covariance,
                   cluster=("g",) if covariance == "cluster" else ())
    r = fit(sp, df, diagnose=False)
    assert r.status == "ok", r.reason
    iv, ols = r.iv.term("x"), r.ols.term("x")
    # IV within 5 SEs of the truth (a strong instrument: first-stage t of 20 or more)
    assert abs(iv.estimate - beta) < 5 * iv.se
    # OLS biased in the direction of the confounding, by more than its own noise:
    # bias >= 0.49 / 4.7 = 0.10 and OLS SE <= 0.03 on this design
    bias = ols.estimate - beta
    assert np.sign(bias) == np.sign(gamma * delta)
    assert abs(bias) > 2 * ols.se
    # the first stage finds the instrument's coefficient
    fs = r.first_stages[0].term("z")
    assert abs(fs.estimate - pi) < 5 * fs.se
    assert r.nobs == N


@SETTINGS
@given(seed=st.integers(0, 2**32 - 1), beta=st.floats(-2.0, 2.0), pi=st.floats(0.3, 1.5),
       estimator=st.sampled_from(["2sls", "liml", "gmm"]))
def test_just_identified_iv_is_ratio_of_reduced_form_to_first_stage(seed, beta, pi, estimator):
    """Indirect least squares: with one instrument, the IV coefficient is the reduced-form
    coefficient over the first-stage coefficient (exactly), and LIML's kappa is 1."""
    df = simulate(seed, beta, pi, 1.0, 1.0)
    r = fit(make_spec(estimator=estimator), df, diagnose=False)
    assert r.status == "ok", r.reason
    ratio = r.reduced_form.term("z").estimate / r.first_stages[0].term("z").estimate
    assert r.iv.term("x").estimate == pytest.approx(ratio, rel=1e-9)
    if estimator == "liml":
        assert r.iv.kappa == pytest.approx(1.0, abs=1e-9)


@SETTINGS
@given(seed=st.integers(0, 2**32 - 1), scale=st.floats(0.01, 100.0),
       covariance=st.sampled_from(["unadjusted", "robust", "cluster"]))
def test_rescaling_the_outcome_rescales_estimate_and_se(seed, scale, covariance):
    df = simulate(seed, 0.5, 1.0, 1.0, 1.0, n=500)
    sp = make_spec(covariance=covariance, cluster=("g",) if covariance == "cluster" else ())
    a = fit(sp, df, diagnose=False).iv.term("x")
    b = fit(sp, df.assign(y=df["y"] * scale), diagnose=False).iv.term("x")
    assert b.estimate == pytest.approx(a.estimate * scale, rel=1e-9)
    assert b.se == pytest.approx(a.se * scale, rel=1e-9)
    assert b.p == pytest.approx(a.p, rel=1e-6, abs=1e-300)


# ---------------------------------------------------------------------------------------------
# Numerical trouble is recorded, not raised


@pytest.fixture(scope="module")
def small() -> pd.DataFrame:
    df = simulate(7, 0.5, 1.0, 1.0, 1.0, n=300)
    df["z2"] = 2.0 * df["z"]  # collinear with z
    df["z3"] = 2.0 * df["z"] - 1.0  # collinear with z and the constant
    df["z_c"] = df["c"]  # an instrument identical to the control c
    df["x_c"] = df["c"] * 3.0  # an endogenous regressor proportional to the control c
    df["y_const"] = 4.2
    df["one_group"] = "all"
    return df


FAILURES = [
    ("constant outcome", dict(outcome="y_const"), ["y_const"]),
    ("collinear instruments", dict(instruments=("z", "z2")), ["z2"]),
    ("cluster with one level", dict(covariance="cluster", cluster=("one_group",)),
     ["one_group"]),
]


@pytest.mark.parametrize("estimator", ["2sls", "liml", "gmm"])
@pytest.mark.parametrize("what,change,named", FAILURES, ids=[f[0] for f in FAILURES])
def test_failure_is_recorded_with_the_column(small, what, change, named, estimator):
    r = fit(make_spec(estimator=estimator, **change), small, diagnose=False)
    assert r.status == "failed"
    assert r.iv is None
    for col in named:
        assert f"'{col}'" in r.reason, r.reason
    assert "\n" not in r.reason


def test_instrument_collinear_with_instrument_and_constant_names_the_instrument(small):
    r = fit(make_spec(instruments=("z", "z3")), small, diagnose=False)
    assert r.status == "failed"
    assert "'z3'" in r.reason, r.reason


def test_instrument_identical_to_control_names_the_instrument(small):
    r = fit(make_spec(instruments=("z_c",)), small, diagnose=False)
    assert r.status == "failed"
    assert "'z_c'" in r.reason, r.reason
    assert "instrument" in r.reason


def test_instrument_identical_to_control_is_recorded(small):
    """Whatever the wording, the failure is recorded (not raised) and names a column of it."""
    r = fit(make_spec(instruments=("z_c",)), small, diagnose=False)
    assert r.status == "failed"
    assert "'z_c'" in r.reason or "'c'" in r.reason


def test_endogenous_proportional_to_control_names_the_regressor(small):
    r = fit(make_spec(endogenous=("x_c",)), small, diagnose=False)
    assert r.status == "failed"
    assert "'x_c'" in r.reason, r.reason


def test_all_rows_filtered_out(small):
    r = fit(make_spec(filters=("y > 1000",)), small, diagnose=False)
    assert r.status == "failed"
    assert "no rows" in r.reason and "filter" in r.reason


def test_all_rows_filtered_out_names_the_filter(small):
    r = fit(make_spec(filters=("z > -5", "y > 1000")), small, diagnose=False)
    assert "y > 1000" in r.reason or "'y'" in r.reason, r.reason


def test_all_rows_missing(small):
    df = small.assign(c=np.nan)
    r = fit(make_spec(), df, diagnose=False)
    assert r.status == "failed"
    assert "no rows" in r.reason


def test_non_numeric_column(small):
    df = small.assign(c=["a"] * len(small))
    r = fit(make_spec(), df, diagnose=False)
    assert r.status == "failed"
    assert "'c'" in r.reason and "not numeric" in r.reason


def test_too_few_observations(small):
    r = fit(make_spec(), small.head(2), diagnose=False)
    assert r.status == "failed"
    assert "too few observations" in r.reason
