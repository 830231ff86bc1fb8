"""`patchwood review IMAGES_DIR LABELS [--detections DETECTIONS.csv] [--compare OTHER.csv]
[--audit AUDIT_DIR]`: a local web page to look at every detection against the labels, fix the
labels in place, undo, and retrain from them."""

from __future__ import annotations

import secrets
import signal
import tempfile
from pathlib import Path
from typing import Optional

import typer

from cli.common import human_path
from detector.errors import InputError


def review(
    images_dir: Path = typer.Argument(..., help="Folder of the images the labels name."),
    labels: Path = typer.Argument(..., help="Labels file to review and edit in place (labels CSV or COCO JSON); its first version is kept as LABELS.bak, every edit journalled in LABELS.journal.jsonl."),
    detections: Optional[Path] = typer.Option(None, "--detections", help="Detections of these images (a `patchwood scan` output) to judge against the labels."),
    compare: Optional[Path] = typer.Option(None, "--compare", help="A second detections file of the same images (another model or settings): shown in turn with --detections (key c), each with its precision-recall point, and a filter for the images where the two disagree."),
    audit: Optional[Path] = typer.Option(None, "--audit", help="Folder written by `patchwood audit --out`: its findings are drawn on the images and flag them in the list."),
    runs_dir: Optional[Path] = typer.Option(None, "--runs", help="Folder where retraining from the page writes (a new retrain-N folder per job: bank, model, detections). Default: a new folder in the temporary folder, printed at the start and made at the first job."),
    host: str = typer.Option("127.0.0.1", "--host", help="Address to listen on. Anything but 127.0.0.1 lets other machines reach the page (and edit the labels, with the token): a warning is printed."),
    port: int = typer.Option(0, "--port", min=0, max=65535, help="Port to listen on (0: any free one)."),
) -> None:
    """Review detections against labels in the browser, and fix the labels as you go.

    Prints the page's address with a random token; only requests that carry it are answered.
    Stop with Ctrl-C.
    """
    from detector.review import create_app, serve

    token = secrets.token_urlsafe(24)
    if runs_dir is None:
        # made at the first job only
        runs_dir = Path(tempfile.gettempdir()) / f"patchwood-review-{secrets.token_hex(4)}"
    elif runs_dir.exists() and not runs_dir.is_dir():
        raise InputError(f"{human_path(runs_dir)}: --runs must be a folder")
    app = create_app(images_dir, labels, detections, compare=compare, audit=audit,
                     runs_dir=runs_dir, token=token, host=host, port=port)
    if host != "127.0.0.1":
        typer.echo(f"warning: listening on {host}: other machines can reach this review, and "
                   f"anyone with the address below can edit {human_path(labels)}", err=True)

    def ready(address):
        typer.echo(f"review of {human_path(labels)} ({len(app.review.store.images)} images): "
                   f"http://{address}/?token={token}")
        typer.echo(f"retraining writes into {human_path(runs_dir)}")
        typer.echo("stop with Ctrl-C")

    # Ctrl-C and a polite kill both stop the server (waitress ends its loop on KeyboardInterrupt),
    # also when started from a shell that ignores SIGINT in background jobs
    signal.signal(signal.SIGINT, signal.default_int_handler)
    signal.signal(signal.SIGTERM, signal.default_int_handler)
    try:
        serve(app, host, port, ready=ready)
    except KeyboardInterrupt:
        pass
    if app.review.retrainer is not None and app.review.retrainer.cancel():
        app.review.retrainer.wait(timeout=10)  # a job still running stops with the page
    typer.echo("stopped")
