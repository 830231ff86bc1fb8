"""Load: a folder of 1,000 small frames through :func:`detector.scan.scan_paths`.

What is checked, and against what:
- one process, ``jobs=2`` and a dask.distributed ``LocalCluster`` of 2 workers write the very same
  bytes (the promise of ``detector.scan``'s folder runs), with all 1,000 images listed and no
  failures; a sample of images holds exactly what ``detector.scan.Engine.scan`` finds in that
  image read on its own;
- memory stays flat: the resident set of the scanning process, sampled after every image, grows by
  less than retaining the frames would cost (the arithmetic is beside the bound), in each of the
  three runs (the cluster's scheduler and workers are threads of this process here);
- a cluster run holds only the images in flight, never every image it has scanned: the
  scheduler's tasks and the workers' results stay within the window the folder run sends.

The frames are 160 x 160, the smallest side ``synthetic_images.render_frame`` draws: 200 rendered
frames (every tenth without nuts) in five orientations each, so 1,000 different images for the
cost of rendering 200. Throughput and the memory of worker processes are measured by
``benchmarks/load.py``; tests never assert on time.
"""

from __future__ import annotations

import os
from pathlib import Path

import cv2
import dask
import distributed
import numpy as np
import pytest

from detector.scan import failures_path, scan_paths
from detector.io.images import read_gray
from detector.io.labels import read_detections
from detector.model import load_model
from detector.scan import Engine, ScanSettings
from synthetic_images import render_frame
from shared import small_model

SIDE = 160  # synthetic_images.FRAME_LIMITS[0]: the smallest frame it renders
BASE_FRAMES = 200
ORIENTATIONS = 5  # as drawn, mirrored left-right, upside down, turned half a turn, transposed
FRAMES = BASE_FRAMES * ORIENTATIONS  # 1,000

# Memory bound, for 160 x 160 frames, measured from the 100th image (10 %, after the kernels are
# loaded and the scale plans built) to the end, 900 images later:
#   retaining every decoded frame:        900 * 160 * 160 B             =  23.0 MB
#   retaining both integral images (int64): 900 * 2 * 161 * 161 * 8 B   = 373.2 MB
# A growth of 8 MB allows about 9 KB per image: the run keeps every image's detections (it
# rewrites the whole file after each batch; about 0.7 KB per image measured with tracemalloc), and
# the allocator keeps some slack; a third of the cheaper leak above already breaks it. Measured
# when written: +1.8 to 2.3 MB in one process, +0.2 to 0.4 MB in the parent of jobs=2, +2.7 MB
# with the cluster; keeping every decoded frame (injected by hand) gave +25 MB, and the cluster
# code that kept every future (before commit a055446) +22 MB.
GROWTH_BOUND = 8_000_000


def resident_bytes() -> int:
    """This process's resident set size in bytes (Linux ``/proc/self/statm``); where there is no
    /proc, the peak resident size from ``getrusage``, which cannot miss a growth either."""
    try:
        with open("/proc/self/statm") as fh:
            return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
    except OSError:
        import resource
        import sys

        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        return peak if sys.platform == "darwin" else peak * 1024  # bytes on macOS, KiB elsewhere


@pytest.fixture(scope="module")
def model_file(tmp_path_factory) -> Path:
    """A small model (10 trees, pool 500) trained on an 8-frame scenario: quick to scan."""
    return small_model(tmp_path_factory.mktemp("load-scenario"), train_images=8, test_images=1,
                       seed=3, negatives_per_image=40, n_trees=10, pool=500)


def write_frames(folder: Path, base: int) -> Path:
    """``folder/frame_0000.png ...``: ``base`` rendered 160 x 160 frames (every tenth without
    nuts), each in the five orientations."""
    folder.mkdir()
    k = 0
    for i in range(base):
        g = render_frame(5000 + i, SIDE, SIDE, empty=(i % 10 == 0)).image
        for view in (g, g[:, ::-1], g[::-1], g[::-1, ::-1], g.T):
            assert cv2.imwrite(str(folder / f"frame_{k:04d}.png"), np.ascontiguousarray(view))
            k += 1
    return folder


@pytest.fixture(scope="module")
def frames(tmp_path_factory) -> Path:
    """frames/frame_0000.png ... frame_0999.png."""
    return write_frames(tmp_path_factory.mktemp("load-frames") / "frames", BASE_FRAMES)


