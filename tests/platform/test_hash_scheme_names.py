"""A split's identity tells categories sharing a name apart from a file naming them as
shown (``BenchmarkSplit.hash_scheme`` ``named``, migration 0025).

Two categories named ``car`` are shown as ``car (id 1)``, ``car (id 2)``; a file may give
those names literally. The rules naming classes read the own names (``recall40``'s
vehicle IoU 0.7, ``kitti2d``'s classes, the miss-rate neighbours: tests/engine/
test_shared_names.py, test_hash_own_names.py), so the two are different content. New
splits are hashed ``named``; splits frozen before keep the ``typed`` hash they were
frozen with, and are verified, and compared with uploads, under it. Run on PostgreSQL
with CI=true, as the other platform tests.
"""

import json

import pytest
from django.test import Client
from django.urls import reverse

from evaluation import engine
from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit
from evaluation.services import UploadError

from .conftest import detections_for, split_dict
from .historical_splits import freeze, plant, schema_at, score_upload, taken_as

BEFORE = "0024_hash_scheme"


def _shared(seed):
    """A split whose first two categories are both named ``car``."""
    content = split_dict(seed=seed)
    for category in content["categories"][:2]:
        category["name"] = "car"
    return content


def _literal(content):
    """The split with each category named as the loader shows it: ``car (id <id>)``."""
    content = json.loads(json.dumps(content))
    for category in content["categories"]:
        if category["name"] == "car":
            category["name"] = f"car (id {category['id']})"
    return content


@pytest.mark.django_db(transaction=True)
def test_a_shared_name_split_frozen_before_keeps_its_hash(
    tmp_path, settings, run_tasks, flushable, users
):
    """Rows planted as the code before migration 0025 froze them: sha256 = the typed
    hash. After the migration the shared-name row reads as frozen, verifies and scores;
    taken as named its content would not match (the check is live). Its own content
    again is its twin; its literal twin would share its fingerprint and is refused,
    saying why. An old literal split's shared-name twin is a new split."""
    settings.MEDIA_ROOT = str(tmp_path / "media")
    settings.BENCHBOOK_ENGINE_CACHE = str(tmp_path / "cache")
    content, other = _shared(7), _literal(_shared(9))
    paths = {"old-shared": tmp_path / "old.json", "old-literal": tmp_path / "old-literal.json"}
    paths["old-shared"].write_text(json.dumps(content))
    paths["old-literal"].write_text(json.dumps(other))
    old = engine.load_truth(paths["old-shared"])
    assert old.classes[:2] == ("car (id 1)", "car (id 2)") != old.category_names[:2]
    with schema_at(BEFORE) as historical:
        for row, source in paths.items():
            truth = engine.load_truth(source)
            fields = {"sha256": truth.content_hash("typed"), "hash_scheme": "typed"}
            plant(historical, row, source, truth, vis_ratio_reading="as-given", **fields)
    split = BenchmarkSplit.objects.get(name="old-shared")
    assert split.hash_scheme == "typed"
    assert split.sha256 == old.content_hash("typed") != old.content_hash()
    evaluation_services.load_truth_of(split)
    taken_as(split, hash_scheme="corners")  # the scheme a new split has

    evaluation = score_upload(split, detections_for(content), run_tasks, ["recall40"])
    evaluation = evaluation["recall40"]
    assert evaluation.state == "done", evaluation.error
    assert evaluation.scorecard.split_sha256 == split.sha256
    assert evaluation.scorecard.result["truth_fingerprint"] == old.content_hash()

    with pytest.raises(UploadError, match="the same content is already frozen as old-shared"):
        freeze("again", content)
    refused = (
        "its content hash is that of old-shared.*, frozen before categories' own names "
        r"entered the hash, whose categories are named otherwise \('car', 'car', "
    )
    with pytest.raises(UploadError, match=refused):
        freeze("literal", _literal(content))
    # an old literal split: itself again is its twin, its shared-name twin a new split
    with pytest.raises(UploadError, match="the same content is already frozen as old-literal"):
        freeze("again-literal", other)
    twin = freeze("shared-twin", _shared(9))
    old_literal = BenchmarkSplit.objects.get(name="old-literal")
    assert old_literal.hash_scheme == "typed" and twin.hash_scheme == "corners"
    assert twin.sha256 != old_literal.sha256
    assert twin.classes == old_literal.classes
    evaluation_services.load_truth_of(old_literal)
    evaluation_services.load_truth_of(twin)
    assert BenchmarkSplit.objects.count() == 3

    client = Client()
    client.force_login(users["engineer"])
    page = client.get(reverse("split", args=[split.pk])).content.decode()
    assert "typed: ids that are not numbers hash with their type" in page
    page = client.get(reverse("split", args=[twin.pk])).content.decode()
    assert "corners: as repeats, and a corner file's corners as read" in page


@pytest.mark.django_db
def test_a_new_shared_name_split_and_its_literal_twin_are_two_splits(tmp_path, settings):
    settings.MEDIA_ROOT = str(tmp_path / "media")
    shared = freeze("shared", _shared(5))
    literal = freeze("literal", _literal(_shared(5)))
    assert shared.hash_scheme == literal.hash_scheme == "corners"
    assert shared.classes == literal.classes and shared.sha256 != literal.sha256
    # the literal split's names are its own: it hashes as before
    path = tmp_path / "literal.json"
    path.write_text(json.dumps(_literal(_shared(5))))
    assert literal.sha256 == engine.load_truth(path).content_hash("typed")
    with pytest.raises(UploadError, match="the same content is already frozen as shared"):
        freeze("again", _shared(5))
