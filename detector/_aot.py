"""The scan's compiled loops built ahead of time, so that `patchwood scan` starts without numba.

Importing numba and loading a cached loop costs a command about 0.6 s before its first image
(numba itself, its typing tables, the scipy.linalg import those pull in), several times the scan
of a 640 x 480 frame. ``make`` therefore compiles the loops a scan runs, for the argument types a
scan passes, into an extension module beside this file, with numba's ahead-of-time compiler
(``numba.pycc``; it needs a C compiler and Python's headers)::

    .venv/bin/python -m detector._aot          # writes detector/_aot_kernels*.so and .json

:class:`detector._jit.Kernel` calls a version from that module when one takes the arguments'
exact types (dtype, dimensions, contiguity; the compiled code does not check them itself), and
numba's own compiled loop otherwise. The module is used only when the side file's SHA-256 of
:data:`SOURCES` matches the sources as they are now: a module built from older loops is ignored,
never run. Without the module (no compiler, or a numba without ``pycc``) everything works as
before, only the first scan of a command waits for numba.

The tests hold every version in the module equal to numba's own loop on the same arguments
(``tests/test_aot.py``).
"""

from __future__ import annotations

import hashlib
import json
import threading
from pathlib import Path

import numpy as np

__all__ = ["EXPORTS", "SOURCES", "build", "missing_tools", "module_info", "sources_sha256", "versions"]

HERE = Path(__file__).resolve().parent
#: The extension module's name (inside the ``detector`` package).
MODULE = "_aot_kernels"
#: Files whose text decides the compiled loops: the exported kernels' modules and every module
#: whose kernels they call (``tests/test_aot.py`` checks the list is complete).
SOURCES = ("scan/_kernels.py", "geometry.py", "features/_channel_kernels.py", "_jit.py")

_ARRAY_1 = "{}[::1]"
_II = ("int32", "uint32", "float64")  # the integral image's dtypes (detector.scan.integral_dtype)


def _scan_scale(ii: str) -> str:
    a = _ARRAY_1.format
    return ("Tuple((int64, int64))(" + ", ".join([
        a(ii), a("float64"), "int64", a("int64"), a("int64"), a("int64"), "float64", "float64",
        "float64", "boolean", "int64[:, ::1]", "float64[:, ::1]", a("int64"), a("float64"),
        a("float64"), "int64[:, ::1]", "float64[:, ::1]", "float64[:, ::1]", a("float64"),
        "float64",
        a("float64"), a("int64"), a("int64"), a("float64")]) + ")")


def _scan_frame(ii: str) -> str:
    a = _ARRAY_1.format
    return ("Tuple((int64, int64))(" + ", ".join([
        a(ii), a("float64"), "int64", a("int64"), a("int64"), a("int64"), a("int64"),
        "int64[:, ::1]", a("float64"), "float64", "float64", "boolean", "int64[:, :, ::1]",
        "float64[:, :, ::1]", "int64[:, ::1]", "float64[:, ::1]", a("float64"), "int64[:, ::1]",
        "float64[:, ::1]", "float64[:, ::1]", a("float64"), "float64", a("float64"), a("int64"),
        a("int64"), a("float64"), a("int64")]) + ")")


#: What the module holds: kernel (module.qualname) -> the signatures a scan calls it with.
EXPORTS = {
    "detector.scan._kernels.scan_scale": [_scan_scale(t) for t in _II],
    "detector.scan._kernels.scan_frame": [_scan_frame(t) for t in _II],
    "detector.scan._kernels.finish": [
        "Tuple((float64[:, ::1], float64[::1]))(int64[::1], int64[::1], int64[::1], "
        "float64[::1], float64[:, ::1], int64, float64, float64, float64, float64, float64)"],
    "detector.features._channel_kernels.gradient_planes": [
        "uint8[:, :, ::1](uint8[:, ::1], int64, uint8[:, :, ::1])"],
    "detector.geometry._nms_numba": ["int64[::1](float64[:, ::1], int64[::1], float64)"],
    "detector.scan._kernels.area_shrink": [
        f"uint8[:, ::1]({t}[:, ::1], float64[::1], float64[::1], uint8[:, ::1])" for t in _II],
}


