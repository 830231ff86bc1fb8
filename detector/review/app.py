"""The review web application (``patchwood review``): a Flask app over a :class:`LabelStore`.

Every request must carry the token printed with the address (the ``token`` query parameter or the
``X-Review-Token`` header) and a ``Host`` equal to the bound address; only files under the images
folder are served, only the labels file (with its backup and journal) is written, and request
bodies are limited to :data:`MAX_BODY` bytes.
"""

from __future__ import annotations

import hmac
import json
import os
import secrets
from importlib import resources
from pathlib import Path

import numpy as np

from detector.errors import InputError
from detector.evaluation.matching import match_image
from detector.io.images import IMAGE_SUFFIXES
from detector.io.labels import read_detections
from detector.reporting.audit_files import (BACKGROUND_CALLED_OBJECT, OBJECT_CALLED_BACKGROUND,
                                            read_audit_flags)
from detector.reporting.drawing import BOX_STYLES
from detector.review.store import Conflict, LabelStore

__all__ = ["create_app", "serve", "MAX_BODY", "ASSETS"]

#: Largest request body accepted, in bytes (an edit is a few hundred).
MAX_BODY = 64 * 1024
#: Files of the page, served from the package.
ASSETS = ("review.html", "review.js", "review.css")
#: How the page draws boxes: the drawn frames' styles (matched, false alarm, missed), and labels
#: in Okabe & Ito's sky blue.
STYLES = {"label": ((86, 180, 233), "solid", "label"),
          **{k: v for k, v in BOX_STYLES.items() if k != "detection"},
          # the audit's own page draws its findings in the hues above; here they sit beside
          # detections, so both kinds take Okabe & Ito's reddish purple, dash-dotted
          OBJECT_CALLED_BACKGROUND: ((204, 121, 167), "dashdot", "audit: label? (called background)"),
          BACKGROUND_CALLED_OBJECT: ((204, 121, 167), "dashdot", "audit: unlabelled? (called object)")}
_TYPES = {".html": "text/html; charset=utf-8", ".js": "text/javascript; charset=utf-8",
          ".css": "text/css; charset=utf-8"}


def _folder_images(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir()
                  if p.suffix.lower() in IMAGE_SUFFIXES and p.is_file())


class _Run(dict):
    """One detections file: image name -> (boxes, scores), and ``judged``: image name -> (the
    labels its detections were matched to, the detections as the page reads them, that list as
    JSON text). A run's detections never change, so an image is judged again only when its
    labels do: /api/state then only joins text (for 1,000 images of 30 detections, matching and
    rounding took about 0.5 s and encoding the floats 0.1 s per request)."""

    def __init__(self):
        super().__init__()
        self.judged: dict[str, tuple[tuple, list, str]] = {}


def _read_run(path) -> _Run:
    run = _Run()
    for d in read_detections(path):
        run[d.image] = (np.asarray(d.boxes, np.float64).reshape(-1, 4),
                        np.asarray(d.scores, np.float64))
    return run


