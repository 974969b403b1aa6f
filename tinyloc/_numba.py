"""Numba flags in one place, and the settings that keep kernels, FFTs and memory friendly.

``tinyloc/__init__.py`` imports this module, so it runs before any tinyloc module imports numba. Kernels use
``@njit(**JIT)`` (or ``PJIT`` for parallel ones): compiled (njit is nopython), cached on disk so a
second start-up does not recompile, and releasing the GIL.
"""

from __future__ import annotations

import importlib.abc
import os
import sys

# numba's OpenMP worker threads spin after a parallel region and steal the core
# from FFT threads; a passive wait policy gives it back. Must be set before the
# threading layer loads, so set it at import if the user has not chosen.
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

# njit is always nopython; passing nopython= again makes numba >= 0.59 warn on stderr.
JIT = dict(cache=True, nogil=True, fastmath=False)
PJIT = dict(cache=True, nogil=True, fastmath=False, parallel=True)


class _SkipNumbaBlasProbe(importlib.abc.MetaPathFinder):
    """Refuse ``scipy.linalg`` to numba's import-time BLAS probe, and to nothing else.

    ``import numba`` calls ``numba.np.linalg.ensure_blas``, which imports ``scipy.linalg``
    (LAPACK and BLAS, about 17 MB resident measured here) whenever SciPy is installed, only to learn
    whether ``np.dot`` may be compiled. No tinyloc kernel uses BLAS, and the robot's memory
    goal (250 MB for the whole loop) is tight. Any other import of ``scipy.linalg`` (a test,
    a user's script) is untouched. ``TINYLOC_NUMBA_BLAS=1`` keeps numba's BLAS support.
    """

    def find_spec(self, name, path=None, target=None):
        if name != "scipy.linalg":
            return None
        frame = sys._getframe(1)
        while frame is not None:
            if frame.f_code.co_name == "ensure_blas" and frame.f_globals.get("__name__") == "numba.np.linalg":
                raise ImportError("scipy.linalg withheld from numba's BLAS probe by tinyloc._numba")
            frame = frame.f_back
        return None


if os.environ.get("TINYLOC_NUMBA_BLAS") != "1" and "numba" not in sys.modules:
    if not any(isinstance(f, _SkipNumbaBlasProbe) for f in sys.meta_path):
        sys.meta_path.insert(0, _SkipNumbaBlasProbe())
