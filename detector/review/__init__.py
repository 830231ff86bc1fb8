"""Review in the browser (``patchwood review``): every detection against the labels, the labels
fixed in place, and the commands to retrain from them.

:class:`LabelStore` (``store``) edits the labels file; :func:`create_app` (``app``) is the web
application over it, which :func:`serve` runs on a local address.
"""

from detector.review.app import MAX_BODY, create_app, serve
from detector.review.store import Conflict, LabelStore

__all__ = ["LabelStore", "Conflict", "create_app", "serve", "MAX_BODY"]
