"""Categories' own names in the content hash and so in the predictions cache key.

Two categories sharing the name ``car`` are shown as ``car (id 1)``, ``car (id 2)``
(``loaders.annotation_index.rename_shared_names``), which a file may also give
literally. The two files have one shown content but score apart: the rules naming
classes read the own names (``GroundTruth.category_names``), so under ``recall40``
both ``car`` categories take IoU 0.7 and the literal ones 0.5 (the README's
``recall40`` row; checked against ``oracle.greedy_ap``, the pycocotools
``evaluateImg``/``accumulate`` transliteration, at the rule's thresholds on the file's
own names, as tests/engine/test_shared_names.py does). So the ``named`` hash (engine
2.17.6) adds the own names wherever one differs from its shown name; any other split
hashes bit for bit as before (pinned below), and the older schemes still give the hash
a split was frozen with.
"""

import json

import pytest

from evaluation.engine import ENGINE_VERSION, differences, evaluate, load_predictions, load_truth
from evaluation.engine.__main__ import main
from evaluation.engine.content_hash import HASH_SCHEMES
from evaluation.engine.explain import NAMED_FINGERPRINT

from .test_shared_names import _cars, _recall40_oracle


def _split(names, image_ids=(1,), class_ids=(1, 2)):
    truth, _ = _cars(names[:2])
    truth["categories"] = [{"id": c, "name": n} for c, n in zip(class_ids, names)]
    for annotation, class_id in zip(truth["annotations"], class_ids):
        annotation["category_id"] = class_id
    truth["images"] = [{"id": i, "width": 100, "height": 100} for i in image_ids]
    for annotation in truth["annotations"]:
        annotation["image_id"] = image_ids[0]
    return truth


LITERAL = ("car (id 1)", "car (id 2)")
CASES = {
    # no shown name differs from its own: the hash of every scheme as before
    "literal": _split(LITERAL),
    "literal text ids": _split(LITERAL, image_ids=("1",)),
    "distinct": _split(("car", "truck")),
    "case only": _split(("Car", "car")),  # not shared: shown as given
    # shown otherwise: the older schemes as before, the named one apart
    "shared": _split(("car", "car")),
    "shared text ids": _split(("car", "car"), image_ids=("1",)),
    # a renamed name meets a given one: renamed again (``car (id 1) (id 1)``)
    "shared thrice": _split(("car", "car", "car (id 1)"), class_ids=(1, 2, 3)),
}
RENAMED = {"shared", "shared text ids", "shared thrice"}

#: ``(typed, untyped)`` hashes of the splits above, computed on main BEFORE own names
#: entered the hash (commit 913dfd4, engine 2.17.4).
PINNED = {
    "case only": (
        "ea813212a168346d43510653eb022d6c55a1096f26977723dc80677a6a61dca0",
        "ea813212a168346d43510653eb022d6c55a1096f26977723dc80677a6a61dca0",
    ),
    "distinct": (
        "bfea255264bc78fc84ded62714e6fc899fc5af645763d88ba377fda52e46fdf7",
        "bfea255264bc78fc84ded62714e6fc899fc5af645763d88ba377fda52e46fdf7",
    ),
    "literal": (
        "0322871d831bdbcfca446b698e243dfccd0f647ebe3d4b6dec1b3e04ff64b57d",
        "0322871d831bdbcfca446b698e243dfccd0f647ebe3d4b6dec1b3e04ff64b57d",
    ),
    "literal text ids": (
        "5d19c09b242ae441bfc56853e5220a120c4fd15928c1dfe9663b7ccb206d6417",
        "0322871d831bdbcfca446b698e243dfccd0f647ebe3d4b6dec1b3e04ff64b57d",
    ),
    "shared": (
        "0322871d831bdbcfca446b698e243dfccd0f647ebe3d4b6dec1b3e04ff64b57d",
        "0322871d831bdbcfca446b698e243dfccd0f647ebe3d4b6dec1b3e04ff64b57d",
    ),
    "shared text ids": (
        "5d19c09b242ae441bfc56853e5220a120c4fd15928c1dfe9663b7ccb206d6417",
        "0322871d831bdbcfca446b698e243dfccd0f647ebe3d4b6dec1b3e04ff64b57d",
    ),
    "shared thrice": (
        "3e19eb9515241d45ec54a6a54eb3b0f38823abba5c98b70a2902c4816d4d90ca",
        "3e19eb9515241d45ec54a6a54eb3b0f38823abba5c98b70a2902c4816d4d90ca",
    ),
}


def _write_case(directory, name):
    path = directory / (name.replace(" ", "_") + ".json")
    path.write_text(json.dumps(CASES[name]))
    return path


@pytest.mark.parametrize("name", sorted(CASES))
def test_older_schemes_and_unrenamed_splits_keep_their_hash(tmp_path, name):
    path = _write_case(tmp_path, name)
    for cache in (tmp_path / "c", tmp_path / "c"):  # built, then from the entry
        truth = load_truth(path, cache_dir=cache)
        assert truth.content_hash("typed") == PINNED[name][0]
        assert truth.content_hash("untyped") == PINNED[name][1]
        renamed = truth.classes != truth.category_names
        assert renamed == (name in RENAMED)
        assert (truth.content_hash() != PINNED[name][0]) == renamed
        assert truth.content_hash("named") == truth.content_hash()


