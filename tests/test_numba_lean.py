"""numba's import-time BLAS probe must not pull SciPy's LAPACK into the robot's process.

numba imports ``scipy.linalg`` when SciPy is installed, only to know whether ``np.dot`` may be
compiled; tinyloc's kernels use no BLAS, and that import costs about 17 MB of the loop's 250 MB
goal (measured with ``tinyloc bench loop``: 283 -> 266 MB resident). Each case runs in a fresh
interpreter, because the probe happens once per process.
"""

import os
import subprocess
import sys

import pytest

scipy = pytest.importorskip("scipy", reason="SciPy is not installed: numba's probe has nothing to import")

PROBE = """
import sys
import tinyloc
from numba import njit
assert njit(lambda x: x + 1)(1) == 2          # a dispatch loads numba's array maths, where the probe lives
print('scipy.linalg' in sys.modules)
import scipy.linalg                            # later users of SciPy are not affected
print(scipy.linalg.det([[1.0, 2.0], [3.0, 4.0]]))
"""


def _run(env_value):
    env = dict(os.environ, TINYLOC_NUMBA_BLAS=env_value)
    out = subprocess.run([sys.executable, "-c", PROBE], capture_output=True, text=True, env=env, timeout=300)
    assert out.returncode == 0, out.stderr[-2000:]
    return out.stdout.split()


def test_numba_probe_does_not_import_scipy_linalg():
    loaded, det = _run("0")
    assert loaded == "False"
    assert abs(float(det) + 2.0) < 1e-12  # 1*4 - 2*3, worked by hand


def test_opt_out_keeps_numba_blas():
    loaded, _ = _run("1")
    assert loaded == "True"  # the opt-out really leaves numba's probe alone: the check above can fail
