"""Splits frozen before the city-scale ``height`` keys entered the content hash keep
their hash (migration 0026: scheme ``named``), verify and score; new splits are hashed
``heights``. Engine 2.18.2 reads an annotation's own ``height`` for
``miss-rate-cityscale`` (the CityPersons script's ``_prepare`` compares it), so the
fingerprint of a split holding heights that differ from their boxes' h changed with
it; a stored split's sha256 is never rewritten."""

import json

import pytest

from evaluation import engine
from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit
from evaluation.services import UploadError

from .conftest import detections_for, split_dict
from .historical_splits import freeze, plant, schema_at, score_upload, taken_as

BEFORE = "0025_hash_scheme_named"


def _with_heights(content, factor):
    """Each annotation given a ``height`` key: ``factor`` times its box's h."""
    content = json.loads(json.dumps(content))
    for annotation in content["annotations"]:
        annotation["height"] = annotation["bbox"][3] * factor
    return content


@pytest.mark.django_db(transaction=True)
def test_a_split_with_height_keys_frozen_before_keeps_its_hash(
    tmp_path, settings, run_tasks, flushable, users
):
    """A row planted as the code before migration 0026 froze it: sha256 = the ``named``
    hash, which left the heights out. After the migration it reads as frozen, verifies
    and scores under ``miss-rate-cityscale`` (its result's fingerprint is today's);
    taken as a new split would be (``heights``) it would not verify. Its content again
    is its twin; the same boxes with heights equal to their h share its old
    fingerprint and are refused, saying why."""
    settings.MEDIA_ROOT = str(tmp_path / "media")
    settings.BENCHBOOK_ENGINE_CACHE = str(tmp_path / "cache")
    base = split_dict(seed=11)
    content = _with_heights(base, 1.5)
    source = tmp_path / "old.json"
    source.write_text(json.dumps(content))
    old = engine.load_truth(source)
    assert old.content_hash("named") != old.content_hash()  # the heights say more
    with schema_at(BEFORE) as historical:
        fields = {"sha256": old.content_hash("named"), "hash_scheme": "named"}
        plant(historical, "old-heights", source, old, vis_ratio_reading="as-given", **fields)
    split = BenchmarkSplit.objects.get(name="old-heights")
    assert split.hash_scheme == "named"
    evaluation_services.load_truth_of(split)  # verifies: no ContentMismatch
    taken_as(split, hash_scheme="corners")  # the scheme a new split has

    protocol = "miss-rate-cityscale"
    evaluation = score_upload(split, detections_for(content), run_tasks, [protocol])[protocol]
    assert evaluation.state == "done", evaluation.error
    assert evaluation.scorecard.split_sha256 == split.sha256

    with pytest.raises(UploadError, match="the same content is already frozen as old-heights"):
        freeze("again", content)
    refused = (
        "its content hash is that of old-heights.*, frozen before height keys entered the "
        "hash, whose annotations' own height keys differ"
    )
    with pytest.raises(UploadError, match=refused):
        freeze("equal-heights", _with_heights(base, 1.0))
    fresh = freeze("fresh", _with_heights(split_dict(seed=12), 1.5))
    assert fresh.hash_scheme == "corners"