def sources_sha256() -> str:
    """SHA-256 of the :data:`SOURCES` files' bytes, in that order."""
    h = hashlib.sha256()
    for name in SOURCES:
        h.update(name.encode() + b"\0" + (HERE / name).read_bytes() + b"\0")
    return h.hexdigest()


def processor() -> str:
    """The processor the module is compiled for and may run on: its model name as Linux reports
    it (``/proc/cpuinfo``), else :func:`platform.processor`, with :func:`platform.machine` and a
    digest of the instruction-set flags (code compiled for one set may not run on another)."""
    import platform

    name = flags = ""
    try:
        with open("/proc/cpuinfo", encoding="utf-8", errors="replace") as fh:
            for line in fh:
                if line.startswith("model name") and not name:
                    name = line.split(":", 1)[1].strip()
                elif line.startswith("flags") and not flags:
                    flags = hashlib.sha256(line.split(":", 1)[1].strip().encode()).hexdigest()[:12]
                if name and flags:
                    break
    except OSError:
        pass
    return " ".join(v for v in (platform.machine(), name or platform.processor(), flags) if v)


def _arg_spec(ty) -> list:
    """One argument's type as a small JSON list: ``["array", dtype, ndim, contiguous]`` or
    ``["int"]``, ``["float"]``, ``["bool"]``."""
    from numba.core import types

    if isinstance(ty, types.Array):
        return ["array", np.dtype(str(ty.dtype)).str, ty.ndim, ty.layout == "C"]
    if isinstance(ty, types.Boolean):
        return ["bool"]
    if isinstance(ty, types.Integer):
        return ["int"]
    if isinstance(ty, types.Float):
        return ["float"]
    raise TypeError(f"no ahead-of-time argument rule for {ty}")


def _export_name(kernel: str, i: int) -> str:
    return kernel.rsplit(".", 1)[1].lstrip("_") + f"__{i}"


def missing_tools() -> str | None:
    """What the ahead-of-time build lacks on this machine (a C compiler, Python's headers), or
    None."""
    import os
    import shutil
    import sysconfig

    compiler = os.environ.get("CC", "cc").split()[0]
    if shutil.which(compiler) is None:
        return f"no C compiler ({compiler})"
    if not (Path(sysconfig.get_paths()["include"]) / "Python.h").is_file():
        return "no Python headers (Python.h; Debian: python3-dev)"
    try:
        import numba.pycc  # noqa: F401
    except ImportError:
        return "this numba has no ahead-of-time compiler (numba.pycc)"
    return None


def build(out_dir: Path = HERE, verbose: bool = False) -> Path:
    """Compile :data:`EXPORTS` into ``out_dir/_aot_kernels*.so`` and write its side file
    ``_aot_kernels.json`` (the sources' SHA-256, numba's version, each export's argument rules).
    Returns the side file's path."""
    import importlib
    import warnings

    from detector._jit import Kernel, bind_callees, numba_module
    from detector.io.files import write_text

    numba = numba_module()
    from numba.core import sigutils

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # numba.pycc's notice that it will be replaced
        from numba.pycc import CC

    import llvmlite.binding as llvm

    out_dir = Path(out_dir)
    cc = CC(MODULE)
    # for this machine's processor, as numba's own loops are (the generic x86-64 default ran the
    # textured benchmark's scan about 1.4 times slower); the side file names the processor
    cc.target_cpu = llvm.get_host_cpu_name()
    cc.output_dir = str(out_dir)
    cc.verbose = verbose
    table = {}
    for name, signatures in EXPORTS.items():
        module, attr = name.rsplit(".", 1)
        k = getattr(importlib.import_module(module), attr)
        if not isinstance(k, Kernel):
            raise TypeError(f"{name} is not a detector._jit.kernel")
        table[name] = []
        func = bind_callees(k.py_func)  # for numba to inline its callees
        for i, sig in enumerate(signatures):
            args, _ = sigutils.normalize_signature(sig)
            export = _export_name(name, i)
            cc.export(export, sig)(func)
            table[name].append({"export": export, "args": [_arg_spec(t) for t in args]})
    side = out_dir / f"{MODULE}.json"
    side.unlink(missing_ok=True)  # an interrupted build leaves no side file: the module is not used
    compiled_from = sources_sha256()  # the sources as compiled, not as they may be after
    cc.compile()
    write_text(side, json.dumps({"sources_sha256": compiled_from, "numba": numba.__version__,
                                "numpy": np.__version__, "processor": processor(),
                                "exports": table}, indent=1) + "\n")
    return side


