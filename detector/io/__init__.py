"""Reading and writing files, the lowest layer of the data flow.

- :mod:`detector.io.files`: regular files only, bounded reads, the one atomic writer, output
  locks, display names for file names that are not UTF-8;
- :mod:`detector.io.npzfile`: deterministic, validated ``.npz`` archives (no pickle), the file
  format of patch banks and models;
- :mod:`detector.io.labels`: the labels CSV contract, COCO JSON, detections and COCO results;
- :mod:`detector.io.images`: ``read_gray`` (8/16-bit, colour, alpha, palette, EXIF turn) and
  ``list_images``.

Nothing here imports a higher layer of :mod:`detector`.
"""
