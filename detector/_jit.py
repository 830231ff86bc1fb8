"""Compiled loops that cost nothing until they run.

Every compiled loop in patchwood is declared with :func:`kernel` instead of ``numba.njit``. The
decorator keeps the plain function and imports numba (about 0.2 s, and as much again for its
typing tables and the scipy.linalg import they pull in) only when a kernel is first called, so
a command that does not run a loop, or runs only loops compiled ahead of time
(:mod:`detector._aot`), never imports numba.

When called, a :class:`Kernel` runs, in this order:

1. on the main thread, the same loop compiled ahead of time into ``detector/_aot_kernels*.so``
   by ``make`` (:mod:`detector._aot`), when that module exists, was built from the current
   sources, and has a version for the arguments' exact types. Those versions hold Python's
   global interpreter lock while they run (numba's ahead-of-time compiler has no ``nogil``), so
   other threads (mining on ``--jobs`` threads, a Dask worker's tasks) use numba's loops, which
   release it: two threads scanning with the ahead-of-time versions ran at 0.93 times the speed
   of one, with numba's at 1.99;
2. else the numba dispatcher, made on first use with the options given (``cache=True`` loops
   load from numba's cache, as before).

A kernel that calls other kernels is compiled from a copy of its function whose globals hold
their numba dispatchers (:func:`bind_callees`), so compiled loops still call and inline each
other; elsewhere numba types a kernel as its dispatcher (the ``typeof`` rule below).
"""

from __future__ import annotations

import functools
import threading

__all__ = ["Kernel", "bind_callees", "kernel", "numba_module"]

_lock = threading.RLock()
_registered = False


def _by_name(module: str, qualname: str):
    import importlib

    return getattr(importlib.import_module(module), qualname)


def numba_module():
    """numba, imported, with :class:`Kernel` known to its typing (once per process)."""
    global _registered
    numba = _import_numba()

    if not _registered:
        with _lock:
            if not _registered:
                from numba.core import types
                from numba.extending import typeof_impl

                @typeof_impl.register(Kernel)
                def _typeof_kernel(val, c):
                    return types.Dispatcher(val.dispatcher())

                _registered = True
    return numba


def _import_numba():
    """``import numba``, and its array implementations (which the first compiled or cached loop
    loads), without the scipy.linalg import they start with.

    On import, ``numba.np.arraymath`` imports ``scipy.linalg.cython_blas`` only to learn whether
    ``np.dot`` may call BLAS (``_HAVE_BLAS``; 0.15-0.2 s of a command's start, about a third of
    numba's whole import). No compiled loop of patchwood calls BLAS, so that import is held back
    while numba loads and the flag set from whether scipy is installed, as the import would have
    set it; numba imports scipy.linalg itself when a loop that needs it compiles
    (``numba.np.linalg.ensure_blas``), so other numba code in the process works as before
    (``tests/test_jit.py``). Where scipy.linalg is already loaded, nothing is held back."""
    import importlib.util
    import sys

    if "numba.np.arraymath" in sys.modules or "scipy.linalg.cython_blas" in sys.modules:
        import numba

        return numba
    sys.modules["scipy.linalg.cython_blas"] = None  # an import of it now raises ImportError
    try:
        import numba
        import numba.np.arraymath as arraymath
    finally:
        if sys.modules.get("scipy.linalg.cython_blas", 0) is None:
            del sys.modules["scipy.linalg.cython_blas"]
    arraymath._HAVE_BLAS = importlib.util.find_spec("scipy") is not None
    return numba


def bind_callees(func):
    """``func`` with numba's dispatcher in place of every kernel its code names: a copy of the
    function over a copy of its module's globals (the module itself is left as it is, so its names
    still reach the ahead-of-time versions). Numba inlines a callee declared
    ``inline="always"`` only when it finds a dispatcher there; typed through the ``typeof`` rule
    above, the callee was called instead of inlined, and the scan ran at half its speed."""
    import types

    found = func.__globals__
    bound = {name: found[name].dispatcher() for name in func.__code__.co_names
             if isinstance(found.get(name), Kernel)}
    if not bound:
        return func
    copy = types.FunctionType(func.__code__, {**found, **bound}, func.__name__, func.__defaults__,
                              func.__closure__)
    copy.__module__, copy.__qualname__, copy.__doc__ = func.__module__, func.__qualname__, func.__doc__
    return copy


class Kernel:
    """A compiled loop, compiled (or loaded) on first call. ``py_func`` is the plain function."""

    def __init__(self, func, options):
        self.py_func = func
        self.options = dict(options)
        self.name = f"{func.__module__}.{func.__qualname__}"
        self._dispatcher = None
        self._ahead = None  # None: not looked up yet; () when the module has no version
        functools.update_wrapper(self, func)

    def dispatcher(self):
        """The numba dispatcher (made once; numba compiles or loads from its cache on call)."""
        if self._dispatcher is None:
            with _lock:
                if self._dispatcher is None:
                    numba = numba_module()
                    self._dispatcher = numba.njit(**self.options)(bind_callees(self.py_func))
        return self._dispatcher

    def __call__(self, *args):
        if self._ahead is None:
            from detector import _aot

            self._ahead = _aot.versions(self.name)
        # main_thread() asked each time: after a fork from another thread, that thread is main
        if self._ahead and threading.current_thread() is threading.main_thread():
            for accepts, function in self._ahead:
                if accepts(args):
                    return function(*args)
        return self.dispatcher()(*args)

    def __reduce__(self):
        # pickled by name, as a plain function is (a compiled module's functions do not pickle)
        return _by_name, (self.py_func.__module__, self.py_func.__qualname__)

    def __repr__(self):
        return f"<kernel {self.name}>"


def kernel(**options):
    """``numba.njit(**options)``, compiled on first call (see the module's text).

    >>> @kernel(cache=False)
    ... def add(a, b):
    ...     return a + b
    >>> add(2, 3), add.py_func(2, 3)
    (5, 5)
    """
    def wrap(func):
        return Kernel(func, options)
    return wrap
