"""The label audit: out-of-bag scores, suspicion ranking, the audit folder and `patchwood audit`.

References: the out-of-bag scores are held equal to a slow direct computation with scikit-learn's
own fitted trees (``DecisionTreeClassifier.predict_proba``, kept with ``keep_estimators=True``),
averaged over the trees whose recorded bootstrap draws left each patch out ("Random Forests",
Machine Learning 45, 2001, section 3.1); the flipped-label check compares the audit's ranking with
the one from scikit-learn's ``RandomForestClassifier(oob_score=True).oob_decision_function_`` on the
same feature values. Suspicion orderings are worked by hand in the comments.
"""

import csv
import dataclasses
import sys
from pathlib import Path

import numpy as np
import pytest
import typer
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.ensemble import RandomForestClassifier
from typer.testing import CliRunner

from cli.audit import audit
from detector import features as F
from detector.reporting.audit import (AUDIT_STYLES, BACKGROUND_CALLED_OBJECT, CSV_COLUMNS, CSV_NAME,
                            HTML_NAME, OBJECT_CALLED_BACKGROUND, THUMBNAIL_DIR, AuditResult,
                            Finding, audit_bank, audit_thumbnail, check_audit_folder,
                            harvest_for_audit, suspicion, suspicion_order, write_audit)
from detector.errors import InputError
from detector.forest import forest_oob_scores, grow_forest, oob_scores
from detector.harvest import KIND_AUGMENTED, harvest, save_bank
from detector.io.labels import read_labels
from synthetic_images.scenario import render_scenario
from shared import Links

app = typer.Typer()
app.command()(audit)


def run(*args):
    return CliRunner().invoke(app, [str(a) for a in args])


# --------------------------------------------------------------------------------------------
# out-of-bag scores


def _data(n=150, f=10, seed=0):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, f)).astype(np.float32)
    y = ((X[:, 2] - 0.7 * X[:, 5] + 0.6 * rng.normal(size=n)) > 0).astype(np.int64)
    return np.asfortranarray(X), y


def _direct_oob(forest, X):
    """Slow reference: per patch, scikit-learn's predict_proba of every tree that left it out."""
    n = len(X)
    scores = np.full(n, np.nan)
    count = np.zeros(n, np.int64)
    for i in range(n):
        values = [est.predict_proba(X[i : i + 1])[0, 1]
                  for t, est in enumerate(forest.estimators) if forest.in_bag[t, i] == 0]
        count[i] = len(values)
        if values:
            scores[i] = np.mean(values)
    return scores, count


@pytest.mark.parametrize("n_trees, depth, fraction", [(12, 2, 1.0), (8, 3, 0.7), (2, 1, 1.0)])
def test_oob_scores_equal_a_direct_computation(n_trees, depth, fraction):
    X, y = _data(seed=depth)
    scores, trees_out, forest = oob_scores(X, y, n_trees=n_trees, depth=depth,
                                           sample_fraction=fraction, random_state=5)
    expected, count = _direct_oob(forest, X)
    np.testing.assert_array_equal(trees_out, count)
    np.testing.assert_array_equal(np.isnan(scores), count == 0)
    # leaf values are scikit-learn's float64 fractions rounded once to float32
    np.testing.assert_allclose(scores, expected, rtol=1e-6, atol=1e-7, equal_nan=True)
    # the bootstrap record is the one grow_forest draws: n_draw = round(fraction * N) per tree
    assert (forest.in_bag.sum(axis=1) == round(fraction * len(X))).all()
    # with 2 trees some patches are in both bootstraps (about 0.63**2 = 40 % of them): NaN
    if n_trees == 2:
        assert 0 < np.isnan(scores).sum() < len(X)
    # the forest's own out-of-bag error is the error of these scores at 0.5
    seen = ~np.isnan(scores)
    assert forest.oob_error == np.mean((scores[seen] > 0.5) != (y[seen] == 1))


