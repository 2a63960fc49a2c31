"""State-carrying blockwise recursion.

References: scipy.signal.sosfilt (linearity in input and initial state, block-by-block
filtering with its returned states) and scipy.signal.sosfiltfilt on the whole signal.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from twinpass.core.carry import (
    carry_filtfilt,
    carry_states,
    filter_with_state,
    steady_state,
    transition_matrix,
    zero_state_pass,
)
from twinpass.core.effective import dominant_pole_radius, effective_length
from twinpass.errors import KernelError

R = 0.99999


def first_order_highpass(r: float) -> np.ndarray:
    # y[n] = g (x[n] - x[n-1]) + r y[n-1], unit gain at Nyquist (bilinear-style high-pass).
    return np.array([[(1 + r) / 2, -(1 + r) / 2, 0.0, 1.0, -r, 0.0]])


def second_order_highpass(r: float) -> np.ndarray:
    # Double zero at z = 1, double pole at z = r: the worst-conditioned 2nd-order case.
    g = (1 + r) ** 2 / 4
    return np.array([[g, -2 * g, g, 1.0, -2 * r, r * r]])


def butter_highpass_radius(r: float) -> np.ndarray:
    # 2nd-order Butterworth: pole radius ~ 1 - w/sqrt(2) for a small cutoff w (rad/sample).
    w = np.sqrt(2) * (1 - r)
    return signal.butter(2, w / np.pi, "highpass", output="sos")


FILTERS = {
    "first-order": first_order_highpass(R),
    "double-pole": second_order_highpass(R),
    "butterworth-2": butter_highpass_radius(R),
    "butterworth-4-cascade": signal.butter(4, 0.5, "highpass", fs=1000.0, output="sos"),
}


def make_signal(n: int, channels: int, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    x = 3.0 + rng.standard_normal((n, channels)) + np.sin(t / 50.0)[:, None]
    x[n // 2 :] += 1.5  # a step
    return x


EXTENDED = np.finfo(np.longdouble).eps < 1e-18
ILL_CONDITIONED = ("double-pole", "butterworth-2")


def extended_precision_filtfilt(sos: np.ndarray, x: np.ndarray, edge: str, n: int) -> np.ndarray:
    """sosfiltfilt's steps (extension, sosfilt_zi steady states, forward, backward) run by
    scipy.signal.sosfilt in numpy.longdouble: an estimate of the exact result."""
    ld = np.longdouble
    n = 0 if edge == "none" else n
    xl = x.astype(ld)
    if n:
        pad = {"odd": ("reflect", "odd"), "even": ("reflect", "even"), "constant": ("edge", None)}
        mode, kind = pad[edge]
        kw = {"reflect_type": kind} if kind else {}
        xl = np.pad(xl, ((n, n), (0, 0)), mode=mode, **kw)
    zi = signal.sosfilt_zi(sos).astype(ld)[:, :, None]
    y, _ = signal.sosfilt(sos.astype(ld), xl, axis=0, zi=zi * xl[0][None, None, :])
    y2, _ = signal.sosfilt(sos.astype(ld), y[::-1], axis=0, zi=zi * y[-1][None, None, :])
    y2 = y2[::-1]
    return y2[n : y2.shape[0] - n]


@pytest.mark.parametrize("name", list(FILTERS))
@pytest.mark.parametrize(
    "edge, edge_samples",
    [("odd", 1000), ("even", 0), ("constant", 5000), ("none", 0), ("odd", 99_999)],
)
def test_carry_filtfilt_matches_sosfiltfilt(name: str, edge: str, edge_samples: int) -> None:
    if name in ILL_CONDITIONED and not EXTENDED:
        pytest.skip("numpy.longdouble is float64 here: poles this close to 1 lose accuracy")
    sos = FILTERS[name]
    length = effective_length(sos=sos, tolerance=1e-9)
    n = 100_000
    block = max(1000, length // 50)
    if name != "butterworth-4-cascade":
        assert dominant_pole_radius(sos) == pytest.approx(R, abs=2e-7)
    # The halo would be 10 to 100 times the block: carrying states needs none.
    assert 10 * block <= length <= 100 * block
    x = make_signal(n, 3, seed=len(name))
    scale = np.abs(x).max()
    # Reference: scipy.signal.sosfiltfilt on the whole signal.
    ref = signal.sosfiltfilt(
        sos, x, axis=0, padtype=None if edge == "none" else edge, padlen=edge_samples
    )
    y = carry_filtfilt(sos, x, block, edge, edge_samples)
    assert y.shape == x.shape
    # For a double pole at 0.99999 sosfiltfilt's own float64 rounding reaches ~5e-9 of
    # full scale (measured against the same steps in extended precision), so the bound is
    # 1e-9 relative plus twice that measured rounding error of the reference itself.
    own_rounding = float(np.abs(ref - extended_precision_filtfilt(sos, x, edge, edge_samples)).max())
    assert np.abs(y - ref).max() <= 1e-9 * scale + 2 * own_rounding
    if name not in ILL_CONDITIONED:
        assert own_rounding <= 1e-11 * scale
        assert np.abs(y - ref).max() <= 1e-11 * scale


def test_carry_filtfilt_int_input_and_one_dimension() -> None:
    sos = signal.cheby2(6, 60, 0.05, output="sos")
    x = (make_signal(20_000, 1, seed=3)[:, 0] * 3000).astype(np.int16)
    # Reference: scipy.signal.sosfiltfilt in float64.
    ref = signal.sosfiltfilt(sos, x.astype(np.float64), padlen=300)
    y = carry_filtfilt(sos, x, 777, "odd", 300)
    assert y.shape == x.shape
    assert np.abs(y - ref).max() <= 1e-12 * np.abs(x).max()


def test_superposition_of_zero_state_and_transition() -> None:
    # sosfilt is linear in (x, zi): final(x, s) = final(x, 0) + F_L s.
    sos = signal.ellip(5, 0.5, 50, (0.1, 0.3), "bandpass", output="sos")
    rng = np.random.default_rng(1)
    x = rng.standard_normal((500, 4))
    s = rng.standard_normal((sos.shape[0], 2, 4))
    _, zf = signal.sosfilt(sos, x, axis=0, zi=s)
    f = transition_matrix(sos, 500)
    size = 2 * sos.shape[0]
    assert f.shape == (size, size)
    combined = zero_state_pass(sos, x).reshape(size, 4) + f @ s.reshape(size, 4)
    np.testing.assert_allclose(combined.reshape(zf.shape).astype(float), zf, rtol=0, atol=1e-12)
    # zero_state_pass is sosfilt from zero initial conditions.
    _, zf0 = signal.sosfilt(sos, x, axis=0, zi=np.zeros_like(s))
    np.testing.assert_allclose(zero_state_pass(sos, x), zf0, rtol=0, atol=1e-13)


def test_transition_matrices_compose() -> None:
    # State-space semigroup: F_(a+b) = F_b F_a (linear time-invariant recursion).
    sos = signal.butter(6, 0.02, output="sos")
    fa, fb, fab = (transition_matrix(sos, n) for n in (300, 700, 1000))
    np.testing.assert_allclose((fb @ fa).astype(float), fab.astype(float), rtol=0, atol=1e-12)
    assert transition_matrix(sos, 0).astype(float).tolist() == np.eye(6).tolist()


def test_carry_states_equal_sequential_sosfilt() -> None:
    # Carried states equal the states scipy.signal.sosfilt returns block by block.
    sos = signal.cheby1(4, 1, 0.01, output="sos")
    x = make_signal(9000, 2)
    bounds = [(a, min(a + 1000, 9000)) for a in range(0, 9000, 1000)]
    s0 = steady_state(sos, x[0])
    np.testing.assert_allclose(
        s0, signal.sosfilt_zi(sos)[:, :, None] * x[0][None, None, :], rtol=1e-15
    )
    states = carry_states(s0, [zero_state_pass(sos, x[a:b]) for a, b in bounds],
                          transition_matrix(sos, 1000))
    assert len(states) == len(bounds)
    s = s0
    pieces = []
    for (a, b), carried in zip(bounds, states):
        np.testing.assert_allclose(carried, s, rtol=0, atol=1e-10 * np.abs(s).max())
        y, _ = filter_with_state(sos, x[a:b], carried)
        pieces.append(y)
        _, s = signal.sosfilt(sos, x[a:b], axis=0, zi=s)
    whole, _ = signal.sosfilt(sos, x, axis=0, zi=s0)
    np.testing.assert_allclose(np.concatenate(pieces), whole, rtol=0, atol=1e-11)


def test_carry_argument_errors() -> None:
    sos = signal.butter(2, 0.1, output="sos")
    with pytest.raises(KernelError, match="block length"):
        carry_filtfilt(sos, np.ones((100, 1)), 0, "odd", 10)
    with pytest.raises(KernelError, match="below the signal length"):
        carry_filtfilt(sos, np.ones((100, 1)), 10, "odd", 100)
    with pytest.raises(KernelError, match="match"):
        carry_states(np.zeros((1, 2, 1)), [np.zeros((2, 2, 1))] * 2, transition_matrix(sos, 5))
