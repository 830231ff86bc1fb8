"""The scan: a model run over whole images, and over folders of them.

- ``_engine``: :class:`Engine` (the multi-scale sliding-window scan of one grey image: scale plans,
  integral images, the trees with early exit and contrast gate, non-maximum suppression) and
  :class:`ScanSettings`;
- ``_kernels``: its compiled loops (numba), with plain-numpy twins in ``_engine``;
- ``_batch``: folder runs (processes or a Dask cluster; resumable, atomic output; failures side
  file; drawings);
- ``_provenance``: the side file beside every detections file (model SHA-256, settings,
  versions) and the checks that use it.

Public names of the three are re-exported here.
"""


from detector.scan._batch import (CLUSTER_BATCH_BYTES, CLUSTER_BATCH_IMAGES, DETECTION_COLOUR,
                                  FORMATS, TEXT_COLOUR, ImageResult, RunSummary,
                                  check_cluster_address, check_draw_dir, draw_detections,
                                  draw_folder, failures_path, scan_bytes_batch, scan_one,
                                  scan_paths)
from detector.scan._engine import (MAX_DEFAULT_ENLARGEMENT, MAX_OVERHANG, SCORE_DECIMALS,
                                   SIZE_SLACK, Engine, FramePlan, FrameResult, ScalePlan,
                                   ScanSettings, channel_frame_integrals, check_enlargement,
                                   clip_boxes, default_object_range, detection_scores,
                                   edge_positions, enlarged_size, final_scores, first_use_order,
                                   frame_integrals, integral_dtype, kernel_cutoff, raw_cutoff,
                                   scale_plan, scales_for, scan_scale_numpy, skipped_sizes_note,
                                   split_bounds, level_edges, area_shrink_numpy, shrink_level,
                                   BAND_BYTES, level_bands, relative_features, VOTE_IOU,
                                   vote_boxes)
from detector.scan._provenance import (PROVENANCE_FORMAT, PROVENANCE_VERSION, check_same_scan,
                                       check_summary_model, describe_settings, model_differences,
                                       model_record, provenance_of, provenance_path,
                                       read_provenance, scan_record, settings_differences,
                                       write_provenance)

__all__ = [
    "DETECTION_COLOUR", "TEXT_COLOUR", "ImageResult", "RunSummary", "scan_one", "scan_bytes_batch",
    "CLUSTER_BATCH_IMAGES", "CLUSTER_BATCH_BYTES", "draw_detections", "draw_folder",
    "check_draw_dir", "FORMATS", "failures_path", "scan_paths", "check_cluster_address",
    "ScalePlan", "scale_plan", "scales_for", "MAX_OVERHANG", "edge_positions", "ScanSettings",
    "SIZE_SLACK", "MAX_DEFAULT_ENLARGEMENT", "default_object_range", "skipped_sizes_note",
    "FramePlan", "FrameResult", "raw_cutoff", "final_scores", "SCORE_DECIMALS", "detection_scores",
    "kernel_cutoff", "integral_dtype", "frame_integrals", "channel_frame_integrals",
    "enlarged_size", "check_enlargement", "split_bounds", "first_use_order", "Engine",
    "clip_boxes", "scan_scale_numpy", "PROVENANCE_FORMAT", "PROVENANCE_VERSION", "provenance_path",
    "model_record", "scan_record", "write_provenance", "read_provenance", "provenance_of",
    "settings_differences", "model_differences", "check_summary_model", "check_same_scan",
    "describe_settings", "level_edges", "area_shrink_numpy", "shrink_level", "BAND_BYTES",
    "level_bands", "VOTE_IOU", "vote_boxes", "relative_features",
]