def test_forest_oob_scores_needs_a_bagged_forest_with_its_record():
    X, y = _data(n=60)
    plain = grow_forest(X, y, n_trees=3, random_state=0)
    with pytest.raises(ValueError, match="keep_estimators"):
        forest_oob_scores(plain, X)
    boosted = grow_forest(X, y, mode="boosted", n_trees=3, random_state=0, keep_estimators=True)
    with pytest.raises(ValueError, match="bagged"):
        forest_oob_scores(boosted, X)
    kept = grow_forest(X, y, n_trees=3, random_state=0, keep_estimators=True)
    with pytest.raises(ValueError, match="shape"):
        forest_oob_scores(kept, X[:-1])


def test_oob_scores_chunked_equal_whole():
    X, y = _data(n=130, seed=3)
    scores, trees_out, forest = oob_scores(X, y, n_trees=6, random_state=1)
    s2, k2 = forest_oob_scores(forest, X, chunk=17)
    np.testing.assert_array_equal(s2, scores)
    np.testing.assert_array_equal(k2, trees_out)


# --------------------------------------------------------------------------------------------
# suspicion


def test_suspicion_order_by_hand():
    scores = [0.875, 0.25, 0.625, 0.125, np.nan, 0.25, 0.5]
    labels = [1, 1, 0, 0, 0, 0, 1]
    # objects: 1 - s -> 0.125, 0.75, ., ., ., ., 0.5; background: s -> 0.625, 0.125, nan, 0.25
    np.testing.assert_array_equal(suspicion(scores, labels),
                                  [0.125, 0.75, 0.625, 0.125, np.nan, 0.25, 0.5])
    # 0.75 (1), 0.625 (2), 0.5 (6), 0.25 (5), then the tie 0.125 in index order (0, 3); NaN out
    assert suspicion_order(scores, labels).tolist() == [1, 2, 6, 5, 0, 3]


@settings(max_examples=40, deadline=None)
@given(st.lists(st.tuples(st.one_of(st.integers(0, 64).map(lambda k: k / 64),  # 1 - s exact
                                     st.just(float("nan"))), st.integers(0, 1)),
                min_size=0, max_size=40))
def test_suspicion_order_properties(pairs):
    scores = np.array([p[0] for p in pairs], dtype=np.float64)
    labels = np.array([p[1] for p in pairs], dtype=np.int64)
    sus = suspicion(scores, labels)
    order = suspicion_order(scores, labels)
    # every scored patch exactly once, none of the unscored
    assert sorted(order.tolist()) == np.flatnonzero(~np.isnan(scores)).tolist()
    # suspicion never rises along the order, and lies in 0..1
    assert (np.diff(sus[order]) <= 0).all()
    assert ((sus[order] >= 0) & (sus[order] <= 1)).all()
    # flipping a label and mirroring its score leaves its suspicion unchanged
    np.testing.assert_array_equal(suspicion(1 - scores, 1 - labels), sus)


def test_suspicious_selects_disagreements_up_to_top():
    findings = [Finding("a.png", (0, 0, 4, 4), OBJECT_CALLED_BACKGROUND, s, 1 - s, i, "object", 5)
                for i, s in enumerate((0.0, 0.25, 0.5, 0.75))]
    result = AuditResult(findings=findings)
    # suspicions 1, 0.75, 0.5, 0.25: above 0.5 are the first two; 0.5 itself is no disagreement
    assert [f.patch for f in result.suspicious()] == [0, 1]
    assert [f.patch for f in result.suspicious(top=1)] == [0]
    assert [f.patch for f in result.suspicious(min_suspicion=0.2)] == [0, 1, 2, 3]
    assert result.disagreements == 2 and len(result) == 4 and result[2].patch == 2


# --------------------------------------------------------------------------------------------
# the audit on a rendered scenario


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    root = tmp_path_factory.mktemp("audit-scenario")
    info = render_scenario(root, train_images=24, test_images=1, seed=0)
    train = info["train"]
    items = read_labels(train["labels"], images_dir=train["images"]).items
    bank = harvest_for_audit(train["images"], items, negatives_per_image=20, seed=0)
    return {"root": root, "images": Path(train["images"]), "labels": Path(train["labels"]),
            "items": items, "bank": bank}


