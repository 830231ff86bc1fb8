"""`patchwood review`'s labels store and web application (Flask's test client): every edit saved
at once in the file's own format, a backup kept once, undo across reloads from the journal, stale
edits refused, and the safety rules (token, Host, folder, body size)."""

from __future__ import annotations

import json

import cv2
import numpy as np
import pytest

from detector.errors import InputError
from detector.io.labels import read_labels, write_coco, write_labels_csv, ImageLabels
from detector.review import MAX_BODY, Conflict, LabelStore, create_app

CSV = "image,x,y,width,height\na.png,10,20,30,40\na.png,50,60,10,10\nb.png,,,,\n"


def folder(tmp_path, labels_text=CSV):
    images = tmp_path / "images"
    images.mkdir()
    for name in ("a.png", "b.png", "c.png"):
        cv2.imwrite(str(images / name), np.full((100, 120), 128, np.uint8))
    labels = tmp_path / "labels.csv"
    labels.write_text(labels_text)
    return images, labels


def boxes_on_disk(path):
    return {it.image: np.asarray(it.boxes).tolist() for it in read_labels(path).items}


def test_every_edit_is_saved_and_the_first_version_kept(tmp_path):
    images, labels = folder(tmp_path)
    store = LabelStore(labels, ["a.png", "b.png", "c.png"])
    assert store.version == 0 and store.format == "csv"
    v = store.apply(0, "add", "c.png", box=[1, 2, 3, 4])
    assert boxes_on_disk(labels) == {"a.png": [[10, 20, 30, 40], [50, 60, 10, 10]], "b.png": [],
                                     "c.png": [[1, 2, 3, 4]]}
    v = store.apply(v, "delete", "a.png", index=0)
    v = store.apply(v, "move", "a.png", index=0, box=[51, 61, 12, 12])
    v = store.apply(v, "object-free", "c.png")
    assert v == 4
    assert boxes_on_disk(labels) == {"a.png": [[51, 61, 12, 12]], "b.png": [], "c.png": []}
    # the backup is the file before the first edit, byte for byte, and is never replaced
    assert (tmp_path / "labels.csv.bak").read_text() == CSV
    # one journal line per edit
    assert len((tmp_path / "labels.csv.journal.jsonl").read_text().splitlines()) == 4
    # only the labels file, its backup and its journal were written
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        "images", "labels.csv", "labels.csv.bak", "labels.csv.journal.jsonl"]


def test_undo_works_across_a_reload(tmp_path):
    images, labels = folder(tmp_path)
    store = LabelStore(labels, ["a.png", "b.png", "c.png"])
    v = store.apply(0, "delete", "a.png", index=1)
    v = store.apply(v, "add", "b.png", box=[5, 5, 20, 20])
    again = LabelStore(labels, ["a.png", "b.png", "c.png"])   # a new page, a restarted server
    assert again.version == 2
    v, name = again.undo(2)
    assert name == "b.png" and boxes_on_disk(labels)["b.png"] == []
    v, name = again.undo(v)
    assert name == "a.png"
    assert boxes_on_disk(labels)["a.png"] == [[10, 20, 30, 40], [50, 60, 10, 10]]
    assert again.undo(v) == (v, None)  # nothing left to take back
    # an edit by hand since the journal's last line starts a new undo stack
    labels.write_text("image,x,y,width,height\na.png,1,1,5,5\n")
    assert LabelStore(labels, ["a.png"]).undo(0) == (0, None)


def test_a_stale_edit_is_refused_not_written_over(tmp_path):
    """Two tabs load version 0; the first edits, the second's edit names version 0: refused,
    and the first tab's edit is still on disk."""
    images, labels = folder(tmp_path)
    store = LabelStore(labels, ["a.png", "b.png", "c.png"])
    store.apply(0, "add", "c.png", box=[1, 2, 3, 4])
    with pytest.raises(Conflict, match="changed since"):
        store.apply(0, "delete", "a.png", index=0)
    assert boxes_on_disk(labels)["c.png"] == [[1, 2, 3, 4]]
    assert len(boxes_on_disk(labels)["a.png"]) == 2


def test_coco_stays_coco(tmp_path):
    images, _ = folder(tmp_path)
    labels = tmp_path / "labels.json"
    write_coco(labels, [ImageLabels("a.png", [[10, 20, 30, 40]], ["nut"])], {"a.png": (120, 100)})
    store = LabelStore(labels, ["a.png", "b.png"])
    assert store.format == "coco"
    store.apply(0, "add", "a.png", box=[60, 10, 20, 20])
    data = json.loads(labels.read_text())
    assert [a["bbox"] for a in data["annotations"]] == [[10, 20, 30, 40], [60, 10, 20, 20]]
    assert {c["name"] for c in data["categories"]} == {"nut"}   # the new box takes the class
    assert data["images"][0]["width"] == 120


