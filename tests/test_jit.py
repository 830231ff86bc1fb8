"""detector._jit: numba imported without the scipy.linalg import it starts with, and numba code
that needs BLAS still working afterwards (numpy's own ``np.dot`` is the reference)."""

import subprocess
import sys
import textwrap
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def run_fresh(code: str) -> str:
    """``code`` in a fresh interpreter (numba must not be imported yet); its standard output."""
    done = subprocess.run([sys.executable, "-c", textwrap.dedent(code)], cwd=ROOT,
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    return done.stdout


def test_numba_loads_without_scipy_linalg_and_blas_code_still_compiles():
    out = run_fresh("""
        import sys
        import numpy as np
        from detector._jit import kernel, numba_module

        @kernel(cache=False)
        def total(a):
            s = 0
            for v in a:
                s += v
            return s

        assert total(np.arange(5)) == 10         # a compiled loop, as the scan's and training's
        print("linalg after loop:", "scipy.linalg" in sys.modules)
        import numba.np.arraymath
        print("flag:", numba.np.arraymath._HAVE_BLAS)
        numba = numba_module()

        @numba.njit(cache=False)
        def dot(a, b):
            return np.dot(a, b)

        a = np.arange(12.0).reshape(3, 4)
        b = np.linspace(-1.0, 1.0, 8).reshape(4, 2)
        np.testing.assert_allclose(dot(a, b), a @ b, rtol=1e-12)
        print("linalg after dot:", "scipy.linalg.cython_blas" in sys.modules)
    """)
    assert out.splitlines() == [
        "linalg after loop: False", "flag: True", "linalg after dot: True"]


def test_scipy_linalg_loaded_first_is_left_alone():
    out = run_fresh("""
        import scipy.linalg
        import numba.np.arraymath
        from detector._jit import numba_module
        numba_module()
        print(numba.np.arraymath._HAVE_BLAS)
    """)
    assert out.strip() == "True"
