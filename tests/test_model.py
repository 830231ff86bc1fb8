"""The model file and the safe .npz container: deterministic bytes, atomic writes, and a loader that
turns every kind of bad file into one InputError naming the file (never a traceback, never pickle).

Outside references: numpy.load(allow_pickle=False) (numpy's own reader) and Python's zipfile.
"""

import io
import json
import os
import zipfile

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from detector.io import npzfile
from detector.classifier import PatchClassifier
from detector.errors import InputError
from detector.features import evaluate_features, from_corners
from detector.forest import forest_score
from detector.model import (FORMAT_VERSION, Model, load_model, model_arrays, old_format_note,
                            save_model, training_date)


def _patches(n_objects=60, n_background=60, size=12, seed=0):
    """Bright disc on a darker ground (objects) against plain noisy ground."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:size, :size] - (size - 1) / 2
    disc = (xx**2 + yy**2) < (size / 3) ** 2
    obj = rng.normal(70, 15, (n_objects, size, size)) + 100 * disc
    bg = rng.normal(90, 30, (n_background, size, size))
    patches = np.clip(np.concatenate([obj, bg]), 0, 255).astype(np.uint8)
    return patches, np.r_[np.ones(n_objects, int), np.zeros(n_background, int)]


@pytest.fixture(scope="module")
def fitted():
    patches, y = _patches()
    clf = PatchClassifier(n_trees=12, depth=2, pool=400, random_state=3).fit(patches, y)
    return clf, patches


@pytest.fixture()
def model_file(fitted, tmp_path):
    path = tmp_path / "model.npz"
    save_model(path, fitted[0].model_)
    return path


def _rewrite(src, dst, **changes):
    """Copy a model file with some arrays replaced (None removes one)."""
    arrays = npzfile.read_npz(src)
    for k, v in changes.items():
        if v is None:
            arrays.pop(k)
        else:
            arrays[k] = v
    npzfile.save_npz(dst, arrays)
    return dst


# ---------------------------------------------------------------------------------------------
# the container


def test_save_npz_is_deterministic_and_numpy_reads_it(tmp_path):
    arrays = {"b": np.arange(6, dtype=np.int32).reshape(2, 3), "a": np.array("text"),
              "c": np.asfortranarray(np.eye(3, dtype=np.float32))}
    npzfile.save_npz(tmp_path / "1.npz", arrays)
    npzfile.save_npz(tmp_path / "2.npz", dict(reversed(list(arrays.items()))))
    one, two = (tmp_path / "1.npz").read_bytes(), (tmp_path / "2.npz").read_bytes()
    assert one == two
    with zipfile.ZipFile(tmp_path / "1.npz") as zf:  # Python's zipfile as the outside reader
        assert zf.namelist() == ["a.npy", "b.npy", "c.npy"]
        assert {i.date_time for i in zf.infolist()} == {(1980, 1, 1, 0, 0, 0)}
        assert {i.compress_type for i in zf.infolist()} == {zipfile.ZIP_DEFLATED}
    with np.load(tmp_path / "1.npz", allow_pickle=False) as npz:  # numpy's own reader
        for k, v in arrays.items():
            np.testing.assert_array_equal(npz[k], v)
            assert npz[k].shape == v.shape
    back = npzfile.read_npz(tmp_path / "1.npz")
    assert back["a"].shape == () and str(back["a"]) == "text"
    back["b"][0, 0] = 5  # arrays come back writable


def test_save_npz_stores_large_entries_that_do_not_deflate(tmp_path):
    """Noise does not deflate (zlib's own figure for it: a few bytes per 16 KB block larger), so a
    large noise entry is stored; zeros and small entries are deflated; both come back exactly,
    through numpy's reader, Python's zipfile and the project's own."""
    rng = np.random.default_rng(3)
    arrays = {"noise": rng.integers(0, 256, (300, 32, 40), dtype=np.uint8),   # 384,000 bytes
              "zeros": np.zeros((300, 32, 40), np.uint8),
              "small": rng.integers(0, 256, 1000, dtype=np.uint8)}
    path = tmp_path / "x.npz"
    npzfile.save_npz(path, arrays)
    with zipfile.ZipFile(path) as zf:
        kinds = {i.filename: i.compress_type for i in zf.infolist()}
        assert zf.testzip() is None
    assert kinds == {"noise.npy": zipfile.ZIP_STORED, "small.npy": zipfile.ZIP_DEFLATED,
                     "zeros.npy": zipfile.ZIP_DEFLATED}
    with np.load(path, allow_pickle=False) as npz:
        for k, v in arrays.items():
            np.testing.assert_array_equal(npz[k], v)
    back = npzfile.read_npz(path)
    for k, v in arrays.items():
        np.testing.assert_array_equal(back[k], v)
    npzfile.save_npz(tmp_path / "y.npz", arrays)
    assert (tmp_path / "y.npz").read_bytes() == path.read_bytes()


def test_save_npz_replaces_atomically_and_cleans_up(tmp_path, monkeypatch):
    path = tmp_path / "keep.npz"
    npzfile.save_npz(path, {"a": np.arange(3)})
    before = path.read_bytes()

    def broken(*args, **kwargs):
        raise OSError("disk full")

    monkeypatch.setattr(zipfile.ZipFile, "writestr", broken)
    # a write error is one InputError naming the file (detector.io.files.atomic_write)
    with pytest.raises(InputError, match="keep.npz: cannot write the file: disk full"):
        npzfile.save_npz(path, {"a": np.arange(5)})
    assert path.read_bytes() == before
    assert sorted(os.listdir(tmp_path)) == ["keep.npz"]  # no temporary file left behind
    with pytest.raises(ValueError, match="object"):
        npzfile.save_npz(path, {"a": np.array([None], dtype=object)})
    with pytest.raises(InputError, match="folder"):
        npzfile.save_npz(tmp_path / "missing" / "x.npz", {"a": np.arange(3)})


def test_check_arrays_reports_shapes_and_names(tmp_path):
    spec = {"a": npzfile.ArraySpec("int32", ("N", 2)), "b": npzfile.ArraySpec("float32", ("N",)),
            "c": npzfile.ArraySpec("str", (), required=False)}
    good = {"a": np.zeros((3, 2), np.int32), "b": np.zeros(3, np.float32)}
    assert npzfile.check_arrays(dict(good), spec, "f.npz") == {"N": 3}
    cases = [
        ({"a": good["a"]}, "f.npz: not a complete model file: array 'b' is missing"),
        ({**good, "b": np.zeros(3)}, "f.npz: model array 'b' has dtype float64; expected float32"),
        ({**good, "b": np.zeros((3, 1), np.float32)}, "f.npz: model array 'b' has 2 dimensions; expected 1"),
        ({**good, "a": np.zeros((3, 3), np.int32)}, "f.npz: model array 'a' has size 3 along axis 1; expected 2"),
        ({**good, "b": np.zeros(4, np.float32)},
         "f.npz: model array 'b' has size 4 along axis 0, but array 'a' says 3"),
    ]
    for arrays, message in cases:
        with pytest.raises(InputError) as err:
            npzfile.check_arrays(arrays, spec, "f.npz")
        assert str(err.value) == message
    swapped = {"a": good["a"].astype(">i4"), "b": good["b"]}  # big-endian is accepted, made native
    npzfile.check_arrays(swapped, spec, "f.npz")
    assert swapped["a"].dtype == np.dtype("int32") and swapped["a"].dtype.isnative


# ---------------------------------------------------------------------------------------------
# the model file


def test_round_trip_keeps_every_array(fitted, model_file):
    model = fitted[0].model_
    back = load_model(model_file)
    for k, v in model_arrays(model).items():
        np.testing.assert_array_equal(model_arrays(back)[k], v)
    assert back.metadata == json.loads(json.dumps(model.metadata))
    assert back.window == (12, 12) and back.mode == "bagged" and back.normalize is True
    assert back.depth == 2 and back.n_trees == 12
    assert len(back.exit_levels) >= 2 and back.exit_table.shape == (len(back.exit_levels), 12)
    # numpy's own reader opens it without pickle
    with np.load(model_file, allow_pickle=False) as npz:
        assert int(npz["format_version"]) == FORMAT_VERSION and str(npz["kind"]) == "model"


def test_model_scores_equal_the_forest_on_its_features(fitted):
    clf, patches = fitted
    m = clf.model_
    values = evaluate_features(m.features, patches, normalize=True)
    np.testing.assert_array_equal(m.score(patches), forest_score(m, values))
    np.testing.assert_array_equal(clf.predict_proba(patches)[:, 1], m.score(patches))


def test_same_seed_same_bytes_other_seed_other_bytes(tmp_path, monkeypatch):
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1700000000")  # 2023-11-14 (UTC)
    patches, y = _patches(seed=1)
    paths = []
    for name, seed, jobs in (("a", 5, 1), ("b", 5, 2), ("c", 6, 1)):
        clf = PatchClassifier(n_trees=8, pool=300, random_state=seed, n_jobs=jobs).fit(patches, y)
        paths.append(tmp_path / f"{name}.npz")
        save_model(paths[-1], clf.model_)
    a, b, c = (p.read_bytes() for p in paths)
    assert a == b
    assert a != c
    assert load_model(paths[0]).metadata["date"] == "2023-11-14"


def test_training_date_follows_source_date_epoch(monkeypatch):
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "86400")  # one day after 1970-01-01
    assert training_date() == "1970-01-02"
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "yesterday")
    with pytest.raises(InputError, match="SOURCE_DATE_EPOCH"):
        training_date()