@pytest.mark.parametrize("edit, args, message", [
    ("add", {"box": [1, 2, 0, 4]}, "width > 0"),
    ("add", {"box": [1, 2, "x", 4]}, "four numbers"),
    ("delete", {"index": 5}, "no label 5"),
    ("rotate", {}, "unknown edit"),
])
def test_bad_edits_are_refused_with_one_line(tmp_path, edit, args, message):
    images, labels = folder(tmp_path)
    store = LabelStore(labels, ["a.png"])
    with pytest.raises(InputError, match=message):
        store.apply(0, edit, "a.png", **args)
    assert labels.read_text() == CSV and store.version == 0


def test_pascal_voc_is_refused(tmp_path):
    (tmp_path / "ann").mkdir()
    with pytest.raises(InputError, match="read-only"):
        LabelStore(tmp_path / "ann")


@pytest.fixture
def client(tmp_path):
    images, labels = folder(tmp_path)
    dets = tmp_path / "dets.csv"
    dets.write_text("image,x,y,width,height,score\na.png,10,20,30,40,0.9\na.png,80,10,10,10,0.7\n")
    app = create_app(images, labels, dets, token="secret", host="127.0.0.1", port=5000)
    c = app.test_client()
    c.tmp = tmp_path
    return c


GOOD = {"headers": {"X-Review-Token": "secret", "Host": "127.0.0.1:5000"}}


def test_state_judges_each_detection(client):
    r = client.get("/api/state", **GOOD)
    assert r.status_code == 200
    a = next(im for im in r.json["images"] if im["name"] == "a.png")
    # the 0.9 box equals label 0 (IoU 1); the 0.7 box overlaps nothing: a false alarm
    assert [(d["score"], d["match"]) for d in a["runs"][0]] == [(0.9, 0), (0.7, -1)]


def test_requests_without_the_token_or_at_another_host_are_refused(client):
    assert client.get("/api/state", headers={"Host": "127.0.0.1:5000"}).status_code == 403
    bad = {"X-Review-Token": "wrong", "Host": "127.0.0.1:5000"}
    assert client.get("/api/state", headers=bad).status_code == 403
    # DNS rebinding: the right token at another name is still refused
    other = {"X-Review-Token": "secret", "Host": "attacker.example:5000"}
    assert client.get("/api/state", headers=other).status_code == 403
    assert client.get("/?token=secret", headers={"Host": "127.0.0.1:5000"}).status_code == 200


def test_only_files_under_the_images_folder_are_served(client):
    assert client.get("/api/image/a.png", **GOOD).status_code == 200
    for name in ("../labels.csv", "..%2Flabels.csv", "/etc/passwd", "nothing.png"):
        assert client.get(f"/api/image/{name}", **GOOD).status_code == 404, name
    assert client.get("/assets/../store.py", **GOOD).status_code == 404


def test_edits_through_the_api(client):
    labels = client.tmp / "labels.csv"
    r = client.post("/api/edit", json={"version": 0, "edit": "add", "image": "a.png",
                                       "box": [80, 10, 10, 10]}, **GOOD)
    assert r.status_code == 200 and r.json["version"] == 1
    # the accepted false alarm now matches the new label (index 2)
    assert [d["match"] for d in r.json["images"][0]["runs"][0]] == [0, 2]
    assert boxes_on_disk(labels)["a.png"][-1] == [80, 10, 10, 10]
    stale = client.post("/api/edit", json={"version": 0, "edit": "delete", "image": "a.png",
                                           "index": 0}, **GOOD)
    assert stale.status_code == 409 and "reload" in stale.json["error"]
    assert client.post("/api/undo", json={"version": 1}, **GOOD).json["version"] == 2
    assert len(boxes_on_disk(labels)["a.png"]) == 2
    assert client.post("/api/edit", data="not json", **GOOD).status_code == 400


def test_request_bodies_are_limited(client):
    big = {"version": 0, "edit": "add", "image": "a.png", "box": [1, 1, 1, 1],
           "pad": "x" * (MAX_BODY + 1)}
    assert client.post("/api/edit", json=big, **GOOD).status_code == 413
    assert (client.tmp / "labels.csv").read_text() == CSV


