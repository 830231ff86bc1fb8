"""patchwood's library: from labelled images to a fast detector and its evaluation.

The package follows the data flow, each stage a module or subpackage whose imports only point
down (``tests/test_layers.py``; DEVELOPERS.md, "Layout and data flow")::

    io -> geometry -> features -> harvest -> forest -> cascade -> model, classifier
       -> scan -> evaluation -> training -> reporting -> (cli)

The public API is re-exported here and loaded on first use, so ``import detector`` stays cheap
(the command line starts without compiling kernels it will not run)::

    from detector import PatchClassifier, Engine, ScanSettings, evaluate
    from detector.harvest import harvest  # the module and its function share the name
"""

from __future__ import annotations

import importlib

__version__ = "0.1.0"

#: Public name -> the module that defines it.
_EXPORTS = {
    "InputError": "detector.errors",
    "read_labels": "detector.io.labels",
    "read_detections": "detector.io.labels",
    "write_labels_csv": "detector.io.labels",
    "ImageLabels": "detector.io.labels",
    "read_gray": "detector.io.images",
    "list_images": "detector.io.images",
    "iou": "detector.geometry",
    "nms": "detector.geometry",
    "PatchBank": "detector.harvest",
    "load_bank": "detector.harvest",
    "save_bank": "detector.harvest",
    "Cascade": "detector.cascade",
    "calibrate": "detector.cascade",
    "Model": "detector.model",
    "load_model": "detector.model",
    "save_model": "detector.model",
    "PatchClassifier": "detector.classifier",
    "Engine": "detector.scan",
    "ScanSettings": "detector.scan",
    "scan_paths": "detector.scan",
    "evaluate": "detector.evaluation",
    "Figures": "detector.evaluation",
    "train_model": "detector.training",
    "train_with_mining": "detector.training",
    "mine": "detector.training",
    "search": "detector.training",
    "score_files": "detector.reporting.score_report",
    "write_report": "detector.reporting.score_report",
    "audit_bank": "detector.reporting.audit",
    "model_report": "detector.reporting.inspection",
}

__all__ = sorted(_EXPORTS) + ["__version__"]


def __getattr__(name: str):
    """Load a public name from its module on first use (PEP 562)."""
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'detector' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
