"""Id kinds in the content hash and so in the predictions cache key.

The red team's case: one results file with numeric image ids scored against a split
whose image ids are numbers and against its twin whose ids are the same digits as JSON
text. pycocotools 2.0.11 scores the first and refuses the second (``COCO.loadRes``
asserts ``set(annsImgIds) == (set(annsImgIds) & set(self.getImgIds()))``: its dicts
are keyed by the JSON values, and ``1 != "1"``). The split's content hash keys the
predictions cache, so two splits that match different detections must hash apart, or
a shared cache hands one split the other's predictions. Every outcome below is the
reference's, pycocotools run on the same two files (``conftest.pycocotools_eval``),
in both orders through one cache folder.
"""

import json

import pytest

from evaluation.engine import ENGINE_VERSION, differences, evaluate, load_predictions, load_truth
from evaluation.engine.errors import InputError

from .conftest import pycocotools_eval

#: Hashes of the splits ``_split`` writes, computed on main BEFORE id kinds entered the
#: hash (commit bcb967b, engine 2.12.0): numeric-id splits keep them bit for bit.
PINNED = {
    "int images": "4325559823ca90f5ea6f850c5e5808cf8478cefade7092ae8c7dfdd4b4a72e96",
    "number images": "ac725d2dd7fbc017de6d3dd86c7b336f3f5d463ebcd9894df656c6067072a6a8",
    "number classes": "5181c440308ed2357a98cab8c4073b811d698c36aae690e30f8ef451ea097aa7",
}


def _split(image_ids, class_id=1, other_class=None):
    classes = [class_id] + ([other_class] if other_class is not None else [])
    return {
        "images": [{"id": i, "width": 100, "height": 100} for i in image_ids],
        "categories": [{"id": c, "name": f"c{k}"} for k, c in enumerate(classes)],
        "annotations": [
            {
                "id": k + 1,
                "image_id": i,
                "category_id": class_id,
                "bbox": [10 + k, 10, 30, 30],
                "area": 900,
                "iscrowd": 0,
            }
            for k, i in enumerate(image_ids)
        ],
    }


def _detections(image_ids, class_id=1):
    return [
        {"image_id": i, "category_id": class_id, "bbox": [10 + k, 10, 30, 30], "score": 0.9}
        for k, i in enumerate(image_ids)
    ]


def _write(path, content):
    # ensure_ascii: a lone surrogate is written as its escape, as json.loads reads it back
    path.write_text(json.dumps(content))
    return path


def _reference(gt, dt):
    """pycocotools 2.0.11's AP on the two files, or None where it raises."""
    try:
        return pycocotools_eval(gt, dt).stats[0]
    except (AssertionError, KeyError, TypeError):
        return None


def _ours(gt, dt, cache):
    truth = load_truth(gt, cache_dir=cache)
    try:
        predictions = load_predictions(dt, truth, cache_dir=cache)
    except InputError:
        return None
    return evaluate(truth, predictions, "coco")["summary"]["AP"]


CASES = {
    # the red team's case: image 1 vs image "1"
    "image number vs text": (_split([1, 2]), _split(["1", "2"]), _detections([1, 2])),
    # a "json"-family id (a lone surrogate: no UTF-8 text holds it, shown JSON-quoted)
    # vs the text of its quoted form, which is shown alike
    "image json vs quoted text": (
        _split(["a\ud800", "b"]),
        _split(['"a\\ud800"', '"b"']),
        _detections(["a\ud800", "b"]),
    ),
    # category 1 vs category "1" (pycocotools never matches a detection to the other)
    "class number vs text": (_split([1, 2], 1), _split([1, 2], "1"), _detections([1, 2], 1)),
    # a number-family id (not all int64) vs its text
    "image number family vs text": (
        _split([1, 2.5]),
        _split(["1", "2.5"]),
        _detections([1, 2.5]),
    ),
}