def test_a_second_run_is_judged_on_its_own(tmp_path):
    images, labels = folder(tmp_path)
    dets = tmp_path / "dets.csv"
    dets.write_text("image,x,y,width,height,score\na.png,10,20,30,40,0.9\n")
    other = tmp_path / "other.csv"
    # label 1 of a.png is (50, 60, 10, 10): this box overlaps it by IoU 1; label 0 is missed
    other.write_text("image,x,y,width,height,score\na.png,50,60,10,10,0.8\nb.png,0,0,5,5,0.4\n")
    app = create_app(images, labels, dets, compare=other, token="secret", host="127.0.0.1",
                     port=5000)
    state = app.test_client().get("/api/state", **GOOD).json
    assert [r["name"] for r in state["runs"]] == ["dets.csv", "other.csv"]
    a, b = (next(im for im in state["images"] if im["name"] == n) for n in ("a.png", "b.png"))
    assert [[d["match"] for d in run] for run in a["runs"]] == [[0], [1]]
    # b.png has no labels: the 0.4 box of the second run is a false alarm, the first has none
    assert [[d["match"] for d in run] for run in b["runs"]] == [[], [-1]]
    with pytest.raises(InputError, match="--compare needs --detections"):
        create_app(images, labels, None, compare=other)


def test_audit_findings_flag_their_images(tmp_path):
    from detector.reporting.audit_files import CSV_NAME

    images, labels = folder(tmp_path)
    audit = tmp_path / "audit"
    audit.mkdir()
    (audit / CSV_NAME).write_text("image,x,y,width,height,kind,score\n"
                                  "a.png,50,60,10,10,object-called-background,0.0800\n"
                                  "c.png,5,5,20,20,background-called-object,0.9300\n")
    app = create_app(images, labels, None, audit=audit, token="secret", host="127.0.0.1", port=5000)
    state = app.test_client().get("/api/state", **GOOD).json
    flags = {im["name"]: im["flags"] for im in state["images"]}
    assert state["audit_images"] == 2 and flags["b.png"] == []
    assert flags["a.png"] == [{"box": [50, 60, 10, 10], "kind": "object-called-background",
                               "score": 0.08}]
    assert flags["c.png"][0]["kind"] == "background-called-object"
    (audit / CSV_NAME).write_text("image,x,y,width,height,kind,score\na.png,1,2,0,4,"
                                  "object-called-background,0.5\n")
    with pytest.raises(InputError, match=r"suspicious-labels.csv:2: expected image"):
        create_app(images, labels, None, audit=audit)
    with pytest.raises(InputError, match="not an audit folder"):
        create_app(images, labels, None, audit=tmp_path / "images")


# A stand-in for `patchwood`: prints two progress lines per command, and for `scan` writes the
# detections file its --out names (one box on a.png equal to label 0), so the job's bookkeeping
# is tested without growing a forest (tests/test_review_browser.py runs the real commands).
FAKE = """
import sys, pathlib
args = sys.argv[1:]
print(args[0] + ": 1/2 steps", flush=True)
if "fail" in pathlib.Path(args[1]).name:
    print("error: " + args[1] + ": broken", flush=True)
    sys.exit(1)
print(args[0] + ": 2/2 steps", flush=True)
out = pathlib.Path(args[args.index("--out") + 1])
if args[0] == "scan":
    out.write_text("image,x,y,width,height,score\\na.png,10,20,30,40,0.95\\n")
else:
    out.write_bytes(b"made by the stand-in")
"""


