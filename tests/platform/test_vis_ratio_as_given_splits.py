"""The third ``vis_ratio`` reading on the platform (migration 0023).

A split frozen with engines 2.9-2.10 was hashed under ``vis_ratio="read"``: migration
0023 leaves its row's ``vis_ratio_reading`` at ``read``, so ``services.load_truth_of``
reads it so and its content hash still matches (no ``ContentMismatch``), and it scores
as before. A new split is frozen ``as-given`` (the city-scale script's
``eval_MR_multisetup.py`` ``_prepare`` reading: tests/engine/test_vis_ratio_as_given.py).
Run on PostgreSQL with CI=true, as the other platform tests.
"""

import json

import numpy as np
import pytest

from evaluation import engine
from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit

from .conftest import detections_for, split_dict, upload
from .historical_splits import plant, schema_at, score_upload, taken_as

BEFORE = "0022_vis_ratio_reading"


def _city_split(seed=47):
    """City-scale keys where the two readings differ: a vis_ratio beside another
    visibility, and values outside 0-1."""
    split = split_dict(seed=seed)
    rng = np.random.default_rng(seed)
    for ann in split["annotations"]:
        ann["height"] = ann["bbox"][3]
        ann["vis_ratio"] = float(rng.choice([0.3, 0.9, 1.5, -0.2]))
        if rng.random() < 0.5:
            ann["visibility"] = 0.8
        ann["ignore"] = 0
    return split


@pytest.mark.django_db(transaction=True)
def test_a_split_frozen_with_the_read_reading_keeps_it_and_its_hash(
    tmp_path, settings, run_tasks, flushable
):
    settings.MEDIA_ROOT = str(tmp_path / "media")
    settings.BENCHBOOK_ENGINE_CACHE = str(tmp_path / "cache")
    truth = _city_split()
    path = tmp_path / "city.json"
    path.write_text(json.dumps(truth))
    old = engine.load_truth(path, ids="any", vis_ratio="read")
    new = engine.load_truth(path, ids="any", vis_ratio="as-given")
    assert old.content_hash() != new.content_hash()  # so the check below is live
    with schema_at(BEFORE) as historical:
        fields = {"sha256": old.content_hash(), "vis_ratio_reading": "read"}
        plant(historical, "city-dusk", path, old, **fields)
    split = BenchmarkSplit.objects.get(name="city-dusk")
    assert split.vis_ratio_reading == "read"
    loaded = evaluation_services.load_truth_of(split)
    assert loaded.content_hash() == split.sha256 and loaded.vis_ratio is None

    taken_as(split, vis_ratio_reading="as-given")  # a new split's reading

    found = score_upload(split, detections_for(truth), run_tasks, ["miss-rate-cityscale"])
    (evaluation,) = found.values()
    assert evaluation.state == "done", evaluation.error
    record = evaluation.scorecard.result["protocol_record"]
    assert "else its vis_ratio key within 0-1" in record["area_source"]["truth"]


@pytest.mark.django_db
def test_a_new_split_reads_vis_ratio_as_given(tmp_path):
    truth = _city_split(seed=53)
    path = tmp_path / "city.json"
    path.write_text(json.dumps(truth))
    split = evaluation_services.load_split(
        name="city-noon", revision=1, truth=upload("city-noon.json", truth)
    )
    assert split.vis_ratio_reading == "as-given"
    assert split.sha256 == engine.load_truth(path, ids="any").content_hash()
    assert split.sha256 != engine.load_truth(path, ids="any", vis_ratio="read").content_hash()
    n = len(truth["annotations"])
    beside = sum("visibility" in a for a in truth["annotations"])
    assert split.road_counts["visibility_from_vis_ratio"] == n
    assert split.road_counts["vis_ratio_beside_visibility"] == beside
    loaded = evaluation_services.load_truth_of(split)
    assert sorted(loaded.vis_ratio.tolist()) == sorted(a["vis_ratio"] for a in truth["annotations"])