def _marker(log=[]):  # noqa: B006 - the list records unpickling
    log.append("unpickled")
    return log


class _Tripwire:
    def __reduce__(self):
        return (_marker, ())


def test_object_arrays_are_refused_without_unpickling(model_file, tmp_path):
    arrays = dict(np.load(model_file, allow_pickle=False))
    arrays["metadata"] = np.array([_Tripwire()], dtype=object)
    bad = tmp_path / "pickled.npz"
    np.savez(bad, **arrays)  # numpy pickles the object array (allow_pickle defaults to True here)
    with pytest.raises(InputError) as err:
        load_model(bad)
    assert str(err.value) == (f"{bad}: refused model file: array 'metadata' holds Python objects "
                              "(patchwood never unpickles)")
    assert _marker.__defaults__[0] == []  # the tripwire never ran


@pytest.mark.parametrize(
    "change, message",
    [
        (dict(format_version=np.array(6, np.int64)), "unsupported model format version 6 (this patchwood reads 1, 2, 3, 4 and 5; train the model again with `patchwood train`)"),
        (dict(format_version=None), "not a model file: array 'format_version' is missing"),
        (dict(node_thresholds=None), "not a complete model file: array 'node_thresholds' is missing"),
        (dict(kind=np.array("patch-bank")), "this is a patch bank, not a model"),
        (dict(node_features="out-of-range"), "model node feature index out of range"),
        (dict(node_features="negative"), "model node feature index out of range"),
        (dict(node_thresholds="nan"), "model node thresholds must be finite"),
        (dict(node_thresholds="inf"), "model node thresholds must be finite"),
        (dict(node_thresholds="float64"), "model array 'node_thresholds' has dtype float64; expected float32"),
        (dict(leaf_values="one-short"), "model trees have 3 nodes and 3 leaves"),
        (dict(exit_thresholds="+inf"), "model exit thresholds must be finite or -inf"),
        (dict(features="outside"), "model feature rectangle lies outside the 12x12 window"),
        (dict(features="stray-slot"), "weight 0 that is not all zeros"),
        (dict(window=np.array([12, 12, 1], np.int32)), "model array 'window' has size 3 along axis 0; expected 2"),
        (dict(mode=np.array("stacked")), "model mode 'stacked' is not one of bagged, boosted"),
        (dict(metadata=np.array("{not json")), "model metadata is not valid JSON"),
        (dict(node_features="depth-mismatch"), "a tree of depth D has 2**D - 1 nodes"),
        (dict(exit_levels=None), "'exit_levels' and 'exit_table' must come together"),
        (dict(exit_levels="falling"), "model exit levels must be scores in 0..1, rising"),
        (dict(exit_levels="above-one"), "model exit levels must be scores in 0..1, rising"),
        (dict(exit_table="nan"), "model exit table must be finite or -inf"),
        (dict(exit_table="one-short"), "model array 'exit_table' has size"),
        (dict(exit_min_sigma=np.array(-1.0)), "model array 'exit_min_sigma' must be a number >= 0, got -1.0"),
        (dict(score_temperature=np.array(0.0)), "model array 'score_temperature' must be a number > 0"),
        (dict(margin=np.array(np.nan)), "model array 'margin' must be a number >= 0, got NaN"),
        (dict(margin=np.array(6.0)), "model array 'margin' 6 leaves less than one pixel of the object"),
        (dict(margin=None), "model array 'margin' is missing (format version 5 needs it)"),
        (dict(object_range=np.array([30.0, 6.0])), "model array 'object_range' must hold two sizes > 0, the smaller first"),
        (dict(object_range=np.array([0.0, 6.0])), "model array 'object_range' must hold two sizes > 0"),
        (dict(score_temperature=np.array(2.0, np.float32)), "model array 'score_temperature' has dtype float32; expected float64"),
    ],
)
def test_load_refuses_each_bad_case(model_file, tmp_path, change, message):
    arrays = npzfile.read_npz(model_file)
    (name, value), = change.items()
    if isinstance(value, str):
        v = arrays[name].copy()
        if value == "out-of-range":
            v.flat[0] = len(arrays["features"])
        elif value == "negative":
            v.flat[0] = -1
        elif value in ("nan", "inf", "+inf"):
            v.flat[0] = float(value)
        elif value == "float64":
            v = v.astype(np.float64)
        elif value == "one-short":
            v = v[:, :-1]
        elif value == "outside":
            v[0, 0, 0] = 11  # x = 11 with a width of at least 1 reaches past column 11
            v[0, 0, 2] = max(v[0, 0, 2], 2)
        elif value == "falling":
            v = v[::-1].copy()
        elif value == "above-one":
            v[-1] = 1.5
        elif value == "stray-slot":
            v[0, 3] = [1, 1, 1, 1, 0]
        elif value == "depth-mismatch":  # 4 nodes per tree (and matching thresholds) is no depth
            v = np.zeros((v.shape[0], 4), np.int32)
            arrays["node_thresholds"] = np.zeros((v.shape[0], 4), np.float32)
            arrays["leaf_values"] = np.zeros((v.shape[0], 5), np.float32)
        arrays[name] = v
    elif value is None:
        arrays.pop(name)
    else:
        arrays[name] = value
    bad = tmp_path / "bad.npz"
    npzfile.save_npz(bad, arrays)
    with pytest.raises(InputError) as err:
        load_model(bad)
    text = str(err.value)
    assert text.startswith(f"{bad}: ") and message in text and "\n" not in text


