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

The worker's hook: ``prepare`` (compute and write, before the result's transaction)
and ``store`` (the row and file, inside it). A sharded run computes it per class group
(``group_members``, stored in the group's file) and joins the groups' tables member by
member (``join``): one member's rows of one group in memory at a time, the same bytes
as ``write`` of the whole run. Over ``BENCHBOOK_LOO_MAX_BYTES`` (``fits``) no file is
computed or stored. ``read`` gives a member, or None for a
scorecard stored without one, of another engine version or format, or whose member
fails its hash (the mismatch is signalled for the audit trail) — the list then computes
from the records, as it does for every evaluation stored before this file existed.
"""

import dataclasses
import hashlib
import io
import json
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


def metric_slots(records, thresholds=None):
    """``{metric: slot}`` for the metrics the records' protocol has (``AP``: None), by
    the first class's IoU thresholds (of ``thresholds``, the whole run's table, when
    ``records`` are a class group's)."""
    thresholds = records.thresholds if thresholds is None else thresholds
    found = {}
    for metric, iou in METRIC_IOU.items():
        if iou is None:
            found[metric] = None
            continue
        slots = [t for t in range(len(thresholds)) if float(thresholds[t, 0]) == iou]
        if slots:
            found[metric] = slots[0]
    return found


def key(metric, area, tag):
    """A member's key: ``"AP50|small|night"``; size ``all`` and no tag ``""``."""
    return f"{metric}|{area}|{tag}"


def class_results(records, protocol, class_index, tag_masks, metrics=None):
    """One class's leave-one-out AP for every (metric, size, tag): ``{key: (ap,
    without)}``. ``tag_masks``: ``{tag: 0/1 weights}`` (the untagged list is added);
    ``metrics``: ``metric_slots`` (default: of ``records``)."""
    from .engine.per_image import leave_one_out_metrics

    metrics = metric_slots(records) if metrics is None else metrics
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


def keys_of(records, tags, thresholds=None):
    """Every member's key, in the file's order (``class_results``'s): tag, size, metric
    (``thresholds``: as for ``metric_slots``)."""
    metrics = metric_slots(records, thresholds)
    return [key(m, a, t) for t in ("", *tags) for a in records.area_names for m in metrics]


def planned_bytes(n_keys, n_classes, n_images):
    """The file's size: one float64 table of (classes, 1 + images) per key."""
    return int(n_keys) * int(n_classes) * (1 + int(n_images)) * 8


def fits(n_keys, n_classes, n_images):
    """Whether the file stays within ``BENCHBOOK_LOO_MAX_BYTES`` (default 256 MiB: at
    5,000 images x 80 classes a tag slice is 38 MB under ``coco``'s 12 keys, 26 MB
    under ``voc``'s and ``recall40``'s 8, so a split with a few tags fits; at 100,000 x
    80 a file without tags is 768 / 512 MB, which does not, nor does its computing
    time). Over it no file is computed or stored and the per-image list computes on
    request, from the records."""
    return planned_bytes(n_keys, n_classes, n_images) <= max_bytes()


#: ``BENCHBOOK_LOO_MAX_BYTES`` when Django's settings are not configured (bench/).
MAX_BYTES = 256 * 1024 * 1024


def max_bytes():
    """The budget: the setting, or ``MAX_BYTES`` outside Django."""
    from django.conf import settings
    from django.core.exceptions import ImproperlyConfigured

    try:
        return int(getattr(settings, "BENCHBOOK_LOO_MAX_BYTES", MAX_BYTES))
    except ImproperlyConfigured:
        return MAX_BYTES


@dataclass
class Prepared:
    """A written file and its members' digests, waiting for ``store``."""

    path: str
    members: dict


def prepare(evaluation, records, work):
    """Compute every class's leave-one-out AP from ``records`` and write the file into
    the folder ``work``; None when it would exceed the budget (``fits``)."""
    from .protocols import resolve as resolve_protocol
    from .services import load_truth_of

    truth = load_truth_of(evaluation.split, evaluation.box_policy)
    tag_masks = {tag: truth.tag_mask(tag) for tag in truth.tags()}
    del truth
    n_keys = len(keys_of(records, tag_masks))
    if not fits(n_keys, len(records.classes), records.n_images):
        log.info("evaluation %s: leave-one-out file over budget, not stored", evaluation.pk)
        return None
    computed = compute(records, resolve_protocol(evaluation.protocol), tag_masks)
    path = os.path.join(work, f"evaluation-{evaluation.pk}-loo.npz")
    return Prepared(path, write(path, computed))


def _as_of_many(records, n_classes):
    """A group of one class out of several, given a second, empty class: the engine's
    arrays of one class are one column wide and reduce in another order, so the group
    computes as the whole run does (``per_image._reduce``, ``leave_one_out``)."""
    if len(records.classes) != 1 or n_classes == 1:
        return records
    thresholds = np.concatenate([records.thresholds, records.thresholds], axis=1)
    return dataclasses.replace(records, classes=(*records.classes, ""), thresholds=thresholds)


def group_members(records, protocol, tag_masks, thresholds):
    """A class group's part of the file: ``{"loo.keys": keys (JSON), "loo.m<i>": table
    of member i's rows for the group's classes, shape (group classes, 1 + images)}``,
    ``records`` being the group's (classes numbered from 0) and ``thresholds`` the
    whole run's IoU table (slots, classes), whose first class decides the metrics as in
    the one-process file; empty when the whole file would exceed the budget (``fits``)."""
    metrics = metric_slots(records, thresholds)
    keys = keys_of(records, tag_masks, thresholds)
    n_classes = thresholds.shape[1]
    if not fits(len(keys), n_classes, records.n_images):
        return {}
    protocol = engine.get_protocol(protocol)
    alike = _as_of_many(records, n_classes)
    size = len(records.classes)
    tables = [np.empty((size, 1 + records.n_images)) for _ in keys]
    for k in range(size):
        found = class_results(alike, protocol, k, tag_masks, metrics)
        if list(found) != keys:
            raise ValueError(f"leave-one-out AP: keys {list(found)}, expected {keys}")
        for table, name in zip(tables, keys):
            table[k, 0], table[k, 1:] = found[name]
    out = {"loo.keys": np.array(json.dumps(keys))}
    out.update({f"loo.m{i}": table for i, table in enumerate(tables)})
    return out


def join(evaluation, group_paths, work):
    """The file from the class groups' files (class order, ``group_members`` stored in
    each): ``Prepared``, or None when the groups hold no part (over the budget)."""
    path = os.path.join(work, f"evaluation-{evaluation.pk}-loo.npz")
    members = write_joined(path, group_paths)
    if members is None:
        log.info("evaluation %s: no leave-one-out parts in its class groups", evaluation.pk)
        return None
    return Prepared(path, members)


def write_joined(path, group_paths):
    """Write the file from the groups' ``group_members`` (``.npz`` files, class order)
    member by member, each member's rows streamed group by group: the same member
    bytes as ``write`` of every class. Returns the ``members`` of its row, or None when
    a group holds no part. Raises ValueError when the groups do not cover the classes."""
    opened = [np.load(p, allow_pickle=False) for p in group_paths]
    try:
        if not opened or any("loo.keys" not in g.files for g in opened):
            return None
        keys = [json.loads(str(g["loo.keys"])) for g in opened]
        if any(k != keys[0] for k in keys):
            raise ValueError("the class groups computed different leave-one-out members")
        n_classes = len(opened[0]["meta.classes"])
        n_images = int(opened[0]["meta.n_images"])
        header = io.BytesIO()
        shape = (n_classes, 1 + n_images)
        np.lib.format.write_array_header_1_0(
            header,
            {
                "descr": np.lib.format.dtype_to_descr(np.dtype(np.float64)),
                "fortran_order": False,
                "shape": shape,
            },
        )
        members = {}
        with zipfile.ZipFile(path, "w", zipfile.ZIP_STORED, allowZip64=True) as z:
            for i, name in enumerate(keys[0]):
                member = f"m{i}.npy"
                h = hashlib.sha256(header.getvalue())
                rows = 0
                with z.open(member, "w", force_zip64=True) as f:
                    f.write(header.getvalue())
                    for g in opened:
                        table = np.ascontiguousarray(g[f"loo.m{i}"], np.float64)
                        if table.ndim != 2 or table.shape[1] != shape[1]:
                            raise ValueError(
                                f"leave-one-out member {name}: a group of shape {table.shape}"
                            )
                        data = table.tobytes()
                        f.write(data)
                        h.update(data)
                        rows += len(table)
                        del table, data
                if rows != n_classes:
                    raise ValueError(
                        f"leave-one-out member {name}: {rows} rows for {n_classes} classes"
                    )
                members[name] = {"member": member, "sha256": h.hexdigest()}
        return members
    finally:
        for g in opened:
            g.close()


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


class _NoRow(Exception):
    """The scorecard has no row (yet): not kept, so a row stored later is found."""


def stored(scorecard, metric, size, tag):
    """``read`` of the scorecard's member for (metric, size bucket name, tag), kept in
    the process (a stored file never changes); None when there is none to read. A
    scorecard without a row is asked again on the next request (``loo_fill`` may have
    stored one meanwhile: one query); a member that failed its hash is not read again
    (audited once per process)."""
    from .outcomes import _Kept

    global _MEMBERS
    if _MEMBERS is None:
        _MEMBERS = _Kept(MEMBERS_KEPT)

    def load():
        row = row_of(scorecard)
        if row is None:
            raise _NoRow
        return read(row, key(metric, size, tag))

    try:
        return _MEMBERS.get((scorecard.pk, scorecard.records_sha256, metric, size, tag), load)
    except _NoRow:
        return None


#: Members kept per process (one is classes x images float64: 3.2 MB at 80 x 5,000).
MEMBERS_KEPT = 24
_MEMBERS = None
