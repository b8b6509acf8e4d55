"""Ids of any kind pycocotools accepts, through the platform's real entry points
(``evaluation.services.ENGINE_IDS = "any"``, the default): image, category and
annotation ids beyond signed 64 bits; booleans and whole floats; fractions and
infinities; text (and text ending in U+0000, or holding lone surrogates); a CSV split's
text image ids.

Reference: pycocotools 2.0.11, run here on the same two files (for CSV: on the same
content written as COCO JSON with those string ids). It keeps ids as Python objects —
``COCO.createIndex`` keys dicts by them, ``COCOeval.params.imgIds`` / ``catIds`` are
``sorted(...)`` of them, and ``accumulate`` concatenates images in that order before
its stable sort — so ids of any size are accepted, ``true`` and ``3.0`` key the images
1 and 3, and the image order (ties across images) is numeric, or string order for
text. The wide files keep one id below -2^63, so pycocotools' ``np.unique`` of the id
list stays an object array (a list wholly within [-2^63, 2^64) with one id >= 2^63
becomes float64 there: those images drop out, in the engine too,
``tests/engine/test_unique_lost_ids.py``); the ``nul`` files' ids ending in U+0000 drop
out of both, counted and shown.

Checked: every entry point accepts the files (split: page, API, ``load_split``;
predictions: page, API, ``upload_predictions``, the worker past the inline size and
the sharded run, re-score on a later revision, the client in
``test_the_client_submits_such_files``); the stored numbers equal pycocotools'; pages,
API and downloads show the ids as written; the drill-down URL of every image (by its
index, in pycocotools' image order) shows that image and serves its own file; compare
(with bootstrap intervals), confusion cells, evidence, history and results answer.
"""

import contextlib
import csv
import importlib.metadata
import io
import json
import math
import numbers

import msgspec
import numpy as np
import pytest
from django.core.management import call_command
from django.urls import reverse
from django.utils.html import escape

from evaluation import engine, images, left_out
from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit, Evaluation, ImageLeaveOneOut, Scorecard
from releases import services, tokens
from releases import tasks as release_tasks
from releases.models import ComparisonInterval

from ..engine.synthetic import make_detections
from .conftest import CLASSES, in_process, split_dict, upload
from .test_api import API, client_for, file
from .test_client import client_home, run  # noqa: F401
from .test_worker import worker  # noqa: F401

pytestmark = pytest.mark.django_db

