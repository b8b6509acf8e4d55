r"""Each image's leave-one-out AP per class, computed when the worker stores a result so
that the per-image list reads it instead of computing it on a request.

For every class k, tag slice (none, and each tag of the split), size bucket and metric
(``AP``: the mean over the protocol's IoU slots; ``AP50``/``AP75``: one slot), the file
holds :math:`AP_k` and :math:`AP_{k,-i}` for every image i — exactly what
``engine.per_image.leave_one_out`` gives on request (``leave_one_out_metrics``: one pass
per class, tag and size for all metrics). One ``.npz`` member per (metric, size, tag):
an array of shape (classes, 1 + images), column 0 the class's AP, then each image
left out; stored uncompressed, each member's SHA-256 in the ``ImageLeaveOneOut`` row,
checked when the member is first read (a request reads one member, not the file).

The worker's hook: ``prepare`` (compute and write, before the result's transaction:
``compute`` takes a group of classes, so class groups can be computed apart and joined)
and ``store`` (the row and file, inside it). ``read`` gives a member, or None for a
scorecard stored without one, of another engine version or format, or whose member
fails its hash (the mismatch is signalled for the audit trail) — the list then computes
from the records, as it does for every evaluation stored before this file existed.
"""

import hashlib
import io
import logging
import os
import zipfile
from dataclasses import dataclass

import numpy as np

from . import engine  # no Django at import: bench/per_image.py times compute and write
from .storage import ContentMismatch, check_sha256, local_path

log = logging.getLogger(__name__)

#: Layout of the file; a row of another layout is not read.
FORMAT = 1
#: Metrics the per-image list ranks by: None all slots, else the IoU of the one slot.
METRIC_IOU = {"AP": None, "AP50": 0.5, "AP75": 0.75}


def metric_slots(records):
    """``{metric: slot}`` for the metrics the records' protocol has (``AP``: None)."""
    found = {}
    for metric, iou in METRIC_IOU.items():
        if iou is None:
            found[metric] = None
            continue
        slots = [t for t in range(records.n_slots) if float(records.thresholds[t, 0]) == iou]
        if slots:
            found[metric] = slots[0]
    return found


def key(metric, area, tag):
    """A member's key: ``"AP50|small|night"``; size ``all`` and no tag ``""``."""
    return f"{metric}|{area}|{tag}"


def class_results(records, protocol, class_index, tag_masks):
    """One class's leave-one-out AP for every (metric, size, tag): ``{key: (ap,
    without)}``. ``tag_masks``: ``{tag: 0/1 weights}`` (the untagged list is added)."""
    from .engine.per_image import leave_one_out_metrics

    metrics = metric_slots(records)
    slots = [s for s in metrics.values() if s is not None]
    out = {}
    for tag, weights in (("", None), *tag_masks.items()):
        for area, area_name in enumerate(records.area_names):
            found = leave_one_out_metrics(
                records, protocol, class_index, weights, area=area, slots=slots
            )
            for metric, slot in metrics.items():
                out[key(metric, area_name, tag)] = found[slot]
    return out


def compute(records, protocol, tag_masks, classes=None):
    """``{class index: class_results}`` for a group of classes (default: all)."""
    protocol = engine.get_protocol(protocol)
    classes = range(len(records.classes)) if classes is None else classes
    return {k: class_results(records, protocol, k, tag_masks) for k in classes}


@dataclass
class Prepared:
    """A written file and its members' digests, waiting for ``store``."""

    path: str
    members: dict


def prepare(evaluation, records, work, computed=None):
    """Compute every class's leave-one-out AP from ``records`` (or take ``computed``:
    the class groups' ``compute`` results joined, every class) and write the file into
    the folder ``work``."""
    from .protocols import resolve as resolve_protocol
    from .services import load_truth_of

    if computed is None:
        truth = load_truth_of(evaluation.split, evaluation.box_policy)
        tag_masks = {tag: truth.tag_mask(tag) for tag in truth.tags()}
        computed = compute(records, resolve_protocol(evaluation.protocol), tag_masks)
    path = os.path.join(work, f"evaluation-{evaluation.pk}-loo.npz")
    return Prepared(path, write(path, computed))