def _older_file(model_file, tmp_path, version, **metadata):
    """The model file as format ``version`` (1 or 2) wrote it: the scan settings in the metadata,
    the rectangles as (x, y, width, height, weight)."""
    arrays = npzfile.read_npz(model_file)
    arrays["features"] = from_corners(arrays["features"])
    md = json.loads(str(arrays["metadata"]))
    for name in ("margin", "score_temperature", "exit_min_sigma"):
        md[name] = arrays.pop(name).item()
    md.update(metadata)
    arrays["metadata"] = np.array(json.dumps(md, sort_keys=True))
    arrays["format_version"] = np.array(version, np.int64)
    path = tmp_path / f"v{version}.npz"
    npzfile.save_npz(path, arrays)
    return path


@pytest.mark.parametrize("version", [1, 2])
def test_older_formats_are_converted(model_file, tmp_path, version):
    """Versions 1 and 2 kept margin, temperature and contrast gate in the metadata JSON: they load
    as the typed values, and saving writes version 3 with the same arrays and settings."""
    new = load_model(model_file)
    old = load_model(_older_file(model_file, tmp_path, version, margin=0.25, score_temperature=1.5,
                                 exit_min_sigma=3.0))
    assert (old.margin, old.temperature, old.exit_min_sigma) == (0.25, 1.5, 3.0)
    assert not {"margin", "score_temperature", "exit_min_sigma"} & set(old.metadata)
    assert old.metadata == new.metadata
    np.testing.assert_array_equal(old.leaf_values, new.leaf_values)
    np.testing.assert_array_equal(old.exit_thresholds, new.exit_thresholds)
    save_model(tmp_path / "again.npz", old)
    with np.load(tmp_path / "again.npz", allow_pickle=False) as npz:
        assert int(npz["format_version"]) == FORMAT_VERSION
        assert (float(npz["margin"]), float(npz["score_temperature"])) == (0.25, 1.5)
    defaults = load_model(_older_file(model_file, tmp_path, version))  # keys absent: defaults
    assert (defaults.margin, defaults.temperature) == (new.margin, new.temperature)
    assert defaults.object_range is None and defaults.object_sizes is None
    # the labelled sizes the bank recorded (harvest.object_sizes) become the object range; the
    # window's own object side follows from window and margin: 12 / (1 + 2 * 0.25) = 8
    sized = load_model(_older_file(model_file, tmp_path, version, margin=0.25, bank={
        "harvest": {"object_sizes": {"smallest": 6.0, "median": 9.0, "largest": 30.0,
                                     "window_object_side": 8.0}}}))
    assert sized.object_range.tolist() == [6.0, 30.0]
    assert sized.object_sizes == {"smallest": 6.0, "largest": 30.0, "window_object_side": 8.0}
    odd = load_model(_older_file(model_file, tmp_path, version, bank={
        "harvest": {"object_sizes": {"smallest": "small", "largest": 30.0}}}))
    assert odd.object_range is None  # a record that makes no sense: sizes unknown, as before