PYCOCOTOOLS = "pycocotools 2.0.11"
# Ids per kind: ``images`` / ``categories`` / ``annotations`` replace the first ids of
# each (references follow); ``unlisted_class`` is a detection's category the split does
# not list (left out, as pycocotools' evaluate never looks at it, and named).
KINDS = {
    # two image ids beyond 2^64, one below -2^63 (so pycocotools' np.unique of the id
    # list stays an object array), 2^63 itself; a category id beyond 2^64
    "wide": {
        "images": [2**64 + 5, -(2**63) - 1, 10**30, 7, 2**63, -3],
        "categories": [2**70],
        "annotations": [2**65, -(2**64)],
        "unlisted_class": 2**80 + 1,
    },
    # booleans and whole floats: pycocotools' dicts key ``true`` as 1 and ``3.0`` as 3
    # (``1.0 == 1 == True`` in Python), and so does the engine (``coco_json.whole_ids``)
    "whole": {
        "images": [3.0, True, 1e20, 12, -0.0],
        "categories": [4.0],
        "annotations": [5000.0, 1e19],
        "unlisted_class": 9.0,
    },
    # fractions and an infinity (JSON ``Infinity``, which Python's json reads) among
    # integers: sorted by value
    "fractional": {
        "images": [2.5, 0.1, -1.5, float("inf"), 1e-300, 7.25],
        "categories": [1.5],
        "annotations": [0.5, 2.25],
        "unlisted_class": 7.5,
    },
    # text: every image and category (a family cannot mix text and numbers: sorted()
    # raises in pycocotools), sorted by code point ("10" before "9", "Z" before "a");
    # characters HTML and CSV quote; annotation ids text numpy reads as floats
    # (pycocotools' ``dtm[t, d] = gt['id']`` casts them)
    "text": {
        "images": ["img_010", "img_002", 'b<&>"x', "é/ü", "10", "9", " sp", "Z", "a,b", "1"],
        "categories": ["cat-b", "cat-a", "Cat"],
        "annotations": ["9001", "-5"],
        "unlisted_class": "cat-z",
    },
    # text ids ending in U+0000, which numpy text arrays cut: the engine shows that
    # family JSON-quoted. pycocotools' np.unique cuts them too and drops those images
    # ("a\x00" is then "a", "b\x00\x00" no image): so does the engine, counted
    # lone UTF-16 surrogate escapes ("\ud800" alone in the file), which Python's json
    # reads into text (sorted by code point: U+D800..U+DFFF between U+D7FF and U+E000,
    # U+1F600 above them) and no UTF-8 text or PostgreSQL text holds: the engine shows
    # the family JSON-quoted, each surrogate as its escape; "a\\ud800" (a backslash
    # written as text) is another id, and the unlisted class is named escaped
    "surrogate": {
        "images": ["a\ud800", "a\\ud800", "\udfff", "\ud7ff", "\ue000", "\U0001f600"]
        + ["b\udc00x", "c", "d", "e"],
        "categories": ["cat\udbff", "cat\\udbff", "\ud800"],
        "annotations": [],  # pycocotools writes a matched id into a float array
        "unlisted_class": "cat\udc00",
    },
    "nul": {
        "images": ["a\x00", "a", "b\x00\x00", "c", "d", "e", "f", "g", "h", "i"],
        "categories": [],
        "annotations": [],
        "unlisted_class": 99,
        "left_out": 2,
    },
    # a NaN image id (JSON ``NaN``: Python's json gives one shared float object, which
    # pycocotools' dicts find by identity): np.unique's NaN is another object, equal to
    # nothing, so that image scores nothing (left out, counted); the others are floats
    # sorted by value, the NaN last
    "nan": {
        "images": [float("nan"), 7, 2.5, 1, 3, 4],
        "categories": [],
        "annotations": [],
        "unlisted_class": 99,
        "left_out": 1,
    },
}


def _png(n):
    """A PNG signature (PNG spec section 5.2) and a body telling the images apart."""
    return b"\x89PNG\r\n\x1a\n" + f"image {n}".encode().ljust(32, b"\0")


def _renamed(truth, detection_sets, ids):
    """``truth`` and detection lists with the first images, categories and annotations
    renumbered to ``ids`` (references follow), each image named ``cam/NNNN.png``."""
    image_map = {i["id"]: new for i, new in zip(truth["images"], ids["images"])}
    class_map = {c["id"]: new for c, new in zip(truth["categories"], ids["categories"])}
    for n, image in enumerate(truth["images"]):
        image["id"] = image_map.get(image["id"], image["id"])
        image["file_name"] = f"cam/{n:04d}.png"
    for category in truth["categories"]:
        category["id"] = class_map.get(category["id"], category["id"])
    for annotation, new in zip(truth["annotations"], ids["annotations"]):
        annotation["id"] = new
    for record in truth["annotations"] + [d for dets in detection_sets for d in dets]:
        record["image_id"] = image_map.get(record["image_id"], record["image_id"])
        record["category_id"] = class_map.get(record["category_id"], record["category_id"])
    return truth, detection_sets


def _files(ids, n_sets=3):
    """A split and ``n_sets`` detection files on it, with ties across images (scores
    on 5 levels), and one detection of an unlisted category in each."""
    truth = split_dict(seed=41, n_images=10)
    sets = [
        make_detections(np.random.default_rng(50 + k), truth, score_levels=5) for k in range(n_sets)
    ]
    truth, sets = _renamed(truth, sets, ids)
    for dets in sets:
        dets.append({**dets[0], "category_id": ids["unlisted_class"]})
    return truth, sets


