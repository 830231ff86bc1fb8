"""What a person reads, the top of the data flow below the command line:

- :mod:`~detector.reporting.score_report`: ``score`` -- the report folder (``report.html``,
  ``summary.json``, plots, galleries) from a detections file and a labels file;
- :mod:`~detector.reporting.inputs`: reading and checking those two files;
- :mod:`~detector.reporting.summary`: ``summary.json``, its operating point (read back by
  ``scan --threshold-from``) and the printed table;
- :mod:`~detector.reporting.threshold_data`: the scores and matches ``report.html`` embeds for
  its threshold slider;
- :mod:`~detector.reporting.plots`: precision-recall, miss rate, score histograms;
- :mod:`~detector.reporting.drawing`: box marks, thumbnails, PNG files;
- :mod:`~detector.reporting.audit`: ``audit`` -- out-of-bag label audit, its CSV and page;
- :mod:`~detector.reporting.inspection`: ``inspect`` -- model summary and feature pictures;
- :mod:`~detector.reporting._html`: the HTML the pages share, with the page template and style
  sheets kept as package files in ``assets/``.
"""
