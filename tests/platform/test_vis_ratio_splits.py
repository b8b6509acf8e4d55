"""Splits in the city-scale benchmark's layout (annotations with ``height``,
``vis_ratio`` and ``ignore`` keys; its ``eval_MR_multisetup.py`` ``_prepare`` reads
``vis_ratio`` for the visibility ranges).

A split frozen before the engine read ``vis_ratio`` was hashed without it: migration
0022 gives such rows ``vis_ratio_reading = "unread"`` and ``services.load_truth_of``
reads them so, so the content hash still matches ``BenchmarkSplit.sha256`` (no
``ContentMismatch``) and they score as before. A new split reads the key (counted on
the split page and API; since migration 0023 as given: test_vis_ratio_as_given_splits.py). Run on PostgreSQL with CI=true, as the other platform tests.
"""

import json

import numpy as np
import pytest
from django.urls import reverse

from evaluation import engine
from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit

from .conftest import CLASSES, detections_for, split_dict, upload
from .historical_splits import plant, schema_at, score_upload, taken_as
from .test_api import API, client_for

BEFORE = "0021_input_policies"


def _city_split(seed=41):
    """A split whose annotations carry the city-scale keys and no ``visibility``:
    about half of them heavily occluded (vis_ratio 0.3 or 0.5)."""
    split = split_dict(seed=seed)
    rng = np.random.default_rng(seed)
    for ann in split["annotations"]:
        ann["height"] = ann["bbox"][3]
        ann["vis_ratio"] = float(rng.choice([0.3, 0.5, 0.9, 1.0]))
        ann["ignore"] = 0
    return split


@pytest.mark.django_db(transaction=True)
def test_a_split_frozen_before_vis_ratio_was_read_still_scores(
    tmp_path, settings, run_tasks, flushable
):
    """The row is planted as the code before migration 0022 froze it: its hash from
    the reading that skipped ``vis_ratio`` (engine ``vis_ratio="unread"``, equal to the
    file without the key: tests/engine/test_vis_ratio.py). After the migration it reads
    as frozen and scores; read the new way its content would not match (so the check
    is live)."""
    settings.MEDIA_ROOT = str(tmp_path / "media")
    settings.BENCHBOOK_ENGINE_CACHE = str(tmp_path / "cache")
    truth = _city_split()
    path = tmp_path / "city.json"
    path.write_text(json.dumps(truth))
    old = engine.load_truth(path, ids="any", vis_ratio="unread")
    assert np.isnan(old.visibility).all()
    with schema_at(BEFORE) as historical:
        plant(historical, "city-night", path, old, sha256=old.content_hash())
    split = BenchmarkSplit.objects.get(name="city-night")
    assert split.vis_ratio_reading == "unread"
    loaded = evaluation_services.load_truth_of(split)
    assert loaded.content_hash() == split.sha256 and np.isnan(loaded.visibility).all()

    taken_as(split, vis_ratio_reading="read")  # the reading a new split has

    found = score_upload(split, detections_for(truth), run_tasks, ["coco", "miss-rate-cityscale"])
    for protocol, evaluation in found.items():
        assert evaluation.state == "done", (protocol, evaluation.error)
    card = found["miss-rate-cityscale"].scorecard
    record = card.result["protocol_record"]
    assert "a vis_ratio key is not read" in record["area_source"]["truth"]


@pytest.mark.django_db
def test_a_new_split_reads_vis_ratio_and_says_so(client, users, run_tasks, tmp_path):
    """Page, API and service: the new split is frozen with the key read; its visibility
    column is the file's vis_ratio (so its hash is not the old reading's); the split
    page and the API say how it was read and how many visibilities came from the key;
    a miss-rate evaluation's record names the reading and its counts say how many."""
    truth = _city_split(seed=43)
    path = tmp_path / "city.json"
    path.write_text(json.dumps(truth))
    split = evaluation_services.load_split(
        name="city-day", revision=1, truth=upload("city-day.json", truth)
    )
    assert split.vis_ratio_reading == "as-given"
    assert split.sha256 == engine.load_truth(path, ids="any").content_hash()
    assert split.sha256 != engine.load_truth(path, ids="any", vis_ratio="unread").content_hash()
    n = len(truth["annotations"])
    assert split.road_counts["visibility_from_vis_ratio"] == n
    assert split.road_counts["attributes_given"]["visibility"] == n
    loaded = evaluation_services.load_truth_of(split)
    assert sorted(loaded.visibility.tolist()) == sorted(
        a["vis_ratio"] for a in truth["annotations"]
    )

    client.force_login(users["engineer"])
    page = client.get(reverse("split", args=[split.pk])).content.decode()
    assert "vis_ratio as given, else visibility" in page
    assert f'<span id="visibility-from-vis-ratio">{n}</span>' in page
    body = client_for(users["engineer"]).get(API + f"splits/{split.pk}/").json()
    assert body["vis_ratio_reading"] == "as-given"

    found = score_upload(split, detections_for(truth), run_tasks, ["miss-rate"])
    card = found["miss-rate"].scorecard
    assert found["miss-rate"].state == "done", found["miss-rate"].error
    assert "else its vis_ratio key" in card.result["protocol_record"]["area_source"]["truth"]
    assert card.result["counts"]["boxes"]["truth"]["visibility_from_vis_ratio"] == n
    assert set(CLASSES) >= set(split.classes)
