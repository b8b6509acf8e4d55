"""Splits frozen before the annotations of a repeated id as given entered the content
hash keep their hash (migration 0027: scheme ``heights``), verify and score; new splits
are hashed ``repeats`` (red team audit12 F3). Since engine 2.21.0 the VOC devkit's,
KITTI's and the toolbox's readings score an annotation whose id a later one repeats as
the file gives it, pycocotools copies of the last (tests/engine/test_hash_repeats.py
checks both against pycocotools 2.0.11 and the devkit transliteration), so two files
differing only in such an annotation are two splits; a stored sha256 is never
rewritten."""

import json

import pytest
from django.test import Client
from django.urls import reverse

from evaluation import engine
from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit
from evaluation.services import UploadError
from tests.engine.test_hash_repeats import DETECTIONS, EARLIER, MOVED, PAIR_HASH_2_21, _ann

from .conftest import split_dict
from .historical_splits import freeze, plant, schema_at, score_upload, taken_as

BEFORE = "0026_hash_scheme_heights"

#: pycocotools' rows of ``EARLIER`` (two copies of the image 2 box, the image 1 box
#: of id 2) with unique ids: no row as given, so its hash is ``EARLIER``'s ``heights``
#: hash, though the devkit reads ``EARLIER``'s image 1 box of id 1 where this has none.
COPIES = {
    **EARLIER,
    "annotations": [
        _ann(1, 2, [5, 5, 30, 30]),
        _ann(2, 1, [50, 50, 20, 20]),
        _ann(3, 2, [5, 5, 30, 30]),
    ],
}


def _plant_heights(tmp_path, name, content):
    """A row planted as the code before migration 0027 froze it: sha256 = the
    ``heights`` hash (the rows as given left out)."""
    source = tmp_path / f"{name}.json"
    source.write_text(json.dumps(content))
    truth = engine.load_truth(source)
    with schema_at(BEFORE) as historical:
        fields = {"sha256": truth.content_hash("heights"), "hash_scheme": "heights"}
        plant(historical, name, source, truth, vis_ratio_reading="as-given", **fields)
    return BenchmarkSplit.objects.get(name=name), truth


@pytest.mark.django_db(transaction=True)
def test_a_split_with_repeated_ids_frozen_before_keeps_its_hash(
    tmp_path, settings, run_tasks, flushable, users
):
    """(d) The stored ``heights`` split verifies and scores (``voc`` reads the rows as
    given, ``coco`` the copies); taken as a new split would be (``repeats``) it would
    not verify. Its content again is its twin; the file differing only in the
    replaced annotation's bbox, which the ``heights`` hash did not tell apart, is
    frozen as a new split under ``repeats``; the file of pycocotools' rows alone,
    holding the old split's fingerprint, is refused, saying why."""
    settings.MEDIA_ROOT = str(tmp_path / "media")
    settings.BENCHBOOK_ENGINE_CACHE = str(tmp_path / "cache")
    split, old = _plant_heights(tmp_path, "old-repeats", EARLIER)
    assert split.hash_scheme == "heights" and split.sha256 == PAIR_HASH_2_21
    assert old.content_hash() != split.sha256  # the rows as given say more
    evaluation_services.load_truth_of(split)  # verifies: no ContentMismatch
    taken_as(split, hash_scheme="corners")  # the scheme a new split has

    evaluations = score_upload(split, DETECTIONS, run_tasks, ["voc", "coco"])
    for protocol, read in (("voc", "as given"), ("coco", "copies")):
        evaluation = evaluations[protocol]
        assert evaluation.state == "done", evaluation.error
        assert evaluation.scorecard.split_sha256 == split.sha256
        result = evaluation.scorecard.result
        assert result["counts"]["repeated_ids"]["read"] == read
        assert result["truth_fingerprint"] == old.content_hash()  # today's
    # the perfect detector on the file as given: the devkit's AP 1.0 (test_hash_repeats)
    assert evaluations["voc"].scorecard.result["per_class"]["car"]["AP"] == 1.0

    with pytest.raises(UploadError, match="the same content is already frozen as old-repeats"):
        freeze("again", EARLIER)
    moved = freeze("moved", MOVED)
    assert moved.hash_scheme == "corners"
    assert moved.sha256 == engine.load_truth(_write(tmp_path, MOVED)).content_hash()
    assert moved.sha256 != split.sha256
    evaluation_services.load_truth_of(moved)
    refused = (
        "its content hash is that of old-repeats.*, frozen before the annotations of a "
        "repeated id as given entered the hash, whose annotations under a repeated id"
    )
    with pytest.raises(UploadError, match=refused):
        freeze("copies", COPIES)
    assert BenchmarkSplit.objects.count() == 2

    client = Client()
    client.force_login(users["engineer"])
    page = client.get(reverse("split", args=[split.pk])).content.decode()
    assert "heights: as named" in page
    page = client.get(reverse("split", args=[moved.pk])).content.decode()
    assert "corners: as repeats" in page


def _write(tmp_path, content):
    path = tmp_path / "written.json"
    path.write_text(json.dumps(content))
    return path


@pytest.mark.django_db(transaction=True)
def test_a_split_without_repeated_ids_hashes_as_before(tmp_path, settings):
    """A ``heights`` split without repeated ids verifies under its scheme and under
    ``repeats`` alike (the same sha256), and its content again is its twin; a new split
    without repeated ids is stored ``repeats`` with the ``heights`` hash."""
    settings.MEDIA_ROOT = str(tmp_path / "media")
    split, old = _plant_heights(tmp_path, "old-plain", split_dict(seed=21))
    assert old.repeated is None and old.content_hash() == split.sha256
    evaluation_services.load_truth_of(split)
    row = BenchmarkSplit.objects.get(pk=split.pk)
    row.hash_scheme = "corners"  # in memory only: as a new split is read
    evaluation_services.load_truth_of(row)
    with pytest.raises(UploadError, match="the same content is already frozen as old-plain"):
        freeze("again", split_dict(seed=21))
    fresh = freeze("fresh", split_dict(seed=22))
    assert fresh.hash_scheme == "corners"
    truth = engine.load_truth(_write(tmp_path, split_dict(seed=22)))
    assert fresh.sha256 == truth.content_hash("heights") == truth.content_hash()