class Review:
    """What one review serves: the images folder, the labels store, up to two detection runs (the
    one under review and a comparison), the audit's flags, and the retraining job."""

    def __init__(self, images_dir, labels, detections=None, compare=None, audit=None,
                 runs_dir=None):
        self.images_dir = Path(images_dir).resolve()
        if not self.images_dir.is_dir():
            raise InputError(f"{images_dir}: not a folder of images")
        self.store = LabelStore(labels, _folder_images(self.images_dir))
        #: [(name shown, path, {image: (boxes, scores)})]: the run under review, then the other
        self.runs: list[tuple[str, str, dict]] = []
        for path in (detections, compare):
            if path is not None:
                self.runs.append((Path(path).name, str(path), _read_run(path)))
        if compare is not None and detections is None:
            raise InputError("--compare needs --detections: the run to compare it with")
        for name in self.store.images:  # judged once before the server listens (see _Run)
            self._judged_runs(name, self.store.labels_of(name))
        self.flags = {} if audit is None else read_audit_flags(audit)
        self.retrainer = None
        if runs_dir is not None:
            from detector.review.jobs import Retrainer
            self.retrainer = Retrainer(self.images_dir, self.store.path, runs_dir,
                                       _scan_settings(detections))

    def open_comparison(self, path) -> None:
        """Make the detections file ``path`` the comparison run (the second), replacing any."""
        run = (f"{Path(path).parent.name}/{Path(path).name}", str(path), _read_run(path))
        self.runs[1:] = [run]

    def _judged(self, run: _Run, name: str, labels) -> tuple[list[dict], str]:
        """The detections of ``name`` in ``run`` matched to ``labels``, and as JSON text; kept in
        ``run.judged`` (shared: callers do not change them)."""
        key = tuple(map(tuple, labels))
        kept = run.judged.get(name)
        if kept is None or kept[0] != key:
            boxes, scores = run.get(name, (np.zeros((0, 4)), np.zeros(0)))
            matched = match_image(boxes, scores,
                                  np.asarray(labels, np.float64).reshape(-1, 4))[0] \
                if len(boxes) else np.zeros(0, np.int64)
            rows = [{"box": [round(float(v), 2) for v in b], "score": float(s), "match": int(m)}
                    for b, s, m in zip(boxes, scores, matched)]
            kept = run.judged[name] = (key, rows, json.dumps(rows, separators=(",", ":")))
        return kept[1], kept[2]

    def _judged_runs(self, name: str, labels) -> list[tuple[list[dict], str]]:
        return [self._judged(run, name, labels) for _, _, run in self.runs]

    def _image_head(self, name: str) -> dict:
        """An image's record without its runs: name, labels, reviewed, listed, the audit's flags."""
        return {"name": name, "labels": self.store.labels_of(name),
                "reviewed": self.store.images[name].reviewed, "listed": name in self.store.listed,
                "flags": self.flags.get(name, [])}

    def image_record(self, name: str) -> dict:
        """One image for the page: labels; per run its detections, each with the label it matches
        at IoU 0.5 (greedy in descending score, so a scan at any threshold matches a prefix the
        same way); the audit's flags; the reviewed flag."""
        head = self._image_head(name)
        return {**head, "runs": [rows for rows, _ in self._judged_runs(name, head["labels"])]}

    def state_json(self) -> str:
        """The whole review as JSON text (what the page is sent): the labels file, the styles, the
        runs, and every image's record, each run's detections joined in as already encoded."""
        def record(name):
            head = self._image_head(name)
            runs = ",".join(text for _, text in self._judged_runs(name, head["labels"]))
            return f'{json.dumps(head, separators=(",", ":"))[:-1]},"runs":[{runs}]}}'
        head = json.dumps({"version": self.store.version, "labels_path": str(self.store.path),
                           "styles": STYLES,
                           "runs": [{"name": n, "path": p} for n, p, _ in self.runs],
                           "audit_images": len(self.flags)}, separators=(",", ":"))
        return f'{head[:-1]},"images":[{",".join(record(n) for n in self.store.images)}]}}'


def _scan_settings(detections) -> dict | None:
    """The settings of the scan that made ``detections`` (its provenance), or None."""
    if detections is None:
        return None
    from detector.scan._provenance import read_provenance

    record = read_provenance(detections)
    return None if record is None else record.get("settings")


