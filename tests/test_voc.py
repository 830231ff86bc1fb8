"""Label formats beside the labels CSV: Pascal VOC XML (detector.io.voc), the corner CSV
(``x_min,y_min,x_max,y_max``) and semicolon-separated files.

References: the VOC annotation layout and its 1-based, inclusive pixel coordinates are those of
the PASCAL VOC development kit (Everingham et al., IJCV 2010); the hand-written file below follows
that description (its numbers are made up for the test, not taken from the data set). Round trips
are property tests (hypothesis) against the labels CSV contract (GLOSSARY.md).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from detector.errors import InputError
from detector.io.labels import ImageLabels, read_labels, write_labels_csv
from detector.io.voc import read_voc, write_voc

HAND_WRITTEN = """<annotation>
  <folder>VOC2007</folder>
  <filename>000042.jpg</filename>
  <source><database>The VOC2007 Database</database></source>
  <size><width>353</width><height>500</height><depth>3</depth></size>
  <segmented>0</segmented>
  <object>
    <name>dog</name><pose>Left</pose><truncated>1</truncated><difficult>0</difficult>
    <bndbox><xmin>48</xmin><ymin>240</ymin><xmax>195</xmax><ymax>371</ymax></bndbox>
  </object>
  <object>
    <name>person</name><pose>Left</pose><truncated>1</truncated><difficult>1</difficult>
    <bndbox><xmin>8</xmin><ymin>12</ymin><xmax>352</xmax><ymax>498</ymax></bndbox>
  </object>
</annotation>
"""


def test_hand_written_voc_file(tmp_path):
    """xmin 48 .. xmax 195 inclusive, 1-based: x = 47, width = 195 - 48 + 1 = 148; ymin 240 ..
    ymax 371: y = 239, height = 132. The second box, 8..352 x 12..498: x 7, y 11, width 345,
    height 487; it is marked difficult: an ignore region, counted in a note."""
    path = tmp_path / "000042.xml"
    path.write_text(HAND_WRITTEN)
    lf = read_voc(path)
    assert [it.image for it in lf] == ["000042.jpg"]
    assert lf[0].boxes.tolist() == [[47.0, 239.0, 148.0, 132.0], [7.0, 11.0, 345.0, 487.0]]
    assert lf[0].classes == ["dog", "person"]
    assert lf.image_sizes == {"000042.jpg": (353, 500)}
    assert lf[0].ignore.tolist() == [False, True]
    assert any("1 object(s) marked difficult, read as ignore regions" in n for n in lf.notes)
    # read_labels takes the same file (and a folder of them) by its suffix
    assert read_labels(path)[0].boxes.tolist() == lf[0].boxes.tolist()
    assert read_labels(tmp_path, label="dog")[0].boxes.tolist() == [[47.0, 239.0, 148.0, 132.0]]


boxes = st.lists(st.tuples(st.integers(0, 300), st.integers(0, 300), st.integers(1, 200),
                           st.integers(1, 200)).map(lambda b: [v / 2 for v in b]),
                 max_size=5)


@settings(max_examples=60, deadline=None)
@given(st.lists(boxes, min_size=1, max_size=4))
def test_voc_and_corner_csv_round_trip(tmp_path_factory, per_image):
    """Labels written as VOC files, or as a corner CSV, read back as the same images, boxes and
    classes as the labels CSV holds them (halves of pixels: every sum is exact in float64)."""
    items = [ImageLabels(f"belt/f{k}.png", b, ["nut"] * len(b)) for k, b in enumerate(per_image)]
    root = tmp_path_factory.mktemp("formats")
    write_labels_csv(root / "labels.csv", items)
    reference = read_labels(root / "labels.csv")
    write_voc(root / "voc", items, {it.image: (800, 600) for it in items})
    write_labels_csv(root / "corners.csv", items, box_format="corners")
    assert (root / "corners.csv").read_text().startswith("image,x_min,y_min,x_max,y_max")
    for other in (read_labels(root / "voc"), read_labels(root / "corners.csv")):
        assert [it.image for it in other] == [it.image for it in reference]
        for a, b in zip(other, reference):
            np.testing.assert_array_equal(a.boxes, b.boxes)
            assert a.classes == b.classes


def test_semicolon_files_are_read_and_said_so(tmp_path):
    """A spreadsheet's CSV with semicolons and decimal commas: 112,5 is 112.5."""
    path = tmp_path / "labels.csv"
    path.write_text("image;x;y;width;height;label\nf1.png;112,5;64;38;37;nut\nf2.png;;;;;\n")
    lf = read_labels(path)
    assert [(it.image, it.boxes.tolist()) for it in lf] == [("f1.png", [[112.5, 64.0, 38.0, 37.0]]),
                                                            ("f2.png", [])]
    assert lf.notes == [f"{path}:1: the fields are separated by semicolons; read that way "
                        "(decimal commas accepted)"]