def _recall_in_top(order_patches, flipped, share=0.05, total=None):
    top = set(int(i) for i in order_patches[: int(np.ceil(share * total))])
    return np.mean([int(i) in top for i in flipped])


def test_flipped_labels_rank_on_top(scenario):
    """The issue's check: flip 5 % of the labels; the audit's top 5 % holds >= 80 % of them."""
    bank = scenario["bank"]
    assert (bank.kinds != KIND_AUGMENTED).all()  # one patch per box
    n = len(bank)
    rng = np.random.default_rng(11)
    flipped = rng.choice(n, int(round(0.05 * n)), replace=False)
    labels = bank.labels.copy()
    labels[flipped] ^= 1
    assert 0 < labels[flipped].sum() < len(flipped)  # both directions occur
    noisy = dataclasses.replace(bank, labels=labels)
    params = {"n_trees": 100, "pool": 2000, "random_state": 3}
    result = audit_bank(noisy, params)
    assert len(result) + sum(result.not_scored.values()) == n
    ours = _recall_in_top([f.patch for f in result], flipped, total=n)
    assert ours >= 0.8, ours
    # each flipped patch's finding kind names its (wrong) label
    kinds = {f.patch: f.kind for f in result}
    for i in flipped:
        if int(i) in kinds:
            assert kinds[int(i)] == (OBJECT_CALLED_BACKGROUND if labels[i] else BACKGROUND_CALLED_OBJECT)

    # outside reference: scikit-learn's own out-of-bag estimate on the same kind of feature values
    pool = F.random_pool(*bank.window, 2000, random_state=3)
    X = F.evaluate_features(pool, bank.patches)
    forest = RandomForestClassifier(n_estimators=100, max_depth=2, criterion="entropy",
                                    oob_score=True, random_state=3).fit(X, labels)
    sk_scores = forest.oob_decision_function_[:, 1]
    sk_order = suspicion_order(sk_scores, labels)
    theirs = _recall_in_top(sk_order, flipped, total=n)
    print(f"flipped in the top 5 %: audit {ours:.3f}, scikit-learn out-of-bag {theirs:.3f}")
    assert ours >= theirs - 0.1, (ours, theirs)


def test_audit_result_bookkeeping(scenario):
    bank = harvest(scenario["images"], scenario["items"][:8], copies=2, near_negatives=0,
                   negatives_per_image=10, seed=1)
    result = audit_bank(bank, {"n_trees": 3, "pool": 300, "random_state": 0})
    augmented = bank.kinds == KIND_AUGMENTED
    assert result.augmented_left_out == augmented.sum() > 0
    assert np.isnan(result.scores[augmented]).all()
    assert {f.patch for f in result}.isdisjoint(np.flatnonzero(augmented).tolist())
    # with 3 trees about 0.63**3 = 25 % of the patches are in every bootstrap: not scored
    scored = ~np.isnan(result.scores)
    assert result.not_scored["objects"] + result.not_scored["background"] \
        == (~augmented).sum() - scored.sum() > 0
    assert result.audited == {"objects": int((bank.labels[~augmented] == 1).sum()),
                              "background": int((bank.labels[~augmented] == 0).sum())}
    # the findings are the scored patches in suspicion order, with the bank's provenance
    order = suspicion_order(result.scores, bank.labels)
    assert [f.patch for f in result] == order.tolist()
    for f in result:
        assert f.image == bank.images[bank.image_index[f.patch]]
        assert f.box == tuple(float(v) for v in bank.boxes[f.patch])
        assert f.score == result.scores[f.patch] and 1 <= f.trees <= 3
    with pytest.raises(InputError, match="bagged"):
        audit_bank(bank, {"mode": "boosted"})
    with pytest.raises(InputError, match="n_trees"):
        audit_bank(bank, {"n_trees": 0})
    only_objects = dataclasses.replace(bank, labels=np.ones(len(bank), np.uint8))
    with pytest.raises(InputError, match="no background"):
        audit_bank(only_objects, {"n_trees": 2, "pool": 50})


