"""The hand-tuned hot paths of issue 15's speed work, each against an outside reference.

The speedups of this work were required to leave every result bit-identical; these checks hold
the rewritten pieces to what they stand for, independently of the code they replaced:

- the counter-based draws' mixing function is SplitMix64's finaliser: the reference generator's
  first outputs for seed 0 (Steele, Lea and Flood, OOPSLA 2014; Vigna's splitmix64.c; the four
  values from memory);
- the in-place quintic Hermite weights interpolate any polynomial of degree 5 exactly from its
  values and first two derivatives at the ends (a handbook property of Hermite interpolation;
  numpy.polynomial is the reference);
- the sort helper of the measurement build returns numpy's lexsort (or says the order holds);
- the row lookup's guess from the grid spacing returns what numpy.searchsorted returns, for
  regular and irregular instants, any period hint and instants off, on and around the rows.

The rewritten kernel paths (A3's pick, the RLM fast path, the scalar quality) are held by the
event kernel's agreement with the naive one, which implements the rules independently
(tests/test_kernel.py).
"""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.polynomial import Polynomial

from dwell.policies.base import Rows
from dwell.orbits.sky import _hermite_rate_weights, _hermite_weights
from dwell.radio.measure import _lexsort
from dwell.radio.noise import _mix

GOLDEN = 0x9E3779B97F4A7C15


def test_mix_is_splitmix64_finaliser_reference_outputs_for_seed_0():
    # splitmix64.c: state += golden; return finalise(state); first four outputs from state 0
    # (from memory: 0xe220a8397b1dcdaf, 0x6e789e6aa1b965f4, 0x06c45d188009454f, 0xf88bb8a8724c81ec)
    expected = [0xE220A8397B1DCDAF, 0x6E789E6AA1B965F4, 0x06C45D188009454F, 0xF88BB8A8724C81EC]
    states = np.array([(k * GOLDEN) % 2 ** 64 for k in range(1, 5)], dtype=np.uint64)
    assert [int(v) for v in _mix(states.copy())] == expected


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(-5, 5), min_size=6, max_size=6), st.floats(0.0, 1.0))
def test_hermite_weights_reproduce_any_quintic_exactly(coef, s):
    # quintic Hermite interpolation from (p, p', p'') at both ends is exact for degree <= 5
    p = Polynomial(coef)
    d1, d2 = p.deriv(1), p.deriv(2)
    data = np.array([p(0.0), d1(0.0), d2(0.0), p(1.0), d1(1.0), d2(1.0)])
    w = _hermite_weights(np.array([s]))[0]
    dw = _hermite_rate_weights(np.array([s]))[0]
    # tolerance: a sum of six terms of size <= 5 * 25 in double precision
    assert abs(float(w @ data) - p(s)) < 1e-11
    assert abs(float(dw @ data) - d1(s)) < 1e-10


def test_hermite_weights_keep_the_shape_of_their_argument():
    for shape in [(), (4,), (2, 3)]:
        s = np.full(shape, 0.25)
        assert _hermite_weights(s).shape == shape + (6,)
    assert np.array_equal(_hermite_weights(np.array([0.0, 1.0])),
                          [[1, 0, 0, 0, 0, 0], [0, 0, 0, 1, 0, 0]])   # the end values


@settings(max_examples=200, deadline=None)
@given(st.integers(0, 3), st.integers(1, 3), st.booleans(), st.randoms(use_true_random=False))
def test_lexsort_helper_is_numpys_lexsort(n_levels, n_keys, presorted, rnd):
    # numpy.lexsort is the reference (stable, last key primary); None means "already in order"
    n = rnd.randint(0, 12)
    keys = tuple(np.array([rnd.randint(0, n_levels) for _ in range(n)]) for _ in range(n_keys))
    if presorted and n:
        order = np.lexsort(keys)
        keys = tuple(k[order] for k in keys)
    got = _lexsort(keys)
    ref = np.lexsort(keys) if n else np.zeros(0, np.int64)
    assert np.array_equal(np.arange(n) if got is None else got, ref)


@settings(max_examples=300, deadline=None)
@given(st.integers(1, 40), st.floats(0.05, 5.0), st.integers(0, 10 ** 6), st.booleans(),
       st.sampled_from([None, "true", "wrong"]), st.floats(-10.0, 250.0),
       st.randoms(use_true_random=False))
def test_row_lookup_is_searchsorted(n, period_s, k0, jitter, hint, t_probe, rnd):
    # numpy.searchsorted(side="right") - 1, clipped to the rows: the latest row at or before t
    t = (k0 + np.arange(n)) * period_s
    if jitter:        # irregular instants: the guess is wrong and must fall back
        t = np.sort(t + np.array([rnd.uniform(-0.4, 0.4) * period_s for _ in range(n)]))
    sat = np.zeros((n, 1), dtype=np.int64)
    z = np.zeros((n, 1))
    rows = Rows(k0, t, sat, sat, z, z, z, z, z, z, z, z)
    period = {None: None, "true": period_s, "wrong": 1.7 * period_s}[hint]
    probes = [float(t[0]) + t_probe, float(t[rnd.randrange(n)]),
              np.nextafter(float(t[rnd.randrange(n)]), -np.inf), -np.inf, np.inf]
    for tp in probes:
        want = min(max(int(np.searchsorted(t, tp, side="right")) - 1, 0), n - 1)
        assert rows.row_at(tp, period) == want