def _written(value, family=()):
    """An id as the platform shows it: an integer's digits as written (any size), a
    boolean or whole float as its integer (the id pycocotools keys it as), another
    float in its shortest form, text as written — JSON-quoted when an id of its
    ``family`` ends in U+0000."""
    if isinstance(value, str):
        quoted = any(isinstance(v, str) and (v.endswith("\x00") or _lone(v)) for v in family)
        text = json.dumps(value, ensure_ascii=False) if quoted else value
        return text.encode("utf-8", "backslashreplace").decode("utf-8")  # a surrogate
    if isinstance(value, numbers.Integral):
        return str(int(value))
    value = float(value)
    return str(int(value)) if math.isfinite(value) and value.is_integer() else repr(value)


def _lone(text):
    """Whether ``text`` holds a lone surrogate (no UTF-8 text can hold it)."""
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        return True
    return False


def _image_texts_in_file_order(truth):
    ids = [i["id"] for i in truth["images"]]
    return [_written(i, ids) for i in ids]


def _image_texts(truth):
    """The split's image ids as the platform shows them, in pycocotools' image order
    (``sorted(cocoGt.getImgIds())``, which ``evaluate``'s ``np.unique`` sorts again:
    a NaN last)."""
    ids = [i["id"] for i in truth["images"]]
    return [_written(i, ids) for i in sorted(ids, key=lambda v: (v != v, v))]


def _pycocotools(tmp_path, truth, detections, reference=None):
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval

    assert importlib.metadata.version("pycocotools") == PYCOCOTOOLS.split()[1]
    gt_path, dt_path = tmp_path / "ref-gt.json", tmp_path / "ref-dt.json"
    edit = reference or (lambda text: text)
    gt_path.write_text(edit(json.dumps(truth)))
    dt_path.write_text(edit(json.dumps(detections)))
    with contextlib.redirect_stdout(io.StringIO()):
        gt = COCO(str(gt_path))
        evaluator = COCOeval(gt, gt.loadRes(str(dt_path)), "bbox")
        evaluator.evaluate()
        evaluator.accumulate()
        evaluator.summarize()
    return evaluator


def _assert_pycocotools_numbers(evaluation, truth, detections, tmp_path, reference=None):
    """The stored ``coco`` scorecard equals pycocotools 2.0.11 on the same two files:
    every summary number and per-class AP (to 1e-12; in practice bit for bit)."""
    assert evaluation.state == "done", evaluation.error
    card = Scorecard.objects.get(evaluation=evaluation)
    reference = _pycocotools(tmp_path, truth, detections, reference)
    for key, expected in zip(engine.COCO_SUMMARY_KEYS, reference.stats):
        got = card.summary[key]
        assert (-1.0 if got is None else got) == pytest.approx(expected, abs=1e-12), key
    family = [c["id"] for c in truth["categories"]]
    names = {_written(c["id"], family): c["name"] for c in truth["categories"]}
    precision = reference.eval["precision"]  # [T, R, K, A, M], K in params.catIds order
    for k, category in enumerate(reference.params.catIds):
        expected = precision[:, :, k, 0, 2]
        got = card.result["per_class"][names[_written(category, family)]]["AP"]
        if (expected == -1).all():
            assert got is None, category
        else:
            assert got == pytest.approx(expected.mean(), abs=1e-12), category
    return card


# Splits -------------------------------------------------------------------------------


@pytest.mark.parametrize("kind", sorted(KINDS))
@pytest.mark.parametrize("entry", ["page", "api", "command"])
def test_every_split_entry_point_accepts_the_split(entry, kind, client, users, team, tmp_path):
    truth, _ = _files(KINDS[kind], n_sets=0)
    if entry == "page":
        client.force_login(users["engineer"])
        response = client.post(
            reverse("load-split"),
            {"name": "far-ids", "revision": 1, "truth": upload("far-ids.json", truth)},
        )
        assert response.status_code == 302, response.content.decode()
    elif entry == "api":
        response = client_for(users["engineer"]).post(
            API + "splits/",
            {"name": "far-ids", "revision": 1, "truth": file("far-ids.json", truth)},
            format="multipart",
        )
        assert response.status_code == 201, response.json()
    else:
        path = tmp_path / "far-ids.json"
        path.write_text(json.dumps(truth))
        call_command("load_split", "far-ids", "1", str(path))
    split = BenchmarkSplit.objects.get()
    assert (split.image_count, split.box_count) == (len(truth["images"]), len(truth["annotations"]))
    # file names keyed by the ids as written (the drill-down's image file)
    assert images.file_names(split) == {
        text: image["file_name"]
        for text, image in zip(_image_texts_in_file_order(truth), truth["images"])
    }