def test_a_thousand_frames_scan_to_the_same_bytes_everywhere_and_memory_stays_flat(
        model_file, frames, tmp_path):
    names = sorted(p.name for p in frames.iterdir())
    assert len(names) == FRAMES
    outs, resident = {}, {}

    def run(label, **options):
        samples = []
        outs[label] = tmp_path / f"{label}.csv"
        summary = scan_paths(model_file, [frames], outs[label], settings=ScanSettings(),
                             progress=lambda done, total: samples.append(resident_bytes()),
                             **options)
        resident[label] = np.array(samples, dtype=np.int64)
        assert (summary.images, summary.failures, summary.skipped_files) == (FRAMES, [], 0), label
        assert summary.failures_file is None and not failures_path(outs[label]).exists(), label
        return summary

    one = run("one", jobs=1)
    run("jobs", jobs=2)
    # threads, not processes, as in tests/test_batch.py: quick to start and reliable under
    # pytest-xdist; the model and every image still travel to the workers as bytes. distributed
    # keeps, for debugging, the last `low-level-log-length` (default 1000) message batches of
    # each connection, image bytes included: a bounded cost (see benchmarks/load.py), shrunk here
    # so that it cannot hide a growth of our own
    with dask.config.set({"distributed.admin.low-level-log-length": 10}):
        with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                      dashboard_address=None) as cluster:
            run("cluster", cluster=cluster.scheduler_address)

    # every image once, in list_images order; empty frames recorded with one empty row
    detections = read_detections(outs["one"])
    assert [d.image for d in detections] == names
    found = np.array([len(d.scores) for d in detections])
    assert found.sum() == one.detections
    assert 0 < np.count_nonzero(found) < FRAMES  # images with nuts found and images without
    # the same bytes from two processes and from the cluster
    for label in ("jobs", "cluster"):
        assert outs[label].read_bytes() == outs["one"].read_bytes(), label

    # a sample of images against the engine on each image alone (the file keeps 1/100 pixel and
    # 6 digits of score, hence the tolerances)
    engine = Engine(load_model(model_file), ScanSettings())
    for d in detections[::100]:
        ref = engine.scan(read_gray(frames / d.image))
        assert len(d.scores) == len(ref.scores), d.image
        np.testing.assert_allclose(d.boxes.reshape(-1, 4), ref.boxes.reshape(-1, 4), rtol=0,
                                   atol=0.005 + 1e-9)
        np.testing.assert_allclose(d.scores, ref.scores, rtol=0, atol=5e-7 + 1e-12)

    # flat memory in the scanning process (the parent, for jobs=2; with the cluster's scheduler
    # and workers, for the cluster)
    for label in ("one", "jobs", "cluster"):
        samples = resident[label]
        assert len(samples) == FRAMES
        tenth = FRAMES // 10
        growth = int(samples[tenth:].max() - samples[tenth - 1])
        assert growth < GROWTH_BOUND, (
            f"{label}: resident set grew by {growth / 1e6:.1f} MB from image {tenth} to the end "
            f"(bound {GROWTH_BOUND / 1e6:.0f} MB; peak {samples.max() / 1e6:.0f} MB)")


# The window of tasks in flight in detector.scan._batch._run_on_cluster: max(2, 2 * workers), each with
# its scattered batch of images (detector.scan.CLUSTER_BATCH_IMAGES of them at most).
IN_FLIGHT = 4


def test_a_cluster_run_holds_only_the_images_in_flight(model_file, tmp_path):
    # 120 frames of their own, so that this test does not need the 1,000 when pytest-xdist runs
    # it in another process than the test above
    folder = write_frames(tmp_path / "frames", 24)
    held = []
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster:

        def progress(done, total):
            # in-process workers: their state can be read from here (length of a dict)
            held.append((len(cluster.scheduler.tasks),
                         sum(len(w.data) for w in cluster.workers.values())))

        summary = scan_paths(model_file, [folder], tmp_path / "cluster.csv",
                             cluster=cluster.scheduler_address, progress=progress)
    assert summary.images == 120 and not summary.failures
    tasks, results = np.array(held).T
    # at most the tasks in flight with their batches and the scattered model, twice over for
    # releases still on their way: 2 * (2 * 4 + 1) = 18; keeping every batch would hold all 15
    # of them (120 images, 8 to a task) with their data by the end: 31
    from detector.scan import CLUSTER_BATCH_IMAGES

    assert 2 * -(-120 // CLUSTER_BATCH_IMAGES) + 1 > 2 * (2 * IN_FLIGHT + 1)  # the test can fail
    bound = 2 * (2 * IN_FLIGHT + 1)
    assert tasks.max() <= bound, f"scheduler held up to {tasks.max()} tasks"
    assert results.max() <= bound, f"workers held up to {results.max()} results"
