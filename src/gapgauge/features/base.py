"""Array helpers every feature shares: the NaN-row probe and the disturbance-onset index."""

from __future__ import annotations

import numpy as np


def rows_with_nan(*arrays: np.ndarray) -> np.ndarray:
    """``(nbatch,)`` bool: rows holding a NaN in any of the ``(nbatch x nstep)`` arrays."""
    bad = np.zeros(arrays[0].shape[0], dtype=bool)
    for a in arrays:
        # A row sum is NaN exactly when the row holds a NaN (or both infinities): one fast pass.
        bad |= np.isnan(np.sum(a, axis=1))
    return bad


def onset_index(t: np.ndarray, onset: float) -> int:
    """Index of the first sample at or after ``onset`` (s) in ``t (nstep,) s``; the last sample if none."""
    return min(int(np.searchsorted(t, onset, side="left")), len(t) - 1)
