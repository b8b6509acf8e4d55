"""Splits frozen before a corner file's corners as read entered the content hash keep
their hash (migration 0028: scheme ``repeats``), verify and score; new splits are
hashed ``corners`` (red team audit13 F1). voc, voc07 and kitti2d measure overlap on the
corners as read, as the VOC and KITTI devkits do (tests/engine/test_corners.py checks
the engine against their transliterations), so a CSV whose ``x_max`` is 50.6 and its
twin whose ``x_max`` is 17.8 + 32.8 (50.599999999999994: the same xywh) are two
splits; a stored sha256 is never rewritten."""

import pytest
from django.core.files.base import ContentFile
from django.core.files.storage import default_storage
from django.test import Client
from django.urls import reverse
from django.utils import timezone

from evaluation import engine
from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit
from evaluation.services import UploadError

from .conftest import upload
from .historical_splits import schema_at, taken_as

BEFORE = "0027_hash_scheme_repeats"
IMAGES = "image_id,width,height\n000001,353,500\n"
HEADER = "image_id,label,x_min,y_min,x_max,y_max\n"
#: The audit's corners on the truth side: 17.8 + (50.6 - 17.8) is not 50.6.
SAYING = HEADER + "000001,car,17.8,10.0,50.6,20.0\n"
#: Its xywh twin: the x_max a converter gives back from x + w.
TWIN = HEADER + "000001,car,17.8,10.0,50.599999999999994,20.0\n"


def _freeze(name, content):
    return evaluation_services.load_split(
        name=name, revision=1, truth=upload(f"{name}.csv", content), images=upload("i.csv", IMAGES)
    )


def _read(tmp_path, name, content):
    (tmp_path / f"{name}.csv").write_text(content)
    (tmp_path / "images.csv").write_text(IMAGES)
    return engine.load_truth(tmp_path / f"{name}.csv", images=tmp_path / "images.csv")


def _plant_repeats(tmp_path, name, content):
    """A CSV split row planted as the code before migration 0028 froze it: sha256 = the
    ``repeats`` hash (the corners as read left out)."""
    truth = _read(tmp_path, name, content)
    truth_file = default_storage.save(f"splits/{name}.csv", ContentFile(content.encode()))
    images_file = default_storage.save(f"splits/{name}-images.csv", ContentFile(IMAGES.encode()))
    with schema_at(BEFORE) as historical:
        historical.objects.create(
            name=name,
            revision=1,
            classes=list(truth.classes),
            class_counts={},
            image_count=truth.n_images,
            box_count=truth.n_boxes,
            source_format="csv",
            truth_file=truth_file,
            images_file=images_file,
            annotation_policy="reference",
            frozen_at=timezone.now(),
            sha256=truth.content_hash("repeats"),
            hash_scheme="repeats",
            vis_ratio_reading="as-given",
        )
    return BenchmarkSplit.objects.get(name=name), truth


@pytest.mark.django_db(transaction=True)
def test_a_corner_split_frozen_before_keeps_its_hash(tmp_path, settings, users):
    """The stored ``repeats`` split verifies; taken as a new split would be
    (``corners``) it would not. Its content again is its twin; the xywh twin, holding the
    old split's fingerprint, is refused, saying why; the pages name both schemes."""
    settings.MEDIA_ROOT = str(tmp_path / "media")
    settings.BENCHBOOK_ENGINE_CACHE = str(tmp_path / "cache")
    split, old = _plant_repeats(tmp_path, "old-corners", SAYING)
    assert old.corners is not None and old.content_hash() != split.sha256
    evaluation_services.load_truth_of(split)  # verifies: no ContentMismatch
    taken_as(split, hash_scheme="corners")  # the scheme a new split has

    with pytest.raises(UploadError, match="the same content is already frozen as old-corners"):
        _freeze("again", SAYING)
    refused = (
        "its content hash is that of old-corners.*, frozen before corners as read entered "
        "the hash, whose corners as read"
    )
    with pytest.raises(UploadError, match=refused):
        _freeze("twin", TWIN)
    assert BenchmarkSplit.objects.count() == 1

    fresh = _freeze("fresh", SAYING.replace("000001,car,17.8", "000001,car,17.9"))
    assert fresh.hash_scheme == "corners"
    evaluation_services.load_truth_of(fresh)
    client = Client()
    client.force_login(users["engineer"])
    page = client.get(reverse("split", args=[split.pk])).content.decode()
    assert "repeats: as heights" in page
    page = client.get(reverse("split", args=[fresh.pk])).content.decode()
    assert "corners: as repeats" in page


@pytest.mark.django_db(transaction=True)
def test_new_corner_splits_hash_their_corners(tmp_path, settings):
    """A new split saying more in its corners is hashed ``corners`` (not its ``repeats``
    hash), its xywh twin with the ``repeats`` hash: two splits."""
    settings.MEDIA_ROOT = str(tmp_path / "media")
    saying, twin = _freeze("saying", SAYING), _freeze("twin", TWIN)
    read_saying, read_twin = _read(tmp_path, "a", SAYING), _read(tmp_path, "b", TWIN)
    assert saying.hash_scheme == twin.hash_scheme == "corners"
    assert saying.sha256 == read_saying.content_hash() != read_saying.content_hash("repeats")
    assert twin.sha256 == read_twin.content_hash("repeats") == read_saying.content_hash("repeats")
    for split in (saying, twin):
        evaluation_services.load_truth_of(split)