# Predictions, numbers, pages ------------------------------------------------------------


@pytest.fixture(params=sorted(KINDS))
def scored(request, client, users, team, run_tasks, tmp_path):
    """The split loaded through the page, its images attached; a baseline uploaded
    through the page and signed off, a candidate through the API and a third version
    through ``upload_predictions``; the detector scores coco, the pedestrian miss
    rate and the KITTI levels (level protocols reading the same COCO JSON)."""
    ids = KINDS[request.param]
    truth, sets = _files(ids)
    client.force_login(users["lead"])
    response = client.post(
        reverse("load-split"),
        {"name": "far-ids", "revision": 1, "truth": upload("far-ids.json", truth)},
    )
    assert response.status_code == 302, response.content.decode()
    split = BenchmarkSplit.objects.get()
    run_tasks(
        images.attach_images,
        split,
        files=[upload(i["file_name"], _png(n)) for n, i in enumerate(truth["images"])],
    )
    detector = run_tasks(
        services.create_detector,
        team,
        "Forward camera",
        CLASSES,
        protocols=("coco", "miss-rate", "kitti2d"),
    )
    response = run_tasks(
        client.post,
        reverse("upload", args=[detector.pk]),
        {"version": "1.0", "split": split.pk, "predictions": upload("base.json", sets[0])},
    )
    assert response.status_code in (200, 302), response.content.decode()
    baseline = detector.versions.get(label="1.0")
    run_tasks(services.sign_off, baseline, users["lead"], "approved", "The baseline.")
    response = run_tasks(
        client_for(users["engineer"]).post,
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "2.0",
            "split": split.pk,
            "predictions": file("candidate.json", sets[1]),
        },
        format="multipart",
    )
    assert response.status_code == 201, response.json()
    path = tmp_path / "third.json"
    path.write_text(json.dumps(sets[2]))
    run_tasks(
        call_command,
        "upload_predictions",
        "--detector", detector.slug, "--label", "3.0", "--split", "far-ids:1",
        "--user", "engineer", "--create-version", str(path),
    )  # fmt: skip
    versions = {v.label: v for v in detector.versions.all()}
    return {
        "kind": request.param,
        "ids": ids,
        "truth": truth,
        "sets": sets,
        "split": split,
        "detector": detector,
        **versions,
    }


def _evaluation(version, protocol="coco"):
    return Evaluation.objects.get(prediction_sets__version=version, protocol=protocol)


def test_every_upload_entry_point_scores_as_pycocotools(scored, tmp_path):
    """Page, API and command: each stored coco scorecard equals pycocotools 2.0.11 on
    its file; the level protocols are scored too; the detection of the unlisted category
    is left out and named by its id as written."""
    for label, dets in zip(("1.0", "2.0", "3.0"), scored["sets"]):
        card = _assert_pycocotools_numbers(
            _evaluation(scored[label]),
            scored["truth"],
            dets,
            tmp_path,
            scored["ids"].get("reference"),
        )
        unlisted = [_written(scored["ids"]["unlisted_class"])]
        assert card.result["counts"]["dropped_classes"] == unlisted
        lost = scored["ids"].get("left_out", 0)
        assert card.result["counts"].get("images_left_out", {}).get("images", 0) == lost
        lines = left_out.of_result(card.result)
        assert any("np.unique" in line for line in lines) == bool(lost)
        for level in ("miss-rate", "kitti2d"):
            found = _evaluation(scored[label], level)
            assert found.state == "done", (level, found.error)
        assert ImageLeaveOneOut.objects.filter(scorecard=card).exists()


