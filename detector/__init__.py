"""patchwood's library: labels, images, integral images, rectangle-difference features, forests,
the sliding-window scan and its evaluation."""

__version__ = "0.1.0"