def write(path, computed):
    """Write ``computed`` (``{class index: class_results}``, every class) as the file:
    one uncompressed member per key, shape (classes, 1 + images). Returns the
    ``members`` of its row."""
    n_classes = len(computed)
    if sorted(computed) != list(range(n_classes)):
        raise ValueError(f"leave-one-out AP: classes {sorted(computed)}, not 0 to {n_classes - 1}")
    n_images = len(next(iter(computed[0].values()))[1])
    members = {}
    with zipfile.ZipFile(path, "w", zipfile.ZIP_STORED, allowZip64=True) as z:
        for i, name in enumerate(computed[0]):
            table = np.empty((n_classes, 1 + n_images))
            for k in range(n_classes):
                table[k, 0], table[k, 1:] = computed[k][name]
            buffer = io.BytesIO()
            np.lib.format.write_array(buffer, table, allow_pickle=False)
            data = buffer.getvalue()
            member = f"m{i}.npy"
            z.writestr(member, data)
            members[name] = {"member": member, "sha256": hashlib.sha256(data).hexdigest()}
    return members


def store(scorecard, prepared):
    """The row and its file, inside the caller's transaction (the result's)."""
    from django.core.files import File

    from .models import ImageLeaveOneOut

    row = ImageLeaveOneOut(
        scorecard=scorecard,
        records_sha256=scorecard.records_sha256,
        engine_version=engine.ENGINE_VERSION,
        format=FORMAT,
        members=prepared.members,
    )
    with open(prepared.path, "rb") as f:
        row.file.save(os.path.basename(prepared.path), File(f), save=False)
    try:
        row.save()
    except BaseException:
        discard(row)
        raise
    return row


def discard(row):
    """Delete a row's stored file (its transaction did not commit)."""
    if row is not None and row.file.name:
        try:
            row.file.storage.delete(row.file.name)
        except OSError:
            log.exception("could not delete %s after a failed store", row.file.name)


def row_of(scorecard):
    """The scorecard's row in the current engine version and format, or None."""
    from .models import ImageLeaveOneOut

    return (
        ImageLeaveOneOut.objects.filter(
            scorecard=scorecard,
            records_sha256=scorecard.records_sha256,
            engine_version=engine.ENGINE_VERSION,
            format=FORMAT,
        )
        .only("pk", "file", "members", "scorecard_id")
        .first()
    )


def read(row, name):
    """``(ap, without)`` of every class — arrays of shape (classes,) and (classes,
    images) — from member ``name`` of ``row``'s file, its bytes checked against the
    recorded SHA-256; None when the row lacks the member or the bytes differ."""
    entry = row.members.get(name)
    if entry is None:
        return None
    try:
        with local_path(row.file) as path, zipfile.ZipFile(path) as z:
            data = z.read(entry["member"])
        check_sha256(
            f"leave-one-out:{row.pk}",
            "leave-one-out file",
            os.path.basename(row.file.name),
            entry["sha256"],
            hashlib.sha256(data).hexdigest(),
        )
    except (ContentMismatch, OSError, KeyError, zipfile.BadZipFile) as e:
        log.error("leave-one-out file of scorecard %s not used: %s", row.scorecard_id, e)
        return None
    table = np.lib.format.read_array(io.BytesIO(data), allow_pickle=False)
    return table[:, 0], table[:, 1:]


def stored(scorecard, metric, size, tag):
    """``read`` of the scorecard's member for (metric, size bucket name, tag), kept in
    the process (a stored file never changes); None when there is none to read."""
    from .outcomes import _Kept

    global _MEMBERS
    if _MEMBERS is None:
        _MEMBERS = _Kept(MEMBERS_KEPT)

    def load():
        row = row_of(scorecard)
        return None if row is None else read(row, key(metric, size, tag))

    return _MEMBERS.get((scorecard.pk, scorecard.records_sha256, metric, size, tag), load)


#: Members kept per process (one is classes x images float64: 3.2 MB at 80 x 5,000).
MEMBERS_KEPT = 24
_MEMBERS = None