def test_pages_and_api_show_the_ids_as_written(client, users, scored):
    version, split, truth = scored["2.0"], scored["split"], scored["truth"]
    client.force_login(users["engineer"])
    api = client_for(users["engineer"])
    page = client.get(reverse("version", args=[version.pk])).content.decode()
    assert f"ids {_written(scored['ids']['unlisted_class'])}" in page
    written = _image_texts(truth)
    listed = client.get(reverse("image-list", args=[version.pk]), {"split": split.pk})
    assert listed.status_code == 200
    text = listed.content.decode()
    for image_id in written:
        assert f">{escape(image_id)}<" in text, image_id
    body = api.get(API + f"versions/{version.pk}/images/", {"split": split.pk}).json()
    assert {row["id"] for row in body["images"]} == set(written)
    for index, image_id in enumerate(written):
        # the drill-down URL of each image shows that image (pycocotools' order)
        shown = api.get(API + f"versions/{version.pk}/images/{split.pk}/{index}/").json()
        assert shown["image"]["id"] == image_id
        response = client.get(reverse("image-detail", args=[version.pk, split.pk, index]))
        assert response.status_code == 200
        assert f"<h1>Image {escape(image_id)} <span" in response.content.decode()
        n = _image_texts_in_file_order(truth).index(image_id)
        served = client.get(reverse("image-file", args=[version.pk, split.pk, index]))
        assert b"".join(served.streaming_content) == _png(n)
    for row in body["images"]:
        assert row["id"] == written[row["index"]]


def test_downloads_carry_the_ids_as_written(client, users, scored):
    """The records CSV names each image and box by the id the pages show; the JSON
    Lines download gives each image id back as the JSON value the split gave (an
    infinite one as the string "Infinity", a NaN as "NaN", as the export writes every non-finite
    number in strict JSON; one holding a lone surrogate as the JSON-quoted text the
    pages show). Every line is strict JSON: msgspec, a strict reader, decodes it."""
    evaluation, truth = _evaluation(scored["2.0"]), scored["truth"]
    client.force_login(users["engineer"])
    text = b"".join(
        client.get(reverse("records-download", args=[evaluation.pk, "csv"])).streaming_content
    ).decode()
    rows = list(csv.DictReader(io.StringIO(text)))
    value_of = dict(zip(_image_texts_in_file_order(truth), (i["id"] for i in truth["images"])))
    assert {r["image_id"] for r in rows} == set(value_of)
    boxes = {r["box_id"] for r in rows if r["row"] == "box"}
    annotation_ids = [a["id"] for a in truth["annotations"]]
    assert {_written(i) for i in annotation_ids} == boxes
    lines = b"".join(
        client.get(reverse("records-download", args=[evaluation.pk, "jsonl"])).streaming_content
    ).decode()
    records = [msgspec.json.decode(line) for line in lines.splitlines()]  # strict JSON
    assert len(records) == len(rows)
    family = [i["id"] for i in truth["images"]]
    for record, row in zip(records, rows):
        given = value_of[row["image_id"]]
        expected = {math.inf: "Infinity", -math.inf: "-Infinity"}.get(given, given)
        expected = "NaN" if given != given else expected
        if isinstance(given, str) and (_lone(given) or given.startswith('"')):
            expected = _written(given, family)  # strict readers refuse a lone surrogate
        assert record["image_id"] == expected and type(record["image_id"]) in (
            type(expected),
            int,  # a boolean or whole float is the integer pycocotools keys it as
        ), (record["image_id"], given)


def test_compare_history_and_split_pages_read_the_split(
    client, users, scored, run_tasks, monkeypatch
):
    """Every other page and API reading the split or the records answers: compare
    (with the paired bootstrap's intervals, resampling images), the split page, the
    confusion matrix and each cell's list, the evidence, history and results."""
    client.force_login(users["engineer"])
    detector, split = scored["detector"], scored["split"]
    pair = {"reference": scored["1.0"].pk, "candidate": scored["2.0"].pk}
    if scored["kind"] in ("text", "wide"):  # resampling is by image index: two kinds do
        monkeypatch.setattr(release_tasks.compare, "delay", in_process(release_tasks.compare))
        response = run_tasks(client.post, reverse("compare-intervals", args=[detector.pk]), pair)
        assert response.status_code == 302
        assert ComparisonInterval.objects.get().state == "done"
    for url in (
        reverse("compare", args=[detector.pk])
        + f"?reference={pair['reference']}&candidate={pair['candidate']}",
        reverse("evidence-json", args=[scored["2.0"].pk]),
        reverse("detector", args=[detector.pk]),  # the history charts
        reverse("split", args=[split.pk]),
        reverse("confusion", args=[scored["2.0"].pk]) + f"?split={split.pk}",
        *(  # every cell's list of detections and missed boxes (image ids and links)
            reverse("confusion", args=[scored["2.0"].pk]) + f"?split={split.pk}&row={i}&col={j}"
            for i in range(len(CLASSES) + 1)
            for j in range(len(CLASSES) + 1)
        ),
        reverse("evidence", args=[scored["2.0"].pk]),
    ):
        assert client.get(url).status_code == 200, url
    api = client_for(users["engineer"])
    for url in (f"detectors/{detector.pk}/history/", f"versions/{scored['2.0'].pk}/results/"):
        assert api.get(API + url).status_code == 200, url