@pytest.mark.parametrize("name, value, message", [
    ("exit_min_sigma", -1, "model metadata 'exit_min_sigma' must be a number >= 0, got -1"),
    ("margin", "wide", "model metadata 'margin' must be a number >= 0, got \"wide\""),
    ("score_temperature", 0, "model metadata 'score_temperature' must be a number > 0, got 0"),
])
def test_older_formats_check_their_metadata_settings(model_file, tmp_path, name, value, message):
    path = _older_file(model_file, tmp_path, 1, **{name: value})
    with pytest.raises(InputError) as err:
        load_model(path)
    assert str(err.value) == f"{path}: {message}"


def test_load_refuses_a_patch_bank(tmp_path):
    """A patch bank (uint8 patches, kind 'patch-bank') given where a model is expected."""
    bank = tmp_path / "bank.npz"
    npzfile.save_npz(bank, {"format_version": np.array(1, np.int64), "kind": np.array("patch-bank"),
                            "patches": np.zeros((3, 12, 12), np.uint8), "labels": np.ones(3, np.uint8)})
    with pytest.raises(InputError, match="this is a patch bank, not a model"):
        load_model(bank)
    npzfile.save_npz(bank, {"patches": np.zeros((3, 12, 12), np.uint8)})
    with pytest.raises(InputError, match="looks like a patch bank"):
        load_model(bank)