def test_thumbnail_draws_the_project_marks():
    gray = np.full((80, 80), 128, np.uint8)

    def has(img, kind):
        bgr = np.array(AUDIT_STYLES[kind][0][::-1])
        return bool((np.abs(img.astype(int) - bgr).sum(axis=2) < 60).any())  # anti-aliased lines

    thumb = audit_thumbnail(gray, (30, 30, 20, 20), BACKGROUND_CALLED_OBJECT, others=[(10, 30, 16, 16)])
    assert thumb.shape == (128, 128, 3)
    assert has(thumb, BACKGROUND_CALLED_OBJECT) and has(thumb, "labelled")
    assert not has(thumb, OBJECT_CALLED_BACKGROUND)
    # 20-pixel box, context 0.5: a 40-pixel crop scaled by 128 / 40; its centre stays gray
    assert tuple(thumb[64, 64]) == (128, 128, 128)
    alone = audit_thumbnail(gray, (30, 30, 20, 20), OBJECT_CALLED_BACKGROUND)
    assert has(alone, OBJECT_CALLED_BACKGROUND) and not has(alone, "labelled")


def test_check_audit_folder(tmp_path):
    (tmp_path / "file").write_text("x")
    with pytest.raises(InputError, match="is a file"):
        check_audit_folder(tmp_path / "file")
    (tmp_path / "a" / CSV_NAME).mkdir(parents=True)
    with pytest.raises(InputError, match="in the way"):
        check_audit_folder(tmp_path / "a", force=True)
    (tmp_path / "b" / THUMBNAIL_DIR).mkdir(parents=True)
    (tmp_path / "b" / THUMBNAIL_DIR / "notes.png").write_bytes(b"")
    check_audit_folder(tmp_path / "b")  # not one of the audit's own files
    (tmp_path / "b" / THUMBNAIL_DIR / "background-called-object-01.png").write_bytes(b"")
    with pytest.raises(InputError, match="--force"):
        check_audit_folder(tmp_path / "b")


# --------------------------------------------------------------------------------------------
# the command


def _read_csv(path):
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.reader(fh))


AUDIT_ARGS = ("--trees", 30, "--pool", 800, "--seed", 2, "--negatives-per-image", 20)


@pytest.fixture(scope="module")
def audited(scenario, tmp_path_factory):
    out = tmp_path_factory.mktemp("audit-run") / "audit"
    result = run(scenario["images"], scenario["labels"], "--out", out, "--top", 8,
                 "--min-suspicion", 0.3, *AUDIT_ARGS)
    return out, result


def test_cli_writes_csv_and_offline_html(scenario, audited):
    out, result = audited
    assert result.exit_code == 0, result.output
    rows = _read_csv(out / CSV_NAME)
    assert tuple(rows[0]) == CSV_COLUMNS
    # the same findings as the library, run directly with the same harvest and forest
    bank = harvest_for_audit(scenario["images"], scenario["items"], negatives_per_image=20, seed=2)
    expected = audit_bank(bank, {"n_trees": 30, "pool": 800, "random_state": 2})
    listed = expected.suspicious(top=8, min_suspicion=0.3)
    assert 0 < len(listed) <= 8
    assert rows[1:] == [f.row() for f in listed]
    for row in rows[1:]:
        assert row[5] in (OBJECT_CALLED_BACKGROUND, BACKGROUND_CALLED_OBJECT)
        assert 0.0 <= float(row[6]) <= 1.0
    # printed: the table's first row and the paths written
    assert listed[0].image in result.output and f"{listed[0].score:.3f}" in result.output
    assert "wrote" in result.output and CSV_NAME in result.output and HTML_NAME in result.output

    page = (out / HTML_NAME).read_text(encoding="utf-8")
    parser = Links()
    parser.feed(page)
    assert parser.links, "the page links its thumbnails and the CSV"
    for link in parser.links:
        assert not link.lower().startswith(("http:", "https:", "//")), link
        assert (out / link).is_file(), link
    thumbnails = sorted((out / THUMBNAIL_DIR).iterdir())
    assert len(thumbnails) == len(listed)
    assert sum(link.startswith(THUMBNAIL_DIR + "/") for link in parser.links) == len(listed)
    for _, _, legend in AUDIT_STYLES.values():
        assert legend in page
    for f in listed:
        assert f.image in page and f"score {f.score:.3f}" in page


