"""Stored content read back, checked against what was recorded: a split's ground truth
(its content hash), a scorecard's match records (their SHA-256), and the engine's
columnar cache (a digest per entry; a failed check is rebuilt and audited).
"""

import hashlib
import logging
import os

from django.conf import settings

from .. import engine, levels, signals, split_identity
from ..storage import check_sha256, local_path, verified_bytes
from .policy import ENGINE_IDS, input_policy

log = logging.getLogger(__name__)


def _cache_dir():
    """The engine's columnar cache: entries keyed with a secret derived from
    ``SECRET_KEY`` and checked on every load; a failed check rebuilds the entry from its
    (hashed) source and is written to the audit trail (``cache_rebuilt``)."""
    secret = hashlib.sha256(b"benchbook engine cache|" + settings.SECRET_KEY.encode()).digest()
    return engine.Cache(str(settings.BENCHBOOK_ENGINE_CACHE), secret, cache_rebuilt)


class CacheEntryRebuilt(Exception):
    """A cache entry failed its digest check (edited or damaged) and was rebuilt."""

    def __init__(self, path, reason):
        super().__init__(
            f"engine cache entry {os.path.basename(path)} {reason}; rebuilt from source"
        )
        self.name, self.reason = os.path.basename(path), reason

    def as_dict(self):
        return {"what": "engine cache entry", "file": self.name, "reason": self.reason}


def cache_rebuilt(path, reason):
    error = CacheEntryRebuilt(path, reason)
    log.error("%s", error)
    subject = f"cache:{os.path.basename(path).removesuffix('.npz')}"
    signals.content_mismatch.send(CacheEntryRebuilt, subject=subject, error=error)


def load_truth_of(split, boxes="keep"):
    """The split's ground truth as engine columns (from the columnar cache), loaded
    under the box policy ``boxes`` (``engine.BOX_POLICIES``) and checked against the
    split's recorded content hash: ContentMismatch if the stored files, or a cache
    entry, no longer hold the frozen content."""
    truth = _read_truth(split, boxes)
    actual = split_identity.split_hash(split, truth)
    if actual != split.sha256 and boxes != "keep":  # the hash was taken as frozen ("keep")
        actual = split_identity.split_hash(split, _read_truth(split, "keep"))
    check_sha256(
        f"split:{split.pk}",
        "split content",
        f"{split} ({os.path.basename(split.truth_file.name)})",
        split.sha256,
        actual,
    )
    return truth


def road_counts_of(split):
    """``levels.split_counts`` of a stored split (its files as frozen), for splits
    frozen before the counts were stored (migration 0016); None when its files are gone
    or no longer hold the frozen content (the split page then shows no counts)."""
    try:
        truth = _read_truth(split, "keep")
    except (OSError, ValueError, engine.InputError):
        return None
    if split_identity.split_hash(split, truth) != split.sha256:
        return None
    return levels.split_counts(truth)


def _read_truth(split, boxes):
    """The stored split read under the annotation policy and ``vis_ratio`` reading it
    was frozen with. A historical model of a migration before those fields existed
    (0016 counts older splits) lacks them: such splits were read strictly, without
    ``vis_ratio`` (the defaults migrations 0021 and 0022 give their rows)."""
    policy = getattr(split, "annotation_policy", "strict")
    annotations = input_policy(annotations=policy)["annotations"]
    reading = {
        "annotations": annotations,
        "vis_ratio": getattr(split, "vis_ratio_reading", "unread"),
    }
    with local_path(split.truth_file) as truth_path:
        if split.images_file:
            with local_path(split.images_file) as images_path:
                return engine.load_truth(
                    truth_path,
                    images=images_path,
                    cache_dir=_cache_dir(),
                    boxes=boxes,
                    ids=ENGINE_IDS,
                    **reading,
                )
        return engine.load_truth(
            truth_path,
            cache_dir=_cache_dir(),
            boxes=boxes,
            ids=ENGINE_IDS,
            **reading,
        )


def load_records(scorecard):
    """A scorecard's match records, their file checked against its recorded SHA-256:
    the file is read once, the bytes hashed and then parsed in place (the arrays are
    views into the checked bytes; no second read between the check and the use)."""
    buffer = verified_bytes(
        scorecard.records, scorecard.records_sha256, f"scorecard:{scorecard.pk}", "records file"
    )
    return engine.MatchRecords.from_buffer(buffer)