@pytest.mark.parametrize("kind", sorted(KINDS))
def test_the_worker_and_the_sharded_run_score_as_pycocotools(
    kind, users, team, detector, run_tasks, settings, tmp_path, monkeypatch
):
    """Past the inline-validation size the worker reads the file (streamed into
    pieces at upload, scored in image shards): the stored numbers equal pycocotools
    2.0.11 on the same files."""
    from evaluation import class_groups, sharding

    from .test_shards import GROUP_SENDS, _run

    sends = []
    GROUP_SENDS.clear()
    monkeypatch.setattr(sharding, "send", lambda *args: sends.append(args))
    monkeypatch.setattr(class_groups, "send", lambda *args: GROUP_SENDS.append(args))
    truth, sets = _files(KINDS[kind], n_sets=1)
    split = evaluation_services.load_split(
        name="far-ids", revision=1, truth=upload("far-ids.json", truth)
    )
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 1
    settings.BENCHBOOK_SHARD_ABOVE = 0
    settings.BENCHBOOK_SHARD_IMAGES = 3
    version = services.create_version(detector, "4.0", users["engineer"])
    run_tasks(
        services.submit_predictions, version, split, upload("big.json", sets[0]), users["engineer"]
    )
    assert sends
    _run(run_tasks, sends)
    reference = KINDS[kind].get("reference")
    _assert_pycocotools_numbers(_evaluation(version), truth, sets[0], tmp_path, reference)


# CSV: text image ids ---------------------------------------------------------------------


def _corners(bbox):
    x, y, w, h = (round(v, 1) for v in bbox)
    return x, y, x + w, y + h


def _csv_files(image_ids):
    """A CSV split (boxes and images tables) and CSV detections whose image ids are
    ``image_ids``; and the same content as COCO JSON for pycocotools (string image ids,
    boxes from the CSV's corners, area w*h as the engine takes it for CSV)."""
    truth, (dets,) = _files(
        {"images": [], "categories": [], "annotations": [], "unlisted_class": 99}, 1
    )
    dets.pop()  # no unlisted class in CSV (labels are names)
    ids = {i["id"]: new for i, new in zip(truth["images"], image_ids)}
    names = {c["id"]: c["name"] for c in truth["categories"]}
    images = "image_id,width,height,file_name\n" + "".join(
        f"{ids[i['id']]},{i['width']},{i['height']},{i['file_name']}\n" for i in truth["images"]
    )
    boxes, reference = "image_id,label,x_min,y_min,x_max,y_max,crowd\n", []
    for a in truth["annotations"]:
        x0, y0, x1, y1 = _corners(a["bbox"])
        boxes += (
            f"{ids[a['image_id']]},{names[a['category_id']]},{x0},{y0},{x1},{y1},{a['iscrowd']}\n"
        )
        w, h = x1 - x0, y1 - y0
        reference.append(
            {**a, "image_id": ids[a["image_id"]], "bbox": [x0, y0, w, h], "area": w * h}
        )
    detections, reference_dets = "image_id,label,x_min,y_min,x_max,y_max,score\n", []
    for d in dets:
        x0, y0, x1, y1 = _corners(d["bbox"])
        detections += (
            f"{ids[d['image_id']]},{names[d['category_id']]},{x0},{y0},{x1},{y1},{d['score']!r}\n"
        )
        reference_dets.append(
            {**d, "image_id": ids[d["image_id"]], "bbox": [x0, y0, x1 - x0, y1 - y0]}
        )
    reference_truth = {
        **truth,
        "images": [{**i, "id": ids[i["id"]]} for i in truth["images"]],
        "annotations": reference,
    }
    return boxes, images, detections, reference_truth, reference_dets


