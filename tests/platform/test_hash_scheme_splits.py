"""A split's identity tells id types apart (``BenchmarkSplit.hash_scheme``).

The image id ``1`` and the text ``"1"`` match different detections (pycocotools 2.0.11's
``COCO.loadRes`` refuses a result whose ``image_id`` has the other type:
tests/engine/test_hash_id_kinds.py), so a split and its twin whose ids are the same
digits as text are different content. New splits are hashed ``typed`` (id kinds in the
hash); splits frozen before keep the ``untyped`` hash they were frozen with (migration
0024), and are verified, and compared with uploads, under it. Run on PostgreSQL with
CI=true, as the other platform tests.
"""

import json

import pytest
from django.urls import reverse

from evaluation import engine
from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit
from evaluation.services import UploadError
from evaluation.storage import ContentMismatch

from .conftest import detections_for, split_dict
from .historical_splits import freeze, plant, schema_at, score_upload, taken_as
from .test_api import API, client_for

BEFORE = "0023_vis_ratio_as_given"


def _as_text(content):
    """The split (or detections) with every image id written as JSON text."""
    content = json.loads(json.dumps(content))
    records = content if isinstance(content, list) else content["annotations"]
    for record in records:
        record["image_id"] = str(record["image_id"])
    if not isinstance(content, list):
        for image in content["images"]:
            image["id"] = str(image["id"])
    return content


def _digits_split(seed=5):
    """A split of images 1..9: ids that sort alike as numbers and as text, so the
    untyped hash of its text-id twin is its own."""
    content = split_dict(seed=seed, n_images=9)
    order = sorted(content["images"], key=lambda image: image["id"])
    new_id = {image["id"]: k for k, image in enumerate(order, 1)}
    for image in content["images"]:
        image["id"] = new_id[image["id"]]
    for annotation in content["annotations"]:
        annotation["image_id"] = new_id[annotation["image_id"]]
    return content


@pytest.mark.django_db
def test_the_text_id_twin_of_a_numeric_split_is_a_new_split(tmp_path, settings):
    settings.MEDIA_ROOT = str(tmp_path / "media")
    numeric = freeze("numeric", split_dict())
    text = freeze("text", _as_text(split_dict()))
    assert numeric.hash_scheme == text.hash_scheme == "corners"
    assert numeric.sha256 != text.sha256
    # a numeric split hashes as before id kinds entered the hash
    path = tmp_path / "numeric.json"
    path.write_text(json.dumps(split_dict()))
    assert numeric.sha256 == engine.load_truth(path).content_hash("untyped")
    for name, content in (("again", split_dict()), ("again-text", _as_text(split_dict()))):
        with pytest.raises(UploadError, match="the same content is already frozen"):
            freeze(name, content)
    assert BenchmarkSplit.objects.count() == 2


@pytest.mark.django_db
def test_a_stored_file_switched_to_text_ids_is_a_content_mismatch(tmp_path, settings):
    """Under the untyped scheme such a file hashed as the frozen one when its ids sort
    alike as numbers and as text (here 1..9; the check below is live: the same file
    verifies when the split is taken as untyped)."""
    settings.MEDIA_ROOT = str(tmp_path / "media")
    settings.BENCHBOOK_ENGINE_CACHE = str(tmp_path / "cache")
    content = _digits_split()
    split = freeze("numeric", content)
    evaluation_services.load_truth_of(split)  # verifies, and leaves a cache entry
    with open(split.truth_file.path, "w") as f:
        json.dump(_as_text(content), f)
    with pytest.raises(ContentMismatch):
        evaluation_services.load_truth_of(split)
    assert evaluation_services.road_counts_of(split) is None
    untyped = BenchmarkSplit.objects.get(pk=split.pk)
    untyped.hash_scheme = "untyped"  # in memory only
    evaluation_services.load_truth_of(untyped)


@pytest.mark.django_db(transaction=True)
def test_a_text_id_split_frozen_before_keeps_its_hash(
    tmp_path, settings, run_tasks, flushable, users
):
    """The row is planted as the code before migration 0024 froze it: sha256 = the
    untyped hash. After the migration it reads as frozen, verifies and scores; taken as
    typed its content would not match (the check is live). Uploads are compared with it
    like with like: its own content again is its twin; the numeric twin would share its
    fingerprint and is refused, saying why. An old numeric split's text-id twin is a
    new split."""
    settings.MEDIA_ROOT = str(tmp_path / "media")
    settings.BENCHBOOK_ENGINE_CACHE = str(tmp_path / "cache")
    content = _as_text(_digits_split(seed=7))
    for annotation in content["annotations"]:
        annotation["visibility"] = 0.8  # so the split has road counts to show
    path = tmp_path / "old.json"
    path.write_text(json.dumps(content))
    old = engine.load_truth(path, ids="any")
    assert old.id_kinds()["image"] == "text"
    numeric_content = _digits_split(seed=9)  # another split, of numeric ids
    numeric_path = tmp_path / "old-numeric.json"
    numeric_path.write_text(json.dumps(numeric_content))
    with schema_at(BEFORE) as historical:
        for row, source in (("old-text", path), ("old-numeric", numeric_path)):
            truth = engine.load_truth(source, ids="any")
            fields = {"sha256": truth.content_hash("untyped"), "vis_ratio_reading": "read"}
            plant(historical, row, source, truth, **fields)
    split = BenchmarkSplit.objects.get(name="old-text")
    assert split.hash_scheme == "untyped"
    assert split.sha256 == old.content_hash("untyped") != old.content_hash()
    evaluation_services.load_truth_of(split)
    assert evaluation_services.road_counts_of(split) is not None
    typed = taken_as(split, hash_scheme="corners")  # the scheme a new split has
    assert evaluation_services.road_counts_of(typed) is None

    evaluation = score_upload(split, detections_for(content), run_tasks, ["coco"])["coco"]
    assert evaluation.state == "done", evaluation.error
    # the scorecard names the split by its stored hash; the engine's result carries the
    # engine's (typed) fingerprint of the content
    assert evaluation.scorecard.split_sha256 == split.sha256
    assert evaluation.scorecard.result["truth_fingerprint"] == old.content_hash()

    with pytest.raises(UploadError, match="the same content is already frozen as old-text"):
        freeze("again", content)
    numeric = json.loads(json.dumps(content))
    for record in numeric["images"]:
        record["id"] = int(record["id"])
    for record in numeric["annotations"]:
        record["image_id"] = int(record["image_id"])
    with pytest.raises(UploadError, match="whose ids are of another type .*image ids text"):
        freeze("numeric", numeric)
    # an old numeric split: itself again is its twin, its text-id twin a new split
    with pytest.raises(UploadError, match="the same content is already frozen as old-numeric"):
        freeze("again-numeric", numeric_content)
    text_twin = freeze("text-twin", _as_text(numeric_content))
    old_numeric = BenchmarkSplit.objects.get(name="old-numeric")
    assert old_numeric.hash_scheme == "untyped" and text_twin.hash_scheme == "corners"
    assert text_twin.sha256 != old_numeric.sha256
    evaluation_services.load_truth_of(old_numeric)
    evaluation_services.load_truth_of(text_twin)
    assert BenchmarkSplit.objects.count() == 3

    client = client_for(users["engineer"])
    assert client.get(API + f"splits/{split.pk}/").json()["hash_scheme"] == "untyped"
    client.force_login(users["engineer"])
    page = client.get(reverse("split", args=[split.pk])).content.decode()
    assert "untyped: ids hashed by their text" in page
