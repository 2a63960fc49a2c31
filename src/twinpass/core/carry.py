"""Exact blockwise recursion by carrying filter states between blocks (no halo).

Conventions: signals are time-major, shape (samples, channels), float64. A filter *state*
is what ``scipy.signal.sosfilt(sos, x, axis=0, zi=...)`` takes and returns for such an
``x``: shape (n_sections, 2, channels). Its flattened form, one column per channel, is
``state.reshape(2 * n_sections, channels)`` (section-major, then the section's two delays).

Method. ``sosfilt`` is linear in the pair (input, initial state). Filtering a block of
``L`` samples from the state ``s`` therefore ends in the state

    final = final_0 + F_L @ s

where ``final_0`` is the final state of the block filtered from the zero state and ``F_L``
(shape (2 n_sections, 2 n_sections)) holds, in column ``j``, the final state after
filtering ``L`` zeros from the unit state ``e_j``. The cascade couples the sections (each
section's input is the previous section's output), so ``F_L`` is built from the full
flattened state, not section by section. Passes:

1. per block, in parallel: ``final_0`` (:func:`zero_state_pass`);
2. sequentially, cheap: ``s_{b+1} = final_0[b] + F_L @ s_b`` (:func:`carry_states`), a scan
   of a linear recurrence -- G. E. Blelloch, "Prefix sums and their applications",
   CMU-CS-90-190, Carnegie Mellon University, 1990; D. Nehab, A. Maximo, R. S. Lima and
   H. Hoppe, "GPU-efficient recursive filtering and summed-area tables", ACM Transactions
   on Graphics 30(6), 2011;
3. per block, in parallel: filter from the carried state (:func:`filter_with_state`).

The two-pass result applies this to the forward pass and then to the reversed forward
output, reproducing ``scipy.signal.sosfiltfilt`` to rounding whatever the filter's
effective length.

Precision. For poles close to 1 the transposed direct-form state is ill-conditioned:
``F_L`` has entries of order ``L`` and a zero-state pass drifts far from the states a
continuous run visits, so float64 rounding in steps 1 and 2 grows by orders of magnitude
(measured: ~50x the whole-signal rounding error for a double pole at radius 0.99999).
Steps 1 and 2 therefore run in ``numpy.longdouble`` (80-bit extended precision on x86-64
Linux; on platforms where it equals float64 such filters lose that accuracy). States are
handed out as float64, which is enough; ``F_L`` stays in extended precision.
"""

from __future__ import annotations

from collections.abc import Sequence
from functools import lru_cache

import numpy as np
from scipy import signal

from twinpass.core.kernel import extend, unit_steady_state
from twinpass.errors import KernelError

__all__ = [
    "seam_before",
    "steady_state",
    "zero_state_pass",
    "transition_matrix",
    "carry_states",
    "filter_with_state",
    "carry_filtfilt",
]


def seam_before(previous_core_samples: int | None, seam_samples: int) -> int:
    """Samples a carry-mode block reads before its core for the seam check: the
    ``seam_samples`` outputs before its start (its previous block's last ones), at most that
    block's length; 0 for the segment's first block (``previous_core_samples`` None).

    Parameters
    ----------
    previous_core_samples : int or None
        Core length (samples) of the block just before in the segment; None when there is none.
    seam_samples : int
        ``[checks] seam_samples``.
    """
    return 0 if previous_core_samples is None else min(int(seam_samples), int(previous_core_samples))


def _as_2d(x: np.ndarray) -> np.ndarray:
    x = np.asarray(x, dtype=np.float64)
    if x.ndim == 1:
        x = x[:, None]
    if x.ndim != 2:
        raise KernelError(f"signals must be (samples, channels); got shape {x.shape}.")
    return x


def _as_sos(sos: np.ndarray) -> np.ndarray:
    sos = np.asarray(sos, dtype=np.float64)
    if sos.ndim != 2 or sos.shape[1] != 6:
        raise KernelError(f"sos must have shape (n_sections, 6); got {sos.shape}.")
    return sos