def test_a_csv_split_with_text_ids_scores_as_pycocotools_and_shows_them(
    client, users, team, detector, run_tasks, tmp_path
):
    """A CSV split whose image ids are text (``007`` among them, kept as written since
    not every id is an integer): scored as pycocotools 2.0.11 scores the same content
    with those string ids (``sorted()`` of them: string order, ties across images
    included), listed and drilled into by index, each image showing its own file."""
    image_ids = ["cam-b", "007", "cam-a", "Cam-c", "10", "9", "cam-10", "x", "_y", "z"]
    boxes, images_csv, detections, ref_truth, ref_dets = _csv_files(image_ids)
    split = evaluation_services.load_split(
        name="text-ids",
        revision=1,
        truth=upload("boxes.csv", boxes),
        images=upload("images.csv", images_csv),
    )
    run_tasks(
        images.attach_images,
        split,
        files=[upload(i["file_name"], _png(n)) for n, i in enumerate(ref_truth["images"])],
    )
    version = services.create_version(detector, "5.0", users["engineer"])
    run_tasks(
        services.submit_predictions, version, split, upload("p.csv", detections), users["engineer"]
    )
    _assert_pycocotools_numbers(_evaluation(version), ref_truth, ref_dets, tmp_path)
    client.force_login(users["engineer"])
    written = sorted(image_ids)  # pycocotools' image order
    for index, image_id in enumerate(written):
        response = client.get(reverse("image-detail", args=[version.pk, split.pk, index]))
        assert response.status_code == 200
        assert f"<h1>Image {escape(image_id)} <span" in response.content.decode()
        n = image_ids.index(image_id)
        served = client.get(reverse("image-file", args=[version.pk, split.pk, index]))
        assert b"".join(served.streaming_content) == _png(n), image_id


# The pipeline client ---------------------------------------------------------------------


@pytest.mark.integration
@pytest.mark.django_db(transaction=True)
@pytest.mark.usefixtures("worker")
@pytest.mark.parametrize("kind", ["wide", "surrogate"])
def test_the_client_submits_such_files(
    kind,
    live_server,
    detector,
    users,
    run,  # noqa: F811
    tmp_path,
):
    """The client (standard library only) uploads the bytes as they are; a real worker
    scores them; ``submit --wait`` passes and names the left-out class by its id as
    written (a surrogate as its escape); the stored numbers equal pycocotools 2.0.11's."""
    truth, (dets,) = _files(KINDS[kind], n_sets=1)
    split = evaluation_services.load_split(
        name="far-ids", revision=1, truth=upload("far-ids.json", truth)
    )
    _, token = tokens.create_token(users["engineer"], "pipeline")
    path = tmp_path / "far.json"
    path.write_text(json.dumps(dets))
    code, out, err = run(
        "submit", "--url", live_server.url, "--token", token, "--detector", "Forward camera",
        "--version", "6.0", "--split", f"far-ids={path}", "--wait", "--poll", "0.3",
    )  # fmt: skip
    assert code == 0, out + err
    assert f"ids {_written(KINDS[kind]['unlisted_class'])}" in out
    version = detector.versions.get(label="6.0")
    assert split.pk == version.prediction_sets.get().split_id
    _assert_pycocotools_numbers(_evaluation(version), truth, dets, tmp_path)