def test_load_refuses_damaged_files(model_file, tmp_path):
    data = model_file.read_bytes()
    truncated = tmp_path / "truncated.npz"
    truncated.write_bytes(data[: len(data) // 2])
    with pytest.raises(InputError, match=r"^.*truncated.npz: .*(not a model file|damaged)"):
        load_model(truncated)
    text = tmp_path / "labels.csv"
    text.write_text("image,x,y,width,height\n")
    with pytest.raises(InputError, match="not a model file"):
        load_model(text)
    with pytest.raises(InputError, match="no such model file"):
        load_model(tmp_path / "absent.npz")
    with pytest.raises(InputError, match="is a folder"):
        load_model(tmp_path)
    # a zip archive whose member is not an .npy array
    other = tmp_path / "other.npz"
    with zipfile.ZipFile(other, "w") as zf:
        zf.writestr("notes.txt", "hello")
    with pytest.raises(InputError, match="unexpected entry 'notes.txt'"):
        load_model(other)
    # a member whose data is cut short but whose zip structure is intact
    short = tmp_path / "short.npz"
    with zipfile.ZipFile(model_file) as src, zipfile.ZipFile(short, "w") as dst:
        for info in src.infolist():
            payload = src.read(info)
            dst.writestr(info.filename, payload[:-4] if info.filename == "leaf_values.npy" else payload)
    with pytest.raises(InputError, match="'leaf_values' has .* data bytes"):
        load_model(short)


@pytest.fixture(scope="module")
def valid_bytes(fitted, tmp_path_factory):
    path = tmp_path_factory.mktemp("fuzz") / "model.npz"
    save_model(path, fitted[0].model_)
    return path.read_bytes()


def _load_bytes(tmp_path, data):
    path = tmp_path / "fuzzed.npz"
    path.write_bytes(data)
    try:
        return load_model(path)
    except InputError as err:
        assert "\n" not in str(err) and str(err).startswith(str(path))
        return None


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.binary(max_size=2000))
def test_fuzz_random_bytes_only_give_input_errors(tmp_path, data):
    assert _load_bytes(tmp_path, data) is None


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.data())
def test_fuzz_mutated_model_files_load_or_give_input_errors(tmp_path, valid_bytes, data):
    raw = bytearray(valid_bytes)
    how = data.draw(st.sampled_from(["flip", "truncate", "splice"]))
    if how == "flip":
        for _ in range(data.draw(st.integers(1, 8))):
            i = data.draw(st.integers(0, len(raw) - 1))
            raw[i] = data.draw(st.integers(0, 255))
    elif how == "truncate":
        raw = raw[: data.draw(st.integers(0, len(raw) - 1))]
    else:
        i = data.draw(st.integers(0, len(raw)))
        raw[i:i] = data.draw(st.binary(min_size=1, max_size=64))
    result = _load_bytes(tmp_path, bytes(raw))
    assert result is None or isinstance(result, Model)