@pytest.mark.parametrize("text, message, line", [
    ('<?xml version="1.0"?>\n<!DOCTYPE a [<!ENTITY x "xx">]>\n<annotation/>',
     "DOCTYPE declarations are not accepted", 2),
    ("<annotation>\n<filename>a.png</filename>\n<object><name>x</name></annotation>",
     "not well-formed XML", 3),
    ("<labels/>", "the root element is <labels>, not <annotation>", 1),
    ("<annotation><filename>a.png</filename><object><bndbox><xmin>1</xmin><ymin>1</ymin>"
     "<xmax>a</xmax><ymax>4</ymax></bndbox></object></annotation>", "<xmax> is not a number", None),
])
def test_bad_voc_files_are_one_line_errors(tmp_path, text, message, line):
    path = tmp_path / "bad.xml"
    path.write_text(text)
    with pytest.raises(InputError) as err:
        read_voc(path)
    assert message in str(err.value) and "\n" not in str(err.value)
    assert err.value.line == line


def test_an_entity_expansion_is_refused_before_parsing(tmp_path):
    """The 'billion laughs' shape: refused at its declaration, never expanded."""
    lol = "".join(f'<!ENTITY l{k} "{"&l%d;" % (k - 1) * 10 if k else "lol"}">' for k in range(9))
    path = tmp_path / "lol.xml"
    path.write_text(f"<!DOCTYPE annotation [{lol}]><annotation>&l8;</annotation>")
    with pytest.raises(InputError, match="declarations are not accepted"):
        read_voc(path)


def test_commands_read_voc_folders_and_write_corner_csv(tmp_path):
    """harvest takes a folder of VOC files as LABELS and cuts the same bank as from the CSV;
    scan --box-format corners writes x_min,y_min,x_max,y_max, and score reads that file by its
    header to the same figures as the x,y,width,height file."""
    import json

    from typer.testing import CliRunner

    from cli.main import app
    from detector.harvest import load_bank

    run = CliRunner()
    data = tmp_path / "s"
    assert run.invoke(app, ["synth", str(data), "--frames", "6"]).exit_code == 0
    train = data / "train"
    write_voc(tmp_path / "voc", read_labels(train / "labels.csv"))
    for name, labels in (("csv", train / "labels.csv"), ("voc", tmp_path / "voc")):
        r = run.invoke(app, ["harvest", str(train / "images"), str(labels), "--out",
                             str(tmp_path / f"{name}.npz"), "--copies", "1"])
        assert r.exit_code == 0, r.output
    a, b = load_bank(tmp_path / "csv.npz"), load_bank(tmp_path / "voc.npz")
    np.testing.assert_array_equal(a.patches, b.patches)
    r = run.invoke(app, ["train", str(tmp_path / "csv.npz"), "--out", str(tmp_path / "m.npz"),
                         "--trees", "5", "--pool", "200", "--mine-rounds", "0"])
    assert r.exit_code == 0, r.output
    figures = {}
    for fmt in ("xywh", "corners"):
        out = tmp_path / f"d-{fmt}.csv"
        r = run.invoke(app, ["scan", str(tmp_path / "m.npz"), str(data / "test" / "images"),
                             "--out", str(out), "--threshold", "0.05", "--box-format", fmt])
        assert r.exit_code == 0, r.output
        r = run.invoke(app, ["score", str(out), str(data / "test" / "labels.csv"), "--out",
                             str(tmp_path / f"r-{fmt}")])
        assert r.exit_code == 0, r.output
        figures[fmt] = json.loads((tmp_path / f"r-{fmt}" / "summary.json").read_text())
    assert (tmp_path / "d-corners.csv").read_text().startswith("image,x_min,y_min,x_max,y_max,score\n")
    assert figures["corners"]["average_precision"] == figures["xywh"]["average_precision"]


def test_harvest_cuts_no_object_patches_from_ignore_regions(tmp_path):
    """A box flagged ignore (a VOC difficult object) gives no object patch: the bank of labels
    with one box flagged holds the patches of the others only (background stays off every box)."""
    from detector.harvest import harvest
    from synthetic_images import render_scenario

    render_scenario(tmp_path / "s", 3, 1, seed=2)
    images = tmp_path / "s" / "train" / "images"
    items = [it for it in read_labels(tmp_path / "s" / "train" / "labels.csv") if len(it.boxes)]
    flagged = [ImageLabels(it.image, it.boxes, it.classes, np.arange(len(it.boxes)) == 0)
               for it in items]
    plain = harvest(images, items, copies=0, negatives_per_image=0, near_negatives=0, seed=0)
    fewer = harvest(images, flagged, copies=0, negatives_per_image=0, near_negatives=0, seed=0)
    assert plain.counts()["objects"] - fewer.counts()["objects"] == len(items)