_loaded = None
_load_lock = threading.Lock()


def module_info() -> tuple[object, dict] | tuple[None, str]:
    """``(module, side file)`` when the ahead-of-time module is usable, else ``(None, why not)``.
    Looked up once per process."""
    global _loaded
    if _loaded is None:
        with _load_lock:
            if _loaded is None:
                _loaded = _load()
    return _loaded


def _load():
    import os

    if os.environ.get("PATCHWOOD_NO_AOT"):
        return None, "turned off (PATCHWOOD_NO_AOT is set)"
    side = HERE / f"{MODULE}.json"
    if not side.is_file():
        return None, "not built (make builds it when a C compiler is found)"
    try:
        info = json.loads(side.read_text())
    except (OSError, ValueError) as exc:
        return None, f"{side.name}: {exc}"
    if info.get("sources_sha256") != sources_sha256():
        return None, "built from other sources (make rebuilds it)"
    if info.get("numpy") != np.__version__:
        return None, f"built against numpy {info.get('numpy')} (make rebuilds it)"
    if info.get("processor") != processor():
        return None, "built for another processor (make rebuilds it)"
    import importlib

    try:
        module = importlib.import_module(f"detector.{MODULE}")
    except ImportError as exc:
        return None, f"cannot be imported: {exc}"
    return module, info


def _accepts(spec: list):
    """A test of an argument tuple against the rules of one export (exact types, aligned
    memory: the compiled code reads memory as the signature says and checks nothing)."""
    rules = []
    for s in spec:
        if s[0] == "array":
            dtype, ndim, contiguous = np.dtype(s[1]), s[2], s[3]

            def rule(v, dtype=dtype, ndim=ndim, contiguous=contiguous):
                return (type(v) is np.ndarray and v.dtype == dtype and v.ndim == ndim
                        and v.flags.aligned and (not contiguous or v.flags.c_contiguous))
        elif s[0] == "bool":
            def rule(v):
                return isinstance(v, (bool, np.bool_))
        elif s[0] == "int":
            def rule(v):
                return isinstance(v, (int, np.integer)) and not isinstance(v, (bool, np.bool_))
        else:
            def rule(v):
                return isinstance(v, (float, np.floating))
        rules.append(rule)
    n = len(rules)

    def accepts(args) -> bool:
        return len(args) == n and all(rule(v) for rule, v in zip(rules, args))
    return accepts


def versions(kernel: str) -> tuple:
    """``((accepts, function), ...)``: the ahead-of-time versions of a kernel (``module.qualname``),
    empty when there are none or the module is not usable."""
    module, info = module_info()
    if module is None:
        return ()
    return tuple((_accepts(e["args"]), getattr(module, e["export"]))
                 for e in info["exports"].get(kernel, ()))


if __name__ == "__main__":  # pragma: no cover - run by make
    import sys
    import time

    start = time.perf_counter()
    lacking = missing_tools()
    if lacking:
        print(f"note: the scan's loops were not compiled ahead of time ({lacking}); scans load "
              f"them with numba, which adds about 0.6 s to each command's start")
        raise SystemExit(0)
    try:
        path = build(verbose="--verbose" in sys.argv)
    except Exception as exc:  # noqa: BLE001 - any failure only means the scan starts slower
        lines = [line for line in str(exc).splitlines() if line.strip()]
        print(f"note: the scan's loops were not compiled ahead of time ({type(exc).__name__}"
              f"{': ' + lines[-1].strip() if lines else ''}); scans load them with numba")
        raise SystemExit(0)
    print(f"compiled the scan's loops ahead of time in {time.perf_counter() - start:.0f} s "
          f"({path.with_suffix('').name}*)")
