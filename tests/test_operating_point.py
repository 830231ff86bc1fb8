"""The operating point a report recommends is what the daily scan delivers (issue 16).

The whole round trip through the command line, as the README tells a user to run it: a curve
scan at threshold 0.05, `score` (best F1: threshold T, precision P, recall R), a scan with
`--threshold-from summary.json`, and `score` again must give exactly P and R at exactly T, and a
detections file that is the curve scan's rows scoring T or more. Nothing here depends on the
pixels of a particular resampler: the test compares two runs of this project with each other, on
a tiny scenario rendered here (bagged and boosted models, default exits and --exit-level 0.5).

Also the refusals of `--threshold-from`: a summary made from another model's detections (one
line, exit 1; --force accepts it with a warning), a threshold outside 0..1, an --exit-level that
differs from the summary's (a usage error, exit 2).
"""

from __future__ import annotations

import csv
import json
import sys

import pytest

import cli.main
from detector.harvest import harvest
from detector.io.labels import read_labels
from detector.model import save_model
from detector.training import train_model
from synthetic_images import render_scenario


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    """A 14-frame scenario (8 test frames) and a bagged and a boosted model of 30 trees."""
    root = tmp_path_factory.mktemp("operating-point")
    render_scenario(root, train_images=14, test_images=8, seed=4)
    items = list(read_labels(root / "train" / "labels.csv", root / "train" / "images"))
    bank = harvest(root / "train" / "images", items, window=(24, 24), negatives_per_image=60,
                   seed=0)
    for mode in ("bagged", "boosted"):
        model, _ = train_model(bank, dict(n_trees=30, pool=2500, mode=mode, random_state=0))
        save_model(root / f"{mode}.npz", model)
    return root


def patchwood(monkeypatch, capsys, *args):
    """``patchwood ARGS...`` through the console entry point: (exit status, stdout, stderr)."""
    monkeypatch.setattr(sys, "argv", ["patchwood", *[str(a) for a in args]])
    with pytest.raises(SystemExit) as stop:
        cli.main.run()
    captured = capsys.readouterr()
    return (stop.value.code or 0), captured.out, captured.err


def rows(path):
    """The detection rows of a detections CSV as tuples of text (empty rows dropped)."""
    with open(path, newline="", encoding="utf-8") as fh:
        return [tuple(r) for r in csv.reader(fh)][1:]


@pytest.mark.parametrize("mode, exit_level", [("bagged", None), ("boosted", None),
                                              ("boosted", 0.5)])
def test_the_scan_at_the_recommended_threshold_reproduces_the_report(scenario, tmp_path, mode,
                                                                     exit_level, monkeypatch,
                                                                     capsys):
    model = scenario / f"{mode}.npz"
    images, labels = scenario / "test" / "images", scenario / "test" / "labels.csv"
    level = [] if exit_level is None else ["--exit-level", exit_level]
    curve = tmp_path / "curve.csv"
    code, _, err = patchwood(monkeypatch, capsys, "scan", model, images, "--out", curve,
                             "--threshold", 0.05, *level)
    assert code == 0, err
    code, _, err = patchwood(monkeypatch, capsys, "score", curve, labels, "--out",
                             tmp_path / "report")
    assert code == 0, err
    summary = json.loads((tmp_path / "report" / "summary.json").read_text())
    point = summary["operating_point"]
    assert point["threshold"] is not None and point["recall"] > 0, point
    # the summary says which detections, model and settings it was made from
    assert summary["provenance"]["model"]["file"] == str(model)
    assert summary["provenance"]["settings"]["exit_level"] == exit_level
    assert summary["provenance"]["settings"]["threshold"] == 0.05
    # and says when tighter exits shaped the curve
    assert any("tighter early exits for scans at 0.5 or above" in n for n in summary["notes"]) \
        == (exit_level is not None)

    daily = tmp_path / "daily.csv"
    code, out, err = patchwood(monkeypatch, capsys, "scan", model, images, "--out", daily,
                               "--threshold-from", tmp_path / "report" / "summary.json")
    assert code == 0, err
    assert "warning" not in err  # same model, same settings: nothing to warn about
    assert f"threshold {point['threshold']:g} from " in out
    record = json.loads((tmp_path / "daily.provenance.json").read_text())
    assert record["settings"]["threshold"] == point["threshold"]
    assert record["settings"]["exit_level"] == exit_level  # the summary's exits, reused
    assert record["threshold_from"] == str(tmp_path / "report" / "summary.json")
    # the daily file holds exactly the curve scan's rows scoring T or more, in the same order
    # (an image left with none keeps one empty row, as every scanned image does)
    by_image = {}
    for r in rows(curve):
        by_image.setdefault(r[0], [])
        if r[5] != "" and float(r[5]) >= point["threshold"]:
            by_image[r[0]].append(r)
    expected = [r for image, group in by_image.items()
                for r in (group or [(image, "", "", "", "", "")])]
    assert rows(daily) == expected

    code, _, err = patchwood(monkeypatch, capsys, "score", daily, labels, "--out",
                             tmp_path / "again")
    assert code == 0, err
    again = json.loads((tmp_path / "again" / "summary.json").read_text())["operating_point"]
    assert (again["threshold"], again["precision"], again["recall"]) == \
        (point["threshold"], point["precision"], point["recall"])
    # and the report's table and galleries described those very detections
    at = summary["at_operating_point"]
    assert at["detections"] == sum(1 for r in rows(daily) if r[5] != "")
    whole = json.loads((tmp_path / "again" / "summary.json").read_text())
    assert at["per_image"] == whole["per_image"]
    assert (at["true_detections"], at["false_alarms"], at["misses"]) == \
        (whole["true_detections"], whole["false_alarms"], whole["misses"])