def test_fuzz_mutated_headers_inside_valid_zip(tmp_path, valid_bytes):
    """Damage inside the .npy headers, behind intact zip checksums (which byte flips rarely reach)."""
    rng = np.random.default_rng(0)
    with zipfile.ZipFile(io.BytesIO(valid_bytes)) as src:
        members = {i.filename: src.read(i) for i in src.infolist()}
    for trial in range(60):
        name = sorted(members)[trial % len(members)]
        payload = bytearray(members[name])
        for _ in range(rng.integers(1, 4)):
            payload[rng.integers(0, min(len(payload), 128))] = rng.integers(0, 256)
        path = tmp_path / "inner.npz"
        with zipfile.ZipFile(path, "w") as dst:
            for n, p in members.items():
                dst.writestr(n, bytes(payload) if n == name else p)
        try:
            load_model(path)
        except InputError as err:
            assert "\n" not in str(err)


def test_summary_reads_at_a_glance(fitted):
    lines = fitted[0].model_.summary()
    text = "\n".join(lines)
    assert lines[0] == "window: 12 x 12 pixels (width x height)"
    assert "trees: 12 of depth 2, random forest (bagged)" in text
    assert f"features used: {len(fitted[0].model_.features)} of a pool of 400" in text
    assert "out-of-bag error: " in text and "%" in text
    assert "calibrated to give up at most 5 % of" in text and "mean trees evaluated per window" in text
    model = fitted[0].model_
    model.metadata["bank_sha256"] = "ab" * 32
    assert "bank sha256 abababababab" in model.summary()[-1]
    del model.metadata["bank_sha256"]
    model.metadata["bank"] = {"sha256": "cd" * 32}  # the nested form training from a bank writes
    assert "bank sha256 cdcdcdcdcdcd" in model.summary()[-1]
    del model.metadata["bank"]


def test_from_forest_keeps_only_used_features(fitted):
    from detector.forest import FlatForest

    pool = np.zeros((5, 4, 5), np.int32)
    pool[:, 0] = [[0, 0, 1, 1, 1], [1, 0, 1, 1, 1], [2, 0, 1, 1, 1], [3, 0, 1, 1, 1], [4, 0, 1, 1, 1]]
    forest = FlatForest("boosted", [[4, 1, 4]], [[0.5, 0.5, 0.5]], [[-1, 0, 0.5, 1]])
    m = Model.from_forest((6, 2), pool, forest)
    assert m.features[:, 0, 0].tolist() == [1, 4] and m.node_features.tolist() == [[1, 0, 1]]
    assert np.isneginf(m.exit_thresholds).all()


