"""The fast helpers of realopt.simulation.lsm give the very floats of the numpy calls they
replace (the simulation results must not move by a bit when the per-date overhead is cut)."""
import numpy as np
from hypothesis import given, settings, strategies as st
from hypothesis.extra.numpy import arrays

from realopt.simulation import lsm

floats = st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False, width=64)


@settings(max_examples=300, deadline=None)
@given(arrays(np.float64, st.integers(1, 200), elements=floats),
       st.one_of(st.floats(0.0, 1.0), st.sampled_from([0.0, 0.5, 0.75, 1.0, 1.0 - 0.25])))
def test_quantile_is_numpys_to_the_bit(a, q):
    # reference: numpy.quantile, default method 'linear' (Hyndman & Fan 1996, definition 7)
    ref = float(np.quantile(a, q))
    before = a.copy()
    got = lsm.quantile(a, q)
    assert got == ref and np.signbit(got) == np.signbit(ref)
    assert np.array_equal(a, before)          # the input is left as it was


def test_quantile_known_values():
    # Hyndman & Fan (1996) definition 7: Q(p) = x[floor(h)] + (h - floor(h)) (x[floor(h)+1] -
    # x[floor(h)]) with h = (n - 1) p on the sorted sample
    a = np.array([4.0, 1.0, 3.0, 2.0])
    assert lsm.quantile(a, 0.5) == 2.5
    assert lsm.quantile(a, 0.75) == 3.25
    assert lsm.quantile(a, 1.0) == 4.0 and lsm.quantile(a, 0.0) == 1.0
    assert np.isnan(lsm.quantile(np.array([1.0, np.nan]), 0.5))


@settings(max_examples=100, deadline=None)
@given(st.integers(1, 6), st.integers(1, 4), st.integers(1, 50), st.integers(0, 2 ** 32 - 1))
def test_predict_all_matches_predict_row_by_row(k, m, n, seed):
    rng = np.random.default_rng(seed)
    rows = rng.standard_normal((k, n))
    coefs = rng.standard_normal((k, m)) * 10 ** rng.uniform(-3, 3, (k, m))
    got = lsm.predict_all(rows, coefs)
    for j in range(m):
        assert np.array_equal(got[j], lsm.predict(rows, coefs[:, j]))


@settings(max_examples=500, deadline=None)
@given(st.integers(1, 21), st.integers(1, 5), st.integers(1, 300), st.integers(0, 2 ** 32 - 1),
       st.booleans())
def test_predict_all_keeps_signed_zeros(k, m, n, seed, zeros):
    # the summation order is predict's, so even the sign of a zero sum is the same
    rng = np.random.default_rng(seed)
    rows = rng.standard_normal((k, n))
    coefs = rng.standard_normal((k, m)) * 10 ** rng.uniform(-8, 8, (k, m))
    if zeros:
        rows[:, rng.random(n) < 0.3] = -0.0
        coefs[rng.random((k, m)) < 0.3] = 0.0
    got = lsm.predict_all(rows, coefs)
    for j in range(m):
        ref = lsm.predict(rows, coefs[:, j])
        assert np.array_equal(got[j], ref) and np.array_equal(np.signbit(got[j]), np.signbit(ref))