def test_retraining_runs_the_three_commands_into_a_new_folder(tmp_path):
    import sys
    from detector.review.jobs import Retrainer

    images, labels = folder(tmp_path)
    fake = tmp_path / "fake.py"
    fake.write_text(FAKE)
    dets = tmp_path / "dets.csv"
    dets.write_text("image,x,y,width,height,score\na.png,80,10,10,10,0.7\n")
    # the scan under review was made at threshold 0.1 with stride 3: the new scan repeats both
    (tmp_path / "dets.provenance.json").write_text(json.dumps({
        "format": "patchwood scan provenance", "version": 1, "model": {"sha256": "0" * 64},
        "settings": {"threshold": 0.1, "scale_step": 1.2, "stride": 3.0, "min_object": None,
                     "max_object": None, "nms_iou": 0.3, "early_exit": True, "overhang": 0.25,
                     "exit_level": None}}))
    runs = tmp_path / "runs"
    app = create_app(images, labels, dets, runs_dir=runs, token="secret", host="127.0.0.1",
                     port=5000)
    app.review.retrainer.program = [sys.executable, str(fake)]
    c = app.test_client()
    job = c.get("/api/retrain", **GOOD).json
    assert job["state"] == "idle" and not runs.exists()  # nothing written before a job
    first = runs / "retrain-1"
    assert job["commands"] == [
        f"patchwood harvest {images.resolve()} {labels} --out {first / 'bank.npz'}",
        f"patchwood train {first / 'bank.npz'} --out {first / 'model.npz'}",
        f"patchwood scan {first / 'model.npz'} {images.resolve()} --out {first / 'detections.csv'} "
        "--threshold 0.1 --scale-step 1.2 --stride 3 --nms-iou 0.3 --overhang 0.25"]
    assert c.post("/api/retrain/open", json={}, **GOOD).status_code == 409  # nothing to open yet
    assert c.post("/api/retrain", json={}, **GOOD).status_code == 200
    done = app.review.retrainer.wait(timeout=60)
    assert done["state"] == "done" and done["step"] == 3 and done["error"] is None
    assert done["tail"] == ["harvest: 1/2 steps", "harvest: 2/2 steps", "train: 1/2 steps",
                            "train: 2/2 steps", "scan: 1/2 steps", "scan: 2/2 steps"]
    assert sorted(p.name for p in first.iterdir()) == ["bank.npz", "detections.csv", "model.npz"]
    # the new scan becomes the comparison run: its box matches label 0 of a.png
    state = c.post("/api/retrain/open", json={}, **GOOD).json
    assert [r["name"] for r in state["runs"]] == ["dets.csv", "retrain-1/detections.csv"]
    a = next(im for im in state["images"] if im["name"] == "a.png")
    assert [[d["match"] for d in run] for run in a["runs"]] == [[-1], [0]]
    # a second job gets a folder of its own; one that fails says which step and why
    app.review.retrainer.images_dir = tmp_path / "fail-images"
    c.post("/api/retrain", json={}, **GOOD)
    failed = app.review.retrainer.wait(timeout=60)
    assert failed["state"] == "failed" and failed["folder"].endswith("retrain-2")
    assert failed["error"] == f"step 1 stopped with exit code 1: error: {tmp_path / 'fail-images'}: broken"
    assert (tmp_path / "labels.csv").read_text() == CSV  # the job never writes the labels


def test_without_a_runs_folder_the_page_runs_no_jobs(client):
    assert client.get("/api/retrain", **GOOD).status_code == 404
    assert client.post("/api/retrain", json={}, **GOOD).status_code == 404


def _serve_command(tmp_path, *options):
    """Start `patchwood review` as a user does, in a process of its own; return it with its first
    line (the address) and what it printed on stderr before."""
    import subprocess
    import sys

    images, labels = folder(tmp_path)
    process = subprocess.Popen([sys.executable, "-m", "cli.main", "review", str(images),
                                str(labels), *options], stdout=subprocess.PIPE,
                               stderr=subprocess.PIPE, stdin=subprocess.DEVNULL, text=True)
    return process, process.stdout.readline()


def _get(url):
    import urllib.error
    import urllib.request

    try:
        with urllib.request.urlopen(url, timeout=10) as r:
            return r.status, r.read()
    except urllib.error.HTTPError as err:
        return err.code, err.read()


def test_the_command_serves_on_127_0_0_1_with_a_token(tmp_path):
    """The real command in its own process: the printed address is on 127.0.0.1 with a token;
    the page and its state answer with it and refuse without it; Ctrl-C (SIGINT) stops it."""
    import re
    import signal

    process, line = _serve_command(tmp_path)
    try:
        m = re.search(r"http://127\.0\.0\.1:(\d+)/\?token=([\w-]+)$", line.strip())
        assert m, line
        port, token = m.groups()
        status, body = _get(f"http://127.0.0.1:{port}/api/state?token={token}")
        assert status == 200 and [im["name"] for im in json.loads(body)["images"]] == \
            ["a.png", "b.png", "c.png"]
        assert _get(f"http://127.0.0.1:{port}/api/state")[0] == 403
        assert _get(f"http://127.0.0.1:{port}/api/state?token=x{token}")[0] == 403
    finally:
        process.send_signal(signal.SIGINT)
        out, err = process.communicate(timeout=20)
    assert "stopped" in out and "Traceback" not in err


def test_another_address_only_when_asked_and_with_a_warning(tmp_path):
    """--host 127.0.0.2 (another loopback address, so the test opens nothing to the network):
    a warning first, then the address at that host."""
    process, line = _serve_command(tmp_path, "--host", "127.0.0.2")
    try:
        assert line.startswith("review of ") and "http://127.0.0.2:" in line
    finally:
        process.terminate()
        _, err = process.communicate(timeout=20)
    assert err.startswith("warning: listening on 127.0.0.2: other machines can reach this review")