def test_cli_refuses_existing_output_without_force(scenario, audited, tmp_path):
    out, first = audited
    assert first.exit_code == 0
    before = {p: p.read_bytes() for p in out.rglob("*") if p.is_file()}
    again = run(scenario["images"], scenario["labels"], "--out", out, *AUDIT_ARGS)
    assert isinstance(again.exception, InputError)
    assert "add --force" in str(again.exception)
    assert {p: p.read_bytes() for p in out.rglob("*") if p.is_file()} == before

    # with --force the audit's own files are replaced (stale thumbnails go), others stay
    target = tmp_path / "audit"
    target.mkdir()
    for p, data in before.items():
        (target / p.relative_to(out)).parent.mkdir(parents=True, exist_ok=True)
        (target / p.relative_to(out)).write_bytes(data)
    (target / "notes.txt").write_text("mine")
    forced = run(scenario["images"], scenario["labels"], "--out", target, "--top", 2, "--force",
                 "--min-suspicion", 0.3, *AUDIT_ARGS)
    assert forced.exit_code == 0, forced.output
    assert len(list((target / THUMBNAIL_DIR).iterdir())) == 2
    assert len(_read_csv(target / CSV_NAME)) == 3
    assert (target / "notes.txt").read_text() == "mine"


def test_cli_one_line_error(scenario, audited, monkeypatch, capsys):
    import cli.main

    out, _ = audited
    monkeypatch.setattr(cli.main, "app", app)
    monkeypatch.setattr(sys, "argv", ["patchwood", str(scenario["images"]), str(scenario["labels"]),
                                      "--out", str(out)])
    with pytest.raises(SystemExit) as stop:
        cli.main.run()
    assert stop.value.code == 1
    err = capsys.readouterr().err.strip()
    assert err == f"error: {out / CSV_NAME}: an audit is already here; add --force to replace it"


def test_cli_audits_a_bank(scenario, tmp_path):
    bank = harvest(scenario["images"], scenario["items"][:10], copies=1, near_negatives=0,
                   negatives_per_image=10, seed=0)
    path = tmp_path / "bank.npz"
    save_bank(path, bank)
    out = tmp_path / "from-bank"
    result = run("--bank", path, "--out", out, "--trees", 20, "--pool", 400, "--top", 5,
                 "--min-suspicion", 0.0)
    assert result.exit_code == 0, result.output
    assert f"{int((bank.kinds == KIND_AUGMENTED).sum())} augmented copies set aside" in result.output
    rows = _read_csv(out / CSV_NAME)
    assert len(rows) == 6  # header + top 5 (every scored patch qualifies above suspicion 0)
    assert len(list((out / THUMBNAIL_DIR).iterdir())) == 5  # thumbnails from the patches


def test_cli_usage_errors(scenario, tmp_path):
    nothing = run("--out", tmp_path / "x")
    assert nothing.exit_code == 2 and "--bank" in nothing.output
    both = run(scenario["images"], scenario["labels"], "--bank", tmp_path / "b.npz")
    assert both.exit_code == 2 and "not both" in both.output
    harvest_option = run("--bank", tmp_path / "b.npz", "--window", "24x24")
    assert harvest_option.exit_code == 2 and "--window" in harvest_option.output
    assert not (tmp_path / "x").exists()


def test_write_audit_from_patches_without_images(scenario, tmp_path):
    bank = scenario["bank"]
    result = audit_bank(bank, {"n_trees": 10, "pool": 300, "random_state": 0})
    written = write_audit(tmp_path / "a", result, bank, top=3, min_suspicion=0.0,
                          images_dir=tmp_path / "missing")
    # the images folder does not hold the images: one note per image, thumbnails from patches
    assert written["notes"] and all("thumbnail from the patch" in n for n in written["notes"])
    assert len(written["listed"]) == 3
    assert len(list((tmp_path / "a" / THUMBNAIL_DIR).iterdir())) == 3
    with pytest.raises(InputError, match="top"):
        write_audit(tmp_path / "b", result, bank, top=0)
