"""Numba flags in one place, and the threading settings that keep kernels and FFTs friendly.

Import this module before numba compiles anything in tinyloc. Kernels use
``@njit(**JIT)`` (or ``PJIT`` for parallel ones): compiled (njit is nopython), cached on disk so a
second start-up does not recompile, and releasing the GIL.
"""

from __future__ import annotations

import os

# numba's OpenMP worker threads spin after a parallel region and steal the core
# from FFT threads; a passive wait policy gives it back. Must be set before the
# threading layer loads, so set it at import if the user has not chosen.
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

# njit is always nopython; passing nopython= again makes numba >= 0.59 warn on stderr.
JIT = dict(cache=True, nogil=True, fastmath=False)
PJIT = dict(cache=True, nogil=True, fastmath=False, parallel=True)
