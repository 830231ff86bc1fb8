"""The library's layers only point down (DEVELOPERS.md, "Layout and data flow").

Every ``import`` of a ``detector`` module, at the top of a file or inside a function, is read
from the source with :mod:`ast`; a module may import only from its own layer or a lower one. The
order is the data flow: files in, features, trees, the early exit, the model, the scan, its
evaluation, training (which scans and evaluates), reporting, the review web application, and
the command line on top.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

#: Layer of each top-level part of the package, lowest first (``detector/__init__.py``, the
#: public API, sits above them all and imports lazily).
LAYERS = [
    ("errors", "_validation"),
    ("io", "_jit", "_aot"),
    ("geometry",),
    ("features",),
    ("harvest",),
    ("forest",),
    ("cascade", "_cascade_kernels"),
    ("model", "patch_forest", "classifier"),
    ("scan",),
    ("evaluation",),
    ("training",),
    ("reporting",),
    ("review",),
]
RANK = {name: i for i, names in enumerate(LAYERS) for name in names}


def part(module: str) -> str:
    """``detector.scan._engine`` -> ``scan``."""
    return module.split(".")[1]


def library_modules():
    for path in sorted((ROOT / "detector").rglob("*.py")):
        rel = path.relative_to(ROOT).with_suffix("")
        name = ".".join(rel.parts)
        if name.endswith(".__init__"):
            name = name[: -len(".__init__")]
        yield name, path


def detector_imports(path: Path, module: str):
    """``(line, imported module)`` of every import of a detector module in the file."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    package = module if path.name == "__init__.py" else module.rsplit(".", 1)[0]
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.startswith("detector."):
                    yield node.lineno, alias.name
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:  # relative import
                parts = package.split(".")[: len(package.split(".")) - node.level + 1]
                base = ".".join(parts + ([base] if base else []))
            if base == "detector":  # from detector import features -> detector.features
                for alias in node.names:
                    yield node.lineno, f"detector.{alias.name}"
            elif base.startswith("detector."):
                yield node.lineno, base


def test_every_part_of_the_package_has_a_layer():
    parts = {part(m) for m, _ in library_modules() if m != "detector"}
    assert parts <= set(RANK), f"give these a layer: {sorted(parts - set(RANK))}"


def test_the_reader_sees_function_level_and_package_imports(tmp_path):
    # a hand-made module: one import at the top, one inside a function, one 'from detector import'
    src = tmp_path / "x.py"
    src.write_text("from detector.io.files import atomic_write\n"
                   "def f():\n    from detector.scan import Engine\n"
                   "from detector import features as _f\n")
    found = sorted(m for _, m in detector_imports(src, "detector.x"))
    assert found == ["detector.features", "detector.io.files", "detector.scan"]


@pytest.mark.parametrize("module,path", [(m, p) for m, p in library_modules() if m != "detector"],
                         ids=lambda v: v if isinstance(v, str) else "")
def test_imports_point_down(module, path):
    own = RANK[part(module)]
    upward = [f"{path.relative_to(ROOT)}:{line} imports {target} "
              f"(layer {RANK[part(target)]} above {own})"
              for line, target in detector_imports(path, module)
              if target != "detector" and part(target) in RANK and RANK[part(target)] > own]
    assert not upward, "\n".join(upward)


def test_the_public_api_resolves_to_its_defining_modules():
    """Every name in ``detector.__all__`` loads, and is the object its stage defines."""
    import importlib

    import detector

    for name in detector.__all__:
        if name == "__version__":
            continue
        value = getattr(detector, name)
        assert value is getattr(importlib.import_module(detector._EXPORTS[name]), name)
    with pytest.raises(AttributeError, match="no attribute 'nonesuch'"):
        detector.nonesuch  # noqa: B018


def test_the_scan_command_does_not_load_what_only_training_and_reports_need():
    """Start-up of ``patchwood scan``: importing the command loads neither scikit-learn (1.5 s of
    its start-up before it became a lazy import of the tree growers), nor matplotlib, Dask or
    Optuna. Checked in a fresh interpreter, by the modules it has loaded."""
    import subprocess
    import sys

    heavy = ("sklearn", "matplotlib", "dask", "optuna")
    code = ("import sys, cli.scan, detector.scan, detector.model; "
            f"print(','.join(m for m in {heavy!r} if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""
