"""The scan's loops compiled ahead of time (detector/_aot.py) and the kernels compiled on first
call (detector/_jit.py).

Every version in the ahead-of-time module is held equal, output for output, to numba's own
compiled loop on the arguments real scans pass it (recorded from scans of a grey and a channel
model, plain and boosted), and again with the integral image in each of its three dtypes. Those
tests need the module, which ``make`` builds when a C compiler and Python's headers are found;
under CI (where ``.ci/run`` installs them) a missing module next to the tools is a failure, and
otherwise a skip that names what is missing.
"""

from __future__ import annotations

import importlib
import json
import os
import threading
from pathlib import Path

import numpy as np
import pytest

from detector import _aot, _jit
from detector.classifier import PatchClassifier
from detector.harvest import harvest
from detector.io.labels import read_labels
from detector.scan import Engine, ScanSettings
from synthetic_images import render_frame, render_scenario

WINDOW = (24, 24)


def kernel_of(name: str) -> _jit.Kernel:
    module, attr = name.rsplit(".", 1)
    return getattr(importlib.import_module(module), attr)


def called_kernels(k: _jit.Kernel, seen=None) -> set:
    """Every kernel ``k`` calls, directly or through others (by the names its code reads)."""
    seen = set() if seen is None else seen
    for name in k.py_func.__code__.co_names:
        v = k.py_func.__globals__.get(name)
        if isinstance(v, _jit.Kernel) and v not in seen:
            seen.add(v)
            called_kernels(v, seen)
    return seen


def test_the_hashed_sources_hold_every_kernel_the_module_compiles():
    # a module built from other sources is never used: so every file whose loops end up in the
    # module must be among those hashed
    root = Path(_aot.__file__).parent
    for name in _aot.EXPORTS:
        k = kernel_of(name)
        for used in {k} | called_kernels(k):
            path = Path(importlib.import_module(used.py_func.__module__).__file__)
            assert path.relative_to(root).as_posix() in _aot.SOURCES, used.name


def test_argument_rules_take_only_the_exact_types():
    accepts = _aot._accepts([["array", "<i4", 1, True], ["array", "<f8", 2, True], ["int"],
                             ["float"], ["bool"]])
    a, b = np.zeros(6, np.int32), np.zeros((2, 3))
    assert accepts((a, b, 3, 0.5, True))
    assert accepts((a, b, np.int64(3), np.float64(0.5), np.bool_(False)))
    assert not accepts((a.astype(np.int64), b, 3, 0.5, True))      # another dtype
    assert not accepts((a.astype(np.uint32), b, 3, 0.5, True))
    assert not accepts((a.reshape(2, 3), b, 3, 0.5, True))          # another ndim
    assert not accepts((a[::2], b, 3, 0.5, True))                   # not contiguous
    assert not accepts((a, np.asfortranarray(b), 3, 0.5, True))
    assert not accepts((a, b, True, 0.5, True))                     # a bool is not an int here
    assert not accepts((a, b, 3, 1, True))                          # an int is not a float here
    assert not accepts((a, b, 3, 0.5, 1))
    assert not accepts((a, b, 3, 0.5))                              # too few
    assert not accepts((list(a), b, 3, 0.5, True))
    unaligned = np.zeros(25, np.uint8)[1:].view(np.int32)  # six int32 starting at an odd byte
    assert unaligned.flags.c_contiguous and not unaligned.flags.aligned
    assert not accepts((unaligned, b, 3, 0.5, True))
    assert not accepts((a.astype(">i4"), b, 3, 0.5, True))         # another byte order


def write_side_file(folder: Path, **changes) -> None:
    info = {"sources_sha256": _aot.sources_sha256(), "numpy": np.__version__,
            "processor": _aot.processor(), "exports": {}}
    info.update(changes)
    (folder / f"{_aot.MODULE}.json").write_text(json.dumps(info))


@pytest.mark.parametrize("changes, why", [
    ({"sources_sha256": "0" * 64}, "built from other sources"),
    ({"numpy": "0.0"}, "built against numpy 0.0"),
    ({"processor": "x86_64 another"}, "built for another processor"),
])
def test_a_module_built_elsewhere_is_not_used(tmp_path, monkeypatch, changes,
                                                                 why):
    monkeypatch.setattr(_aot, "HERE", tmp_path)
    monkeypatch.delenv("PATCHWOOD_NO_AOT", raising=False)
    # the side file hashes the sources where they are now
    for name in _aot.SOURCES:
        (tmp_path / name).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / name).write_bytes((Path(_aot.__file__).parent / name).read_bytes())
    write_side_file(tmp_path, **changes)
    module, reason = _aot._load()
    assert module is None and reason.startswith(why)
    (tmp_path / "scan" / "_kernels.py").write_text("# edited\n")  # a source changed since
    write_side_file(tmp_path)
    (tmp_path / "scan" / "_kernels.py").write_text("# edited again\n")
    assert _aot._load() == (None, "built from other sources (make rebuilds it)")


def test_no_side_file_and_the_switch_mean_no_module(tmp_path, monkeypatch):
    monkeypatch.setattr(_aot, "HERE", tmp_path)
    monkeypatch.delenv("PATCHWOOD_NO_AOT", raising=False)
    assert _aot._load()[0] is None and "not built" in _aot._load()[1]
    monkeypatch.setenv("PATCHWOOD_NO_AOT", "1")
    assert _aot._load() == (None, "turned off (PATCHWOOD_NO_AOT is set)")


def test_a_kernel_compiles_on_first_call_and_pickles_by_name():
    import pickle

    from detector.scan import _kernels

    k = _jit.kernel(cache=False)(lambda a, b: a * b + 1)
    assert k(3, 4) == 13 and k.py_func(3, 4) == 13
    assert pickle.loads(pickle.dumps(_kernels.scan_scale)) is _kernels.scan_scale