# ------------------------------------------------------------------ rectangles in corner form

@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 40), st.integers(0, 40), st.integers(1, 40),
                          st.integers(1, 40), st.integers(-4, 4)), min_size=1, max_size=4))
def test_corner_form_round_trips(rects):
    """(x, y, width, height, weight) -> (x0, y0, x1, y1, weight) -> back is the identity; a
    rectangle of weight 0 is an unused slot, all zeros in both forms."""
    from detector.features import to_corners

    f = np.zeros((1, 4, 5), np.int32)
    for i, (x, y, w, h, wt) in enumerate(rects):
        f[0, i] = (x, y, w, h, wt) if wt else (0, 0, 0, 0, 0)
    c = to_corners(f)
    used = f[0, :, 4] != 0
    np.testing.assert_array_equal(c[0, used, 2], f[0, used, 0] + f[0, used, 2])   # x1 = x + w
    np.testing.assert_array_equal(c[0, used, 3], f[0, used, 1] + f[0, used, 3])   # y1 = y + h
    assert (c[0, ~used] == 0).all()
    np.testing.assert_array_equal(from_corners(c), f)


def test_model_file_stores_corners(fitted, model_file):
    """The file holds (x0, y0, x1, y1, weight): a two-rectangle feature at (0, 0, 2, 4) and
    (2, 0, 2, 4) is stored as (0, 0, 2, 4) and (2, 0, 4, 4), and loads back as it was."""
    m = Model((4, 4), np.array([[[0, 0, 2, 4, -1], [2, 0, 2, 4, 1]] + [[0] * 5] * 2], np.int32),
              [[0]], [[0.0]], [[0.0, 1.0]], [-np.inf], "bagged")
    arrays = model_arrays(m)
    assert arrays["features"][0, :2].tolist() == [[0, 0, 2, 4, -1], [2, 0, 4, 4, 1]]
    with np.load(model_file, allow_pickle=False) as npz:
        assert int(npz["format_version"]) == FORMAT_VERSION == 5
        np.testing.assert_array_equal(from_corners(npz["features"]), fitted[0].model_.features)
    np.testing.assert_array_equal(load_model(model_file).features, fitted[0].model_.features)


def test_format_3_files_are_converted_with_a_note(fitted, model_file, tmp_path):
    """A format 3 file (rectangles as x, y, width, height) loads as the same model, scores every
    patch bit for bit as the current file does, and the commands that read it say so in one line
    (the file is left as it is). A format 4 file (corners, written before edge-strength features
    existed) is read as it is, without a note."""
    from typer.testing import CliRunner

    from cli import main as cli_main

    arrays = npzfile.read_npz(model_file)
    arrays["features"] = from_corners(arrays["features"])
    arrays["format_version"] = np.array(3, np.int64)
    old = tmp_path / "old.npz"
    npzfile.save_npz(old, arrays)
    before = old.read_bytes()
    a, b = load_model(old), load_model(model_file)
    assert (a.file_version, b.file_version) == (3, 5)
    np.testing.assert_array_equal(a.features, b.features)
    patches = fitted[1]
    np.testing.assert_array_equal(a.running_scores(patches), b.running_scores(patches))
    result = CliRunner().invoke(cli_main.app, ["inspect", str(old), "--out", str(tmp_path / "i")])
    assert result.exit_code == 0, result.output
    notes = [ln for ln in result.output.splitlines() if ln.startswith("note: ")]
    assert notes == [f"note: {old} is a format 3 model file (rectangles as x, y, width, height); "
                     "it was converted on reading and left as it is (patchwood train writes "
                     "format 5)"]
    assert old.read_bytes() == before
    arrays = npzfile.read_npz(model_file)
    arrays["format_version"] = np.array(4, np.int64)
    four = tmp_path / "four.npz"
    npzfile.save_npz(four, arrays)
    c = load_model(four)
    assert c.file_version == 4 and old_format_note(c, four) is None
    np.testing.assert_array_equal(c.running_scores(patches), b.running_scores(patches))
    result = CliRunner().invoke(cli_main.app, ["inspect", str(model_file), "--out",
                                               str(tmp_path / "j")])
    assert result.exit_code == 0 and "note: " not in result.output