@pytest.mark.parametrize(
    "shared,literal",
    [("shared", "literal"), ("shared text ids", "literal text ids")],
)
def test_a_split_and_its_literal_twin_hash_apart(tmp_path, shared, literal):
    a, b = (load_truth(_write_case(tmp_path, name)) for name in (shared, literal))
    assert a.classes == b.classes == LITERAL and a.category_names != b.category_names
    # the hashes splits were frozen with could not tell them apart
    assert a.content_hash("typed") == b.content_hash("typed")
    assert a.content_hash("untyped") == b.content_hash("untyped")
    assert a.content_hash() != b.content_hash()


def test_the_thrice_shared_name_hashes_apart_from_its_shown_names(tmp_path):
    truth = load_truth(_write_case(tmp_path, "shared thrice"))
    assert truth.classes == ("car (id 1) (id 1)", "car (id 2)", "car (id 1) (id 3)")
    literal = json.loads(json.dumps(CASES["shared thrice"]))
    for category, shown in zip(literal["categories"], truth.classes):
        category["name"] = shown
    (tmp_path / "literal.json").write_text(json.dumps(literal))
    twin = load_truth(tmp_path / "literal.json")
    assert twin.classes == truth.classes and twin.category_names == twin.classes
    assert twin.content_hash("typed") == truth.content_hash("typed")
    assert twin.content_hash() != truth.content_hash()


def _detections():
    return _cars()[1]


def _recall40(gt, dt, cache):
    truth = load_truth(gt, cache_dir=cache)
    predictions = load_predictions(dt, truth, cache_dir=cache)
    result = evaluate(truth, predictions, "recall40")
    expected = _recall40_oracle(json.loads(gt.read_text()), truth, predictions)
    return [result["per_class"][c]["AP"] for c in truth.classes], expected.tolist()


@pytest.mark.parametrize("first", [0, 1])
def test_shared_cache_keeps_each_splits_predictions_apart(tmp_path, first):
    """Both orders through one cache folder, cold then warm: each split scores as the
    reference on its own names (AP 0 for two ``car`` categories at IoU 0.7, 1 for the
    literal names at 0.5: the detections overlap their boxes at IoU 0.6), and the
    detections file has one predictions entry per split."""
    gts = [_write_case(tmp_path, "shared"), _write_case(tmp_path, "literal")]
    dt = tmp_path / "dt.json"
    dt.write_text(json.dumps(_detections()))
    cache = tmp_path / "cache"
    wanted = [[0.0, 0.0], [1.0, 1.0]]
    for _ in range(2):
        for k in (first, 1 - first):
            got, expected = _recall40(gts[k], dt, cache)
            assert got == expected == wanted[k], k
    # two truth entries (keyed by bytes) and two predictions entries (keyed by the
    # truth's content hash, among others): one shared entry before own names were hashed
    assert len(list(cache.glob("*.npz"))) == 4


def test_cli_shared_cache_scores_each_split_by_its_own_names(tmp_path, capsys):
    gts = [_write_case(tmp_path, "literal"), _write_case(tmp_path, "shared")]
    dt = tmp_path / "dt.json"
    dt.write_text(json.dumps(_detections()))
    cache = tmp_path / "cache"
    headlines = []
    for gt in gts + gts:
        argv = ["score", "--truth", str(gt), "--predictions", str(dt), "--protocol", "recall40"]
        assert main(argv + ["--cache", str(cache), "--format", "json"]) == 0
        result = json.loads(capsys.readouterr().out)
        headlines.append(result["summary"]["AP"])
        assert result["truth_fingerprint"] == load_truth(gt).content_hash()
    assert headlines == [1.0, 0.0, 1.0, 0.0]
    assert len(list(cache.glob("*.npz"))) == 4


def test_explain_says_an_older_fingerprint_may_be_the_same_split(tmp_path):
    """A renamed split's fingerprint changed with engine ``NAMED_FINGERPRINT``."""
    truth = load_truth(_write_case(tmp_path, "shared"))
    assert NAMED_FINGERPRINT <= ENGINE_VERSION

    def result(version, fingerprint):
        return {"engine_version": version, "truth_fingerprint": fingerprint, "protocol_record": {}}

    before = result("2.17.5", truth.content_hash("typed"))
    after = result(ENGINE_VERSION, truth.content_hash())
    (effect,) = [d[3] for d in differences(before, after) if d[0] == "ground truth"]
    assert f"fingerprinted by an engine before {NAMED_FINGERPRINT}" in effect
    assert "share a name" in effect
    older = result("2.14.0", truth.content_hash("untyped"))
    (effect,) = [d[3] for d in differences(older, after) if d[0] == "ground truth"]
    assert "2.15.0" in effect and NAMED_FINGERPRINT in effect


def test_schemes(tmp_path):
    assert HASH_SCHEMES == ("corners", "repeats", "heights", "named", "typed", "untyped")
    truth = load_truth(_write_case(tmp_path, "literal"))
    with pytest.raises(
        ValueError,
        match="unknown hash scheme 'x'; use corners, repeats, heights, named, typed, untyped",
    ):
        truth.content_hash("x")