def test_threshold_from_refuses_another_models_summary(scenario, tmp_path, monkeypatch, capsys):
    images, labels = scenario / "test" / "images", scenario / "test" / "labels.csv"
    curve = tmp_path / "curve.csv"
    assert patchwood(monkeypatch, capsys, "scan", scenario / "bagged.npz", images, "--out", curve,
                     "--threshold", 0.05)[0] == 0
    assert patchwood(monkeypatch, capsys, "score", curve, labels, "--out",
                     tmp_path / "report")[0] == 0
    summary = tmp_path / "report" / "summary.json"
    daily = tmp_path / "daily.csv"
    code, out, err = patchwood(monkeypatch, capsys, "scan", scenario / "boosted.npz", images,
                               "--out", daily, "--threshold-from", summary)
    assert code == 1 and err.count("\n") == 1 and "Traceback" not in err, err
    assert err.startswith(f"error: {summary}: the summary's detections were made with another "
                          f"model ({scenario / 'bagged.npz'} (sha256 ")
    assert err.rstrip().endswith("or add --force")
    assert not daily.exists()
    # --force uses it anyway, and says so
    code, out, err = patchwood(monkeypatch, capsys, "scan", scenario / "boosted.npz", images,
                               "--out", daily, "--threshold-from", summary, "--force")
    assert code == 0, err
    assert "warning: " in err and "its threshold is used anyway (--force)" in err
    # an --exit-level other than the summary's (none) would break the match: a usage error
    code, _, err = patchwood(monkeypatch, capsys, "scan", scenario / "bagged.npz", images,
                             "--out", tmp_path / "x.csv", "--threshold-from", summary,
                             "--exit-level", 0.5)
    assert code == 2 and err.count("\n") == 1
    assert "--exit-level 0.5 differs from the exit level the summary's detections were made " \
           "with (none)" in err
    # other settings are allowed, with a warning that the report's figures hold for its own
    code, _, err = patchwood(monkeypatch, capsys, "scan", scenario / "bagged.npz", images,
                             "--out", tmp_path / "y.csv", "--threshold-from", summary,
                             "--stride", 3)
    assert code == 0
    assert "warning: the report's detections were made with other settings: stride 3.0 " \
           "(recorded 2.0)" in err
    # a threshold outside 0..1 is refused in one line
    doc = json.loads(summary.read_text())
    doc["operating_point"]["threshold"] = 1.5
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps(doc))
    code, _, err = patchwood(monkeypatch, capsys, "scan", scenario / "bagged.npz", images,
                             "--out", tmp_path / "z.csv", "--threshold-from", bad)
    assert code == 1
    assert err == f"error: {bad}: the operating point's threshold 1.5 is not a score in 0..1\n"
    # a summary without provenance (detections from elsewhere) is used, with a warning
    doc["operating_point"]["threshold"] = 0.5
    doc["provenance"] = None
    bad.write_text(json.dumps(doc))
    code, _, err = patchwood(monkeypatch, capsys, "scan", scenario / "bagged.npz", images,
                             "--out", tmp_path / "w.csv", "--threshold-from", bad)
    assert code == 0
    assert "does not say which model and settings made its detections" in err
