"""The models' elementwise helpers against numpy's and scipy's own functions
(general-purpose reference implementations of the same mathematics)."""
from __future__ import annotations

import numpy as np
from scipy.special import expit

from sorbrank.worker.models.elementwise import logistic, softplus, zero_at_origin

Z = np.concatenate([np.linspace(-800.0, 800.0, 4001), [-np.inf, np.inf, 0.0, 1e-300, -1e-300],
                    np.geomspace(1e-12, 700.0, 500), -np.geomspace(1e-12, 700.0, 500)])


def test_softplus_is_logaddexp_with_zero():
    with np.errstate(all="ignore"):
        expected = np.logaddexp(0.0, Z)
        got = softplus(Z)
    assert np.array_equal(np.isinf(got), np.isinf(expected))
    finite = np.isfinite(expected)
    np.testing.assert_allclose(got[finite], expected[finite], rtol=4e-16, atol=0.0)
    assert np.all(np.isfinite(softplus(np.array([709.0, 710.0, 1e300]))))  # no overflow


def test_logistic_is_expit():
    with np.errstate(all="ignore"):
        got = logistic(Z)
    np.testing.assert_allclose(got, expit(Z), rtol=4e-16, atol=0.0)
    assert logistic(np.array([-1000.0]))[0] == 0.0 and logistic(np.array([1000.0]))[0] == 1.0


def test_zero_at_origin_only_touches_nonpositive_pressures():
    x = np.array([[0.0, 1.0, 2.0], [3.0, 4.0, 5.0]])
    values = np.array([[np.nan, 1.0, 2.0], [3.0, 4.0, 5.0]])
    out = zero_at_origin(values, x)
    assert out.tolist() == [[0.0, 1.0, 2.0], [3.0, 4.0, 5.0]]
    positive = np.array([[1.0, 2.0]])
    same = np.array([[7.0, np.nan]])
    assert zero_at_origin(same, positive) is same   # nothing to mend: untouched
    assert zero_at_origin(np.float64(5.0), 0.0) == 0.0 and zero_at_origin(np.float64(5.0), 2.0) == 5.0