@pytest.mark.parametrize("case", sorted(CASES))
@pytest.mark.parametrize("first", [0, 1])
def test_shared_cache_scores_each_split_as_pycocotools(tmp_path, case, first):
    one, other, detections = CASES[case]
    gts = [_write(tmp_path / "gt_a.json", one), _write(tmp_path / "gt_b.json", other)]
    dt = _write(tmp_path / "dt.json", detections)
    expected = [_reference(gt, dt) for gt in gts]
    assert expected[0] == pytest.approx(1.0)  # the matching split scores it
    if case.startswith("class"):
        assert expected[1] == 0  # pycocotools: detections of a category not listed
    else:
        assert expected[1] is None  # pycocotools: loadRes refuses the file
    cache = tmp_path / "cache"
    order = [first, 1 - first]
    for _ in range(2):  # cold, then every entry from the cache
        for k in order:
            got = _ours(gts[k], dt, cache)
            assert got == (None if expected[k] is None else pytest.approx(expected[k])), k
    a, b = (load_truth(gt, cache_dir=cache) for gt in gts)
    assert a.content_hash() != b.content_hash()
    # the hash splits frozen before were given: image ids collided (hashed as their
    # text); class ids did not (hashed as the repr of an int vs of a str)
    collided = a.content_hash("untyped") == b.content_hash("untyped")
    assert collided == (not case.startswith("class"))


def test_refusal_names_the_record_and_field(tmp_path):
    gt = _write(tmp_path / "gt.json", _split(["1", "2"]))
    dt = _write(tmp_path / "dt.json", _detections([1, 2]))
    cache = tmp_path / "cache"
    load_predictions(dt, load_truth(_write(tmp_path / "n.json", _split([1, 2]))), cache_dir=cache)
    with pytest.raises(InputError, match="record 0: field 'image_id': image 1 is not in the split"):
        load_predictions(dt, load_truth(gt, cache_dir=cache), cache_dir=cache)


@pytest.mark.parametrize(
    "name,content",
    [
        ("int images", _split([1, 2])),
        ("number images", _split([1, 2.5])),
        ("number classes", _split([1, 2], 1, 2.5)),
    ],
)
def test_numeric_splits_keep_their_hash(tmp_path, name, content):
    truth = load_truth(_write(tmp_path / "gt.json", content), cache_dir=tmp_path / "c")
    assert truth.content_hash() == PINNED[name]
    assert truth.content_hash("untyped") == PINNED[name]
    cached = load_truth(tmp_path / "gt.json", cache_dir=tmp_path / "c")  # from the entry
    assert cached.content_hash() == PINNED[name]


def test_text_kinds_hash_apart(tmp_path):
    """CSV text ids match a JSON result's id by its text; JSON text ids only text: apart."""
    (tmp_path / "boxes.csv").write_text(
        "image_id,label,x_min,y_min,x_max,y_max\n1,c0,10,10,40,40\nx,c0,11,10,41,40\n"
    )
    (tmp_path / "images.csv").write_text("image_id,width,height\n1,100,100\nx,100,100\n")
    plain = load_truth(tmp_path / "boxes.csv", images=tmp_path / "images.csv")
    text = load_truth(_write(tmp_path / "t.json", _split(["1", "x"])))
    assert plain.content_hash("untyped") == text.content_hash("untyped")
    assert plain.content_hash() != text.content_hash()


def test_unknown_scheme_is_refused(tmp_path):
    truth = load_truth(_write(tmp_path / "gt.json", _split([1, 2])))
    with pytest.raises(ValueError, match="unknown hash scheme"):
        truth.content_hash("other")


def test_explain_says_an_older_fingerprint_may_be_the_same_split(tmp_path):
    """A text-id split's fingerprint changed with engine 2.15.0: ``explain`` of a result
    from before and one from after says so beside "different ground truth"."""
    truth = load_truth(_write(tmp_path / "gt.json", _split(["1", "2"])))

    def result(version, fingerprint):
        return {"engine_version": version, "truth_fingerprint": fingerprint, "protocol_record": {}}

    before = result("2.14.0", truth.content_hash("untyped"))
    after = result(ENGINE_VERSION, truth.content_hash())
    (effect,) = [d[3] for d in differences(before, after) if d[0] == "ground truth"]
    assert "fingerprinted by an engine before 2.15.0" in effect
    other = result(ENGINE_VERSION, "0" * 64)
    (effect,) = [d[3] for d in differences(after, other) if d[0] == "ground truth"]
    assert effect == "different ground truth: the numbers are about different data"
