"""The vectorised backward sums of the O2 weights against the recurrence they replace.

``simulator._step.reach_weights`` computes V_i = Σ_(m≥i) W_m·a^(m−i) for every chamber with
one reversed cumulative sum; the reference is the recurrence V_i = W_i + a·V_(i+1) run per
chamber with ``scipy.signal.lfilter`` (what the simulator used before). They must agree to
1e-12 relative over the sub-step counts and exchange rates a rack meets, and the end O2 of a
whole segment must not move.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import lfilter

from simulator._physics import lag_weights
from simulator._step import o2_end_weights, reach_weights


def reference(weights: np.ndarray, keep: np.ndarray) -> np.ndarray:
    out = np.empty_like(weights)
    for c in range(len(keep)):
        out[c, ::-1] = lfilter([1.0], [1.0, -keep[c]], weights[c, ::-1])
    return out


@pytest.mark.parametrize("n", [1, 2, 10, 60, 600, 3600])
def test_reach_weights_agree_with_the_recurrence(n: int) -> None:
    rng = np.random.default_rng(n)
    # exchange rates from none (closed chamber) to a fast flush, s⁻¹; sub-steps of 0.5–1 s
    k = np.array([0.0, 1e-6, 3e-4, 2e-3, 0.02, 0.2, *rng.uniform(0.0, 5e-3, 4)])
    h = 1.0 if n != 600 else 0.5
    keep = np.exp(-k * h)
    _, w = lag_weights(rng.uniform(0.0, 120.0, len(k)), h, n)
    weights = np.ascontiguousarray(w.T)
    powers = np.exp(-np.arange(n + 1, dtype=float)[None, :] * (k * h)[:, None])
    got = reach_weights(weights, keep, powers)
    want = reference(weights, keep)
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-300)


def test_reach_weights_fall_back_where_powers_would_underflow() -> None:
    # k·h·n = 2·3600: a^n is 0 in doubles, so the scaled sums cannot be used
    n, keep = 3600, np.array([np.exp(-2.0), np.exp(-1e-3)])
    weights = np.full((2, n + 1), 0.25)
    powers = np.exp(-np.arange(n + 1, dtype=float)[None, :] * -np.log(keep)[:, None])
    assert powers[0, -1] == 0.0
    got = reach_weights(weights, keep, powers)
    assert np.isfinite(got).all()
    np.testing.assert_allclose(got, reference(weights, keep), rtol=1e-12)
    # V_n = W_n, and far from the end V settles at W/(1 − a) for constant W
    assert got[0, -1] == 0.25
    assert got[0, 0] == pytest.approx(0.25 / (1.0 - keep[0]), rel=1e-12)


def test_o2_end_weights_unchanged_for_a_one_minute_segment() -> None:
    n, h = 60, 1.0
    k = np.array([0.0, 4e-4, 1.5e-3, 0.01])
    optode_end, w = lag_weights(np.array([0.0, 8.0, 20.0, 45.0]), h, n)
    optode_w = np.ascontiguousarray(w.T)
    got, keep, phi = o2_end_weights(k, h, n, optode_w, optode_end)
    # the same weights built from the per-chamber recurrence
    want = got.copy()
    reach = reference(optode_w, keep)
    fresh = -np.expm1(-k * h)
    want[1, :, :n] = phi[:, None] * reach[:, 1:]
    want[1, :, n : 2 * n] = -want[1, :, :n]
    want[1, :, 2 * n : 3 * n] = fresh[:, None] * reach[:, 1:]
    want[1, :, 3 * n] = reach[:, 0]
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=0.0)
    assert not np.array_equal(got[1], np.zeros_like(got[1]))