# ------------------------------------------------------------------ the module against numba

def module_or_skip():
    module, info = _aot.module_info()
    if module is None:
        lacking = _aot.missing_tools()
        if os.environ.get("CI") and lacking is None:
            pytest.fail(f"CI has the tools but not the ahead-of-time module: {info}")
        pytest.skip(f"the ahead-of-time module: {info}" + (f"; {lacking}" if lacking else ""))
    return module, info


@pytest.fixture(scope="module")
def bank(tmp_path_factory):
    root = tmp_path_factory.mktemp("aot-scenario")
    render_scenario(root, train_images=8, test_images=1, seed=12)
    items = list(read_labels(root / "train" / "labels.csv", root / "train" / "images"))
    return harvest(root / "train" / "images", items, window=WINDOW, negatives_per_image=40, seed=0)


@pytest.fixture(scope="module")
def recorded_calls(bank):
    """The arguments of every call of an exported kernel in scans of four models (grey and
    channel, bagged and boosted) with numba's loops: ``[(kernel name, args), ...]``."""
    calls = []
    kernels = {name: kernel_of(name) for name in _aot.EXPORTS}
    saved = {name: k._ahead for name, k in kernels.items()}
    original = _jit.Kernel.__call__

    def record(self, *args):
        if self.name in _aot.EXPORTS:
            calls.append((self.name, tuple(a.copy() if isinstance(a, np.ndarray) else a
                                           for a in args)))
        return original(self, *args)

    try:
        for k in kernels.values():
            k._ahead = ()  # numba's loops only
        _jit.Kernel.__call__ = record
        rng = np.random.default_rng(2)
        frames = [render_frame(5, 160, 160).image, rng.integers(0, 256, (70, 90), np.uint8)]
        for mode in ("bagged", "boosted"):
            for channels in ("grey", "gradient"):
                clf = PatchClassifier(n_trees=12, pool=1500, mode=mode, random_state=0,
                                      channels=channels)
                clf.fit(bank.patches, bank.labels, margin=bank.margin)
                # the compiled finish serves scans without box voting
                for settings in (ScanSettings(threshold=0.2),
                                 ScanSettings(threshold=0.2, box_voting=None),
                                 ScanSettings(threshold=0.0, early_exit=False)):
                    engine = Engine(clf.model_, settings)
                    for gray in frames:
                        engine.scan(gray)
    finally:
        _jit.Kernel.__call__ = original
        for name, k in kernels.items():
            k._ahead = saved[name]
    return calls


def other_integral_dtypes(name, args):
    """The same call with the integral image (or the channel table) in each dtype the module
    holds a version for: the sums are small integers, exact in all three."""
    if name not in ("detector.scan._kernels.scan_scale", "detector.scan._kernels.scan_frame",
                    "detector.scan._kernels.area_shrink"):
        return [args]
    return [(args[0].astype(t),) + args[1:] for t in (np.int32, np.uint32, np.float64)]


def parts(returned) -> list:
    return list(returned) if isinstance(returned, tuple) else [returned]


def test_every_ahead_of_time_version_equals_numbas_loop(recorded_calls):
    module, info = module_or_skip()
    assert threading.current_thread() is threading.main_thread()
    used = set()
    for name, args in recorded_calls:
        k = kernel_of(name)
        for call in other_integral_dtypes(name, args):
            matches = [(e["export"], accepts, f) for (accepts, f), e in
                       zip(_aot.versions(name), info["exports"][name]) if accepts(call)]
            assert len(matches) == 1, (name, [a.dtype if isinstance(a, np.ndarray) else type(a)
                                              for a in call])
            export, _, ahead = matches[0]
            used.add(export)
            mine = [a.copy() if isinstance(a, np.ndarray) else a for a in call]
            theirs = [a.copy() if isinstance(a, np.ndarray) else a for a in call]
            got, want = parts(ahead(*mine)), parts(k.dispatcher()(*theirs))
            assert len(got) == len(want)
            for g, w in zip(got, want):
                np.testing.assert_array_equal(np.asarray(g), np.asarray(w))
            for a, b in zip(mine, theirs):  # the output arrays too
                if isinstance(a, np.ndarray):
                    np.testing.assert_array_equal(a, b)
    every = {e["export"] for exports in info["exports"].values() for e in exports}
    assert used == every, f"exports no scan called: {sorted(every - used)}"


def test_scans_run_the_module_and_give_numbas_results(bank, monkeypatch):
    """A whole scan on the main thread goes through the module (counted) and returns numba's
    boxes, scores and tree counts."""
    module_or_skip()
    clf = PatchClassifier(n_trees=12, pool=1500, mode="boosted", random_state=0,
                          channels="gradient")
    clf.fit(bank.patches, bank.labels, margin=bank.margin)
    engine = Engine(clf.model_, ScanSettings(threshold=0.2))
    gray = render_frame(8, 160, 160).image
    k = kernel_of("detector.scan._kernels.scan_scale")
    count = [0]
    versions = [(accepts, (lambda f: lambda *a: (count.__setitem__(0, count[0] + 1), f(*a))[1])(f))
                for accepts, f in _aot.versions(k.name)]
    monkeypatch.setattr(k, "_ahead", tuple(versions))
    got = engine.scan(gray)
    assert count[0] > 0
    monkeypatch.setattr(k, "_ahead", ())
    want = engine.scan(gray)
    np.testing.assert_array_equal(got.boxes, want.boxes)
    np.testing.assert_array_equal(got.scores, want.scores)
    assert got.trees == want.trees