def steady_state(sos: np.ndarray, level: np.ndarray) -> np.ndarray:
    """Steady state for a constant input ``level`` per channel.

    Parameters
    ----------
    sos : ndarray, shape (n_sections, 6)
    level : ndarray, shape (channels,)
        Input value per channel (e.g. the first sample of the extended signal).

    Returns
    -------
    ndarray, shape (n_sections, 2, channels)
        ``scipy.signal.sosfilt_zi(sos)`` scaled by ``level``.
    """
    zi = unit_steady_state(sos=_as_sos(sos))
    return zi[:, :, None] * np.asarray(level, dtype=np.float64)[None, None, :]


def zero_state_pass(sos: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Final state of one forward pass over a block started from the zero state.

    Parameters
    ----------
    sos : ndarray, shape (n_sections, 6)
    x : ndarray, shape (samples, channels)
        The block (time-major).

    Returns
    -------
    ndarray, shape (n_sections, 2, channels), float64
        Computed in extended precision (``numpy.longdouble``), see the module notes.
    """
    sos, x = _as_sos(sos), _as_2d(x)
    zi = np.zeros((sos.shape[0], 2, x.shape[1]), dtype=np.longdouble)
    _, zf = signal.sosfilt(sos.astype(np.longdouble), x.astype(np.longdouble), axis=0, zi=zi)
    return zf.astype(np.float64)


@lru_cache(maxsize=32)
def _transition_cached(sos_bytes: bytes, n_sections: int, length: int) -> np.ndarray:
    sos = np.frombuffer(sos_bytes, dtype=np.float64).reshape(n_sections, 6).astype(np.longdouble)
    size = 2 * n_sections
    # Column j of the identity, reshaped to a state, is the unit state e_j: filter zeros
    # from all of them at once, one "channel" per unit state.
    zi = np.eye(size, dtype=np.longdouble).reshape(n_sections, 2, size)
    if length == 0:
        f = np.eye(size, dtype=np.longdouble)
        f.setflags(write=False)
        return f
    _, zf = signal.sosfilt(sos, np.zeros((length, size), dtype=np.longdouble), axis=0, zi=zi)
    f = zf.reshape(size, size)
    f.setflags(write=False)
    return f


def transition_matrix(sos: np.ndarray, length: int) -> np.ndarray:
    """State transition over ``length`` samples of zero input.

    Parameters
    ----------
    sos : ndarray, shape (n_sections, 6)
    length : int
        Block length (samples), >= 0.

    Returns
    -------
    ndarray, shape (2 n_sections, 2 n_sections), numpy.longdouble, read-only
        ``F`` with ``final_state_flat = F @ initial_state_flat`` for a zero input. Cached
        per (coefficients, length): blocks of equal length share one matrix. Kept in
        extended precision (rounding it to float64 spoils the carried states of filters with
        poles near 1).
    """
    sos = np.ascontiguousarray(_as_sos(sos))
    if int(length) < 0:
        raise KernelError(f"block length must be >= 0 samples; got {length}.")
    return _transition_cached(sos.tobytes(), sos.shape[0], int(length))


def carry_states(
    initial_state: np.ndarray,
    zero_state_finals: Sequence[np.ndarray],
    transitions: np.ndarray | Sequence[np.ndarray],
) -> list[np.ndarray]:
    """Initial state of every block from the first block's initial state (the scan).

    Parameters
    ----------
    initial_state : ndarray, shape (n_sections, 2, channels)
        State at the start of block 0.
    zero_state_finals : sequence of ndarray, each (n_sections, 2, channels)
        :func:`zero_state_pass` of each block, in order (the last one is not needed).
    transitions : ndarray or sequence of ndarray, each (2 n_sections, 2 n_sections)
        :func:`transition_matrix` of each block's length, or one matrix for all blocks.

    Returns
    -------
    list of ndarray, each (n_sections, 2, channels), float64
        ``states[0] = initial_state``; ``states[b+1] = finals[b] + F_b @ states[b]``, one per
        block (``len(zero_state_finals)`` entries). The recurrence runs in extended precision.
    """
    state = np.asarray(initial_state, dtype=np.longdouble)
    shape = state.shape
    size = shape[0] * shape[1]
    single = isinstance(transitions, np.ndarray) and transitions.ndim == 2
    states = [state.astype(np.float64)]
    for b in range(len(zero_state_finals) - 1):
        f = np.asarray(transitions if single else transitions[b], dtype=np.longdouble)
        final = np.asarray(zero_state_finals[b], dtype=np.longdouble)
        if final.shape != shape or f.shape != (size, size):
            raise KernelError(
                f"block {b}: state shape {final.shape} and transition shape {f.shape} do not "
                f"match the initial state {shape}; use the same filter for every block."
            )
        state = (final.reshape(size, -1) + f @ state.reshape(size, -1)).reshape(shape)
        states.append(state.astype(np.float64))
    return states


def filter_with_state(sos: np.ndarray, x: np.ndarray, zi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """One forward pass over a block from a known state.

    Parameters
    ----------
    sos : ndarray, shape (n_sections, 6)
    x : ndarray, shape (samples, channels)
    zi : ndarray, shape (n_sections, 2, channels)

    Returns
    -------
    y : ndarray, shape (samples, channels), float64
    zf : ndarray, shape (n_sections, 2, channels)
    """
    y, zf = signal.sosfilt(_as_sos(sos), _as_2d(x), axis=0, zi=np.asarray(zi, dtype=np.float64))
    return y, zf


def _one_pass_blockwise(
    sos: np.ndarray, u: np.ndarray, bounds: list[tuple[int, int]], zi: np.ndarray
) -> np.ndarray:
    """One pass over ``u`` from state ``zi``, run as the three carry steps over ``bounds``."""
    finals = [zero_state_pass(sos, u[a:b]) for a, b in bounds]  # step 1, parallel per block
    transitions = [transition_matrix(sos, b - a) for a, b in bounds[:-1]]  # cached per length
    states = carry_states(zi, finals, transitions)  # step 2, sequential and cheap
    return np.concatenate(
        [filter_with_state(sos, u[a:b], s)[0] for (a, b), s in zip(bounds, states)]
    )  # step 3, parallel per block


def carry_filtfilt(
    sos: np.ndarray, x: np.ndarray, block_length: int, edge: str, edge_samples: int
) -> np.ndarray:
    """Two-pass filtering of an in-memory signal by blocks with carried states.

    Reference driver of the carry steps; equal to ``scipy.signal.sosfiltfilt(sos, x, axis=0,
    padtype=edge, padlen=edge_samples)`` (``edge="none"``: ``padtype=None``) to rounding.

    Parameters
    ----------
    sos : ndarray, shape (n_sections, 6)
    x : ndarray, shape (samples, channels) or (samples,)
        Any integer or float dtype; computed in float64.
    block_length : int
        Samples per block (>= 1).
    edge : {"odd", "even", "constant", "none"}
        End extension.
    edge_samples : int
        Extension length per end (samples), < ``samples``.

    Returns
    -------
    ndarray, float64, same shape as ``x``

    Notes
    -----
    Forward: the extended signal ``ext`` from the state ``sosfilt_zi * ext[0]``. Backward:
    the reversed forward output from ``sosfilt_zi * y_f[-1]``. Each pass runs the three
    steps of this module over blocks ``[k * block_length, (k + 1) * block_length)`` of ``x``
    (the first and last block also carry the end extension); an engine runs steps 1 and 3
    per block in parallel and persists the carried states and the forward output between
    them.
    """
    one_d = np.ndim(x) == 1
    sos, u = _as_sos(sos), _as_2d(x)
    if int(block_length) < 1:
        raise KernelError(f"block length must be >= 1 sample; got {block_length}.")
    n = 0 if edge == "none" else int(edge_samples)
    if not 0 <= n < u.shape[0]:
        raise KernelError(
            f"edge samples ({edge_samples}) must be >= 0 and below the signal length "
            f"({u.shape[0]}); lower them (see resolve_edge_samples)."
        )
    ext = extend(u, n, edge)
    # Blocks cut the signal at multiples of block_length, as output chunks would; the
    # extension belongs to the first and the last block.
    cuts = [n + k for k in range(0, u.shape[0], int(block_length))][1:]
    edges = [0, *cuts, ext.shape[0]]
    bounds = list(zip(edges[:-1], edges[1:]))
    y_f = _one_pass_blockwise(sos, ext, bounds, steady_state(sos, ext[0]))
    total = ext.shape[0]
    reverse_bounds = [(total - b, total - a) for a, b in reversed(bounds)]
    y_b = _one_pass_blockwise(sos, y_f[::-1], reverse_bounds, steady_state(sos, y_f[-1]))
    y = y_b[::-1]
    if n > 0:
        y = y[n:-n]
    y = np.ascontiguousarray(y)
    return y[:, 0] if one_d else y
