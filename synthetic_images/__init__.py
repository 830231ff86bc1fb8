"""The demo scenario: hex nuts on a conveyor belt, seen by an inspection camera from above.

:func:`render_frame` draws one frame and returns its labels together with the ground truth behind
them (per-nut masks, visible shares); :func:`render_scenario` writes ``train/`` and ``test/``
folders of frames and labels CSVs for the rest of the workflow.
"""

from synthetic_images.render import (
    FRAME_LIMITS,
    LABELLED_SHARE,
    NUT_SIZES,
    PlacedNut,
    RenderedFrame,
    render_frame,
)
from synthetic_images.scenario import EMPTY_SHARE, TEST_SHARE, frame_name, render_scenario, split_counts

__all__ = [
    "EMPTY_SHARE",
    "FRAME_LIMITS",
    "LABELLED_SHARE",
    "NUT_SIZES",
    "TEST_SHARE",
    "PlacedNut",
    "RenderedFrame",
    "frame_name",
    "render_frame",
    "render_scenario",
    "split_counts",
]
