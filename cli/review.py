"""`patchwood review IMAGES_DIR LABELS [--detections DETECTIONS.csv]`: a local web page to look at
every detection against the labels, fix the labels in place, and undo."""

from __future__ import annotations

import secrets
from pathlib import Path
from typing import Optional

import typer

from cli.common import human_path


def review(
    images_dir: Path = typer.Argument(..., help="Folder of the images the labels name."),
    labels: Path = typer.Argument(..., help="Labels file to review and edit in place (labels CSV or COCO JSON); its first version is kept as LABELS.bak, every edit journalled in LABELS.journal.jsonl."),
    detections: Optional[Path] = typer.Option(None, "--detections", help="Detections of these images (a `patchwood scan` output) to judge against the labels."),
    host: str = typer.Option("127.0.0.1", "--host", help="Address to listen on. Anything but 127.0.0.1 lets other machines reach the page (and edit the labels, with the token): a warning is printed."),
    port: int = typer.Option(0, "--port", min=0, max=65535, help="Port to listen on (0: any free one)."),
) -> None:
    """Review detections against labels in the browser, and fix the labels as you go.

    Prints the page's address with a random token; only requests that carry it are answered.
    Stop with Ctrl-C.
    """
    from detector.review import create_app, serve

    token = secrets.token_urlsafe(24)
    app = create_app(images_dir, labels, detections, token=token, host=host, port=port)
    if host != "127.0.0.1":
        typer.echo(f"warning: listening on {host}: other machines can reach this review, and "
                   f"anyone with the address below can edit {human_path(labels)}", err=True)

    def ready(address):
        typer.echo(f"review of {human_path(labels)} ({len(app.review.store.images)} images): "
                   f"http://{address}/?token={token}")
        typer.echo("stop with Ctrl-C")

    try:
        serve(app, host, port, ready=ready)
    except KeyboardInterrupt:
        typer.echo("stopped")