def create_app(images_dir, labels, detections=None, *, compare=None, audit=None, runs_dir=None,
               token: str | None = None, host: str = "127.0.0.1", port: int = 0):
    """The Flask app of a review. ``host`` and ``port`` are the bound address, which every
    request's ``Host`` header must name (set ``app.config["REVIEW_ADDRESS"]`` once the port is
    known when ``port`` is 0). ``compare`` is a second detections file of the same images,
    ``audit`` an audit folder whose findings flag images, ``runs_dir`` where retraining jobs write
    (without it the page shows the commands but cannot run them)."""
    from flask import Flask, abort, jsonify, request, send_file

    review = Review(images_dir, labels, detections, compare, audit, runs_dir)
    app = Flask("patchwood-review")
    app.config["MAX_CONTENT_LENGTH"] = MAX_BODY
    app.url_map.merge_slashes = False  # "/api/image//etc/x" names "/etc/x", which is refused
    app.config["REVIEW_TOKEN"] = token or secrets.token_urlsafe(24)
    app.config["REVIEW_ADDRESS"] = f"{host}:{port}"
    app.review = review

    @app.before_request
    def guard():
        if request.host != app.config["REVIEW_ADDRESS"]:
            abort(403, "this review answers only at its own address")
        given = request.headers.get("X-Review-Token") or request.args.get("token") or ""
        if not hmac.compare_digest(given.encode(), app.config["REVIEW_TOKEN"].encode()):
            abort(403, "a review needs the token printed with its address")

    @app.errorhandler(403)
    @app.errorhandler(404)
    @app.errorhandler(413)
    def refused(err):
        return jsonify(error=getattr(err, "description", str(err))), err.code

    def asset(name):
        data = resources.files("detector.review").joinpath("assets", name).read_bytes()
        return app.response_class(data, mimetype=_TYPES[Path(name).suffix].split(";")[0],
                                  headers={"Cache-Control": "no-store"})

    @app.get("/")
    def page():
        response = asset("review.html")
        response.set_data(response.get_data().replace(b"TOKEN", app.config["REVIEW_TOKEN"].encode()))
        return response

    @app.get("/assets/<name>")
    def assets(name):
        if name not in ASSETS:
            abort(404, f"no asset {name}")
        return asset(name)

    def state_response():
        return app.response_class(review.state_json(), mimetype="application/json")

    @app.get("/api/state")
    def state():
        return state_response()

    @app.get("/api/image/<path:name>")
    def image(name):
        path = (review.images_dir / name).resolve()
        if review.images_dir not in path.parents or not path.is_file():
            abort(404, f"no image {name!r} in the images folder")
        return send_file(os.fspath(path), max_age=3600)

    def edited(version, names):
        return jsonify(version=version, images=[review.image_record(n) for n in names if n])

    @app.post("/api/edit")
    def edit():
        body = request.get_json(silent=True)
        if not isinstance(body, dict) or "edit" not in body or "image" not in body:
            return jsonify(error="an edit is a JSON object with edit, image and version"), 400
        try:
            version = review.store.apply(body.get("version", -1), str(body["edit"]),
                                         str(body["image"]),
                                         **{k: v for k, v in body.items()
                                            if k in ("box", "index", "cls", "value")})
        except Conflict as err:
            return jsonify(error=str(err), version=review.store.version), 409
        except (InputError, ValueError, TypeError) as err:
            return jsonify(error=str(err)), 400
        return edited(version, [body["image"]])

    @app.post("/api/undo")
    def undo():
        body = request.get_json(silent=True) or {}
        try:
            version, name = review.store.undo(body.get("version", -1))
        except Conflict as err:
            return jsonify(error=str(err), version=review.store.version), 409
        return edited(version, [name])

    def retrainer():
        if review.retrainer is None:
            abort(404, "this review runs no jobs")
        return review.retrainer

    @app.get("/api/retrain")
    def retrain_status():
        return jsonify(retrainer().snapshot())

    @app.post("/api/retrain")
    def retrain_start():
        job = retrainer()
        if not job.start(review.store.version):
            return jsonify(error="a retraining job is already running"), 409
        return jsonify(job.snapshot())

    @app.post("/api/retrain/cancel")
    def retrain_cancel():
        retrainer().cancel()
        return jsonify(retrainer().snapshot())

    @app.post("/api/retrain/open")
    def retrain_open():
        status = retrainer().snapshot()
        if status["state"] != "done":
            return jsonify(error="no finished retraining job to open"), 409
        try:
            review.open_comparison(status["detections"])
        except InputError as err:
            return jsonify(error=str(err)), 400
        return state_response()

    return app


def serve(app, host: str = "127.0.0.1", port: int = 0, ready=None) -> None:
    """Run ``app`` with waitress on ``host:port`` (port 0: a free one) until interrupted;
    ``ready(address)`` is called with the bound ``host:port`` once it listens."""
    from waitress import create_server

    server = create_server(app, host=host, port=port, threads=4, max_request_body_size=MAX_BODY)
    bound = f"{host}:{server.effective_port}"
    app.config["REVIEW_ADDRESS"] = bound
    if ready is not None:
        ready(bound)
    try:
        server.run()
    finally:
        server.close()
