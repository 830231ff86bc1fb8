"""`patchwood demo` end to end on a tiny scenario (the full-size run is `make demo`)."""

import json

from typer.testing import CliRunner

from cli.main import app
from detector.evaluation import evaluate
from detector.io.labels import read_detections, read_labels
from detector.model import load_model


def test_demo_runs_the_whole_workflow_on_small_data(tmp_path):
    out = tmp_path / "demo"
    args = ["demo", "--out", str(out), "--frames", "10", "--trees", "8", "--pool", "300",
            "--mine-rounds", "1", "--jobs", "1"]
    result = CliRunner().invoke(app, args)
    assert result.exit_code == 0, result.output
    for name in ("bank.npz", "model.npz", "detections.csv", "report/report.html",
                 "report/summary.json"):
        assert (out / name).is_file(), name
    assert "report:" in result.output and "[5/5]" in result.output
    # the frames are drawn at the recommended threshold, one per test frame (10 frames: 8 / 2)
    threshold = json.loads((out / "report" / "summary.json").read_text())["operating_point"][
        "threshold"]
    assert len(list((out / "drawn").glob("*.png"))) == 2
    assert f"2 annotated frames in {out / 'drawn'}, detections at score >= " \
           f"{0.05 if threshold is None else threshold:g}" in result.output
    assert (out / "detections.provenance.json").is_file()
    model = load_model(out / "model.npz")
    assert model.n_trees == 8 and len(model.metadata["mining"]) == 2  # first model + after round 1
    # the report's AP is the evaluator's AP on the files the demo wrote
    dets = {d.image: (d.boxes, d.scores) for d in read_detections(out / "detections.csv")}
    labels = read_labels(out / "scenario" / "test" / "labels.csv")
    ev = evaluate(dets, {it.image: it.boxes for it in labels})
    summary = json.loads((out / "report" / "summary.json").read_text())
    assert abs(summary["average_precision"] - ev.average_precision) < 1e-9
    # a second run without --force refuses and leaves the files alone
    before = (out / "model.npz").read_bytes()
    again = CliRunner().invoke(app, args)
    assert again.exit_code != 0 and "--force" in str(again.exception)
    assert (out / "model.npz").read_bytes() == before