def test_a_detection_naming_an_id_of_the_other_type_is_refused(users, team, detector):
    """The text id ``"1"`` and the number 1 are two ids (pycocotools' dicts key them
    apart, and ``loadRes`` asserts every detection's image is in the split): a
    detection of image 1 on a split of text ids is refused naming file, record and
    field, the id shown as written."""
    truth, (dets,) = _files(KINDS["text"], n_sets=1)
    split = evaluation_services.load_split(
        name="text-ids", revision=1, truth=upload("text-ids.json", truth)
    )
    response = client_for(users["engineer"]).post(
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "7.0",
            "split": split.pk,
            "predictions": file("other-type.json", dets + [{**dets[0], "image_id": 1}]),
        },
        format="multipart",
    )
    body = response.json()
    assert response.status_code == 400, body
    assert (body["file"], body["field"]) == ("other-type.json", "image_id")
    assert body["message"].startswith(
        f"predictions: other-type.json: record {len(dets)}: field 'image_id': image 1 is not"
    ), body["message"]
    assert not Evaluation.objects.exists()


@pytest.mark.parametrize("kind", ["fractional", "text", "wide"])
def test_rescore_on_a_revision_without_an_image(kind, users, team, detector, run_tasks, tmp_path):
    """Re-scoring a stored file on a later revision that lacks one image: that image's
    detections are left out (counted) and the rest scored as pycocotools 2.0.11 scores
    the new revision with the file without them."""
    from releases import rescore

    truth, (dets,) = _files(KINDS[kind], n_sets=1)
    split = evaluation_services.load_split(
        name="far-ids", revision=1, truth=upload("far-ids.json", truth)
    )
    version = services.create_version(detector, "8.0", users["engineer"])
    run_tasks(
        services.submit_predictions, version, split, upload("p.json", dets), users["engineer"]
    )
    removed = truth["images"][0]["id"]  # a renamed one
    rev2 = json.loads(json.dumps(truth))
    rev2["images"] = [i for i in truth["images"] if i["id"] != removed]
    rev2["annotations"] = [a for a in truth["annotations"] if a["image_id"] != removed]
    split2 = evaluation_services.load_split(
        name="far-ids", revision=2, truth=upload("far-ids-2.json", json.dumps(rev2))
    )
    result = run_tasks(rescore.rescore, detector, users["lead"], split2)
    assert [o.status for o in result.outcomes] == ["rescored"]
    evaluation = Evaluation.objects.get(split=split2, protocol="coco")
    kept = [d for d in dets if d["image_id"] != removed]
    card = _assert_pycocotools_numbers(evaluation, rev2, kept, tmp_path)
    assert card.result["counts"]["dropped_unknown_images"] == len(dets) - len(kept) > 0


@pytest.mark.parametrize("kind", ["fractional", "text", "whole", "wide"])
def test_csv_predictions_on_a_json_split_name_its_ids_as_shown(
    kind, users, team, detector, run_tasks, tmp_path
):
    """CSV predictions (text cells) on a JSON split of such ids: a cell names the id as
    the pages show it (``2.5``, ``img_010``, ``18446744073709551621``); scored as
    pycocotools 2.0.11 scores the split with the same detections as COCO results."""
    truth, (dets,) = _files(KINDS[kind], n_sets=1)
    dets.pop()  # CSV labels are class names: no unlisted category id here
    split = evaluation_services.load_split(
        name="far-ids", revision=1, truth=upload("far-ids.json", truth)
    )
    ids = [i["id"] for i in truth["images"]]
    # the CSV reader strips a cell's surrounding spaces, so CSV cannot name " sp"
    dets = [d for d in dets if _written(d["image_id"], ids) == _written(d["image_id"], ids).strip()]
    names = {_written(c["id"]): c["name"] for c in truth["categories"]}
    out, reference = io.StringIO(), []
    writer = csv.writer(out)
    writer.writerow(["image_id", "label", "x_min", "y_min", "x_max", "y_max", "score"])
    for d in dets:
        x0, y0, x1, y1 = _corners(d["bbox"])
        label = names[_written(d["category_id"])]
        writer.writerow([_written(d["image_id"], ids), label, x0, y0, x1, y1, repr(d["score"])])
        reference.append({**d, "bbox": [x0, y0, x1 - x0, y1 - y0]})
    version = services.create_version(detector, "9.0", users["engineer"])
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.csv", out.getvalue()),
        users["engineer"],
    )
    _assert_pycocotools_numbers(_evaluation(version), truth, reference, tmp_path)
