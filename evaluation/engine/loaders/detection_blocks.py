"""Detections resolved against a split, a block of records at a time.

``resolve`` is the one place raw detection columns (external image ids, class keys,
boxes, scores) become engine columns: image and class lookup, the unknown-image and
unknown-class policies, the box checks and the box policy. ``load_predictions`` calls
it once on the whole file; ``stream`` calls it on each block of a JSON or CSV file, so
a streamed file gives exactly the columns of a whole load, block after block (every
check is per record, every count a sum — but for records pycocotools would fail on
only when comparing them, ``Raw.unfit``: their rank in their image and class is the
whole file's, ``file_ranks``, read again when a block holds one). The blocks as read,
``Raw``, come from ``raw_blocks`` (``raw_blocks``, ``json_raw``, ``csv_raw``; imported
from here too).
"""

import dataclasses

import numpy as np

from ..boxes import said_corners
from ..errors import InputError
from . import as_given, checks, lost_ids, uncompared, unread_fields
from .ids import NULL, NUMBER, TEXT, escaped
from .raw_blocks import Raw, csv_raw, json_raw, raw_blocks  # noqa: F401  (re-exported)
from .truthless_boxes import truthful

#: Formats that can be read a block at a time.
STREAMABLE = ("json", "csv")


@dataclasses.dataclass
class Resolved:
    """One block in engine columns (records of dropped images or classes left out)."""

    image: np.ndarray
    cls: np.ndarray
    boxes: np.ndarray
    score: np.ndarray
    dropped: int
    dropped_images: int
    box_counts: dict
    dropped_classes: tuple = ()  # the class keys of ``dropped``, as text (``distinct_keys``)
    area: np.ndarray = None  # as ``Raw.area``
    free: np.ndarray = None  # as ``Raw.free``
    unwritable: np.ndarray = None  # as ``Raw.unwritable``; None: none such
    #: some record's box as read is infinite, left out or not (``beyond_float64``)
    infinite_box: bool = False
    #: per record, ``Predictions.alias``; None: none such
    alias: np.ndarray = None
    #: ``Predictions.corners`` of the block (``boxes.said_corners``); None: none says more
    corners: np.ndarray = None
    #: per record, its position in the file (``Predictions.record``), int64
    record: np.ndarray = None


#: The count (``box_counts``) of detections whose area a reading gave, by reading.
AREA_COUNT = {
    "mask": "mask_area",
    "caption": "given_area",
    "keypoints": "keypoint_area",
    "given": "as_given_area",
}


def _key_order(key):
    """Class keys in a stable, readable order: integers by value, then text."""
    try:
        return (0, int(key), "")
    except ValueError:
        return (1, 0, key)


def distinct_keys(keys, more=()):
    """The distinct class keys of ``keys`` and ``more``, as text, sorted (integers by
    value): the same for a file read whole and read a block at a time."""
    seen = {_plain(str(k.item() if hasattr(k, "item") else k)) for k in keys} | set(more)
    return tuple(sorted(seen, key=_key_order))


def _plain(key):
    """A class key without a typed key's mark (``ids``), a lone surrogate as its escape
    (reports and the platform's JSON hold it)."""
    return escaped(key[1:] if key[:1] in (NUMBER, TEXT, NULL) else key)


def resolve(path, truth, raw, policy, unknown_classes, unknown_images, rank_of=None):
    """``Resolved`` columns of one block (see ``load_predictions`` for the policies);
    an ``InputError`` names the file, the record and the field. An unfit record
    (``Raw.unfit``) of a listed class is refused if pycocotools compares it (ranked
    below ``uncompared.CAP`` in its image and class), else left out and counted;
    ``rank_of(record numbers)`` ranks them in the whole file (``file_ranks``: exact
    where pycocotools ranks integer scores exactly), None: this block is the whole
    file, ranked by float64 score."""
    at = [LOOKUP]
    try:
        return _resolve(path, truth, raw, policy, unknown_classes, unknown_images, rank_of, at)
    except InputError as error:
        error.stage = at[0]  # which check refused it (``LOOKUP``...``POLICY``)
        raise


#: The checks of ``resolve`` in order, as a refusal's ``stage``: the image and class
#: lookup, then what pycocotools reads only when comparing (scores, then unfit
#: records), then the box policy. A file read a block at a time names the refusal of
#: the lowest stage, its first record (``loaders.stream_predictions``), as a
#: whole load does.
LOOKUP, SCORES, UNFIT, POLICY = range(4)


#: ``box_counts`` key: detections with a missing or non-number score or an unfit field
#: on an image or of a class whose id pycocotools' ``np.unique`` loses.
UNREADABLE_ON_LOST = "unreadable_on_lost_ids"


#: ``box_counts`` key: detections under a lost category's changed value
#: (``Predictions.alias``; ``provenance.changed_value_counts`` says per protocol).
UNDER_CHANGED_VALUE = "under_changed_value"


def _narrowed(keep, columns, locate):
    """``columns`` (arrays; None stays None) at the rows ``keep`` marks, and ``locate``
    (row -> record) of the narrowed rows."""
    rows = np.flatnonzero(keep)
    narrowed = tuple(None if c is None else c[keep] for c in columns)
    return narrowed, lambda i: locate(int(rows[i]))


def _unreadable_on_lost(truth, image, cls, score, unfit, kept_at, alias=None):
    """Per record, whether its score or a field is one pycocotools would raise on
    (``unread_fields.bad_scores``, ``raw.unfit``) but it never reads it: its image or
    class id is one its ``np.unique`` loses (``GroundTruth.looked_up``), so
    ``evaluate`` never fetches it. Such records are left out and counted; every other
    detection of a lost image stays (the VOC protocols score those images)."""
    seen = truth.looked_up(image, cls, alias)
    if seen.all():
        return np.zeros(len(score), bool)
    bad = unread_fields.bad_scores(score)
    if unfit is not None:
        bad |= uncompared.fields(unfit[kept_at])
    return bad & ~seen


def _resolve(path, truth, raw, policy, unknown_classes, unknown_images, rank_of, at):

    image_ids, class_keys, boxes, score = raw.image_ids, raw.class_keys, raw.boxes, raw.score
    area, unfit, free, bad_id = raw.area, raw.unfit, raw.free, raw.unwritable
    kept_at = np.arange(len(score))  # the block's row of each kept record
    locate, fields = raw.locate, raw.fields
    image, found = checks.resolve(path, image_ids, raw.known_images, locate, "", "")
    dropped_images = 0
    if unknown_images == "drop" and not found.all():
        dropped_images = int((~found).sum())
        columns = (image, class_keys, boxes, score, area, free, bad_id, kept_at)
        columns, locate = _narrowed(found, columns, locate)
        image, class_keys, boxes, score, area, free, bad_id, kept_at = columns
    else:
        checks.require_found(path, found, raw.shown, locate, fields["image"], "image")
    cls, found = checks.resolve(path, class_keys, raw.known_classes, locate, "", "")
    dropped, dropped_classes, alias = 0, (), None
    if not found.all():
        aliases = None
        if unknown_classes != "reject":
            aliases = _changed_value_classes(truth, raw, image, class_keys, found)
        if aliases is not None:  # scored under the lost category by pycocotools
            alias = aliases[0]
            cls = np.where(alias, aliases[1], cls)
            found = found | alias
    if not found.all():
        unlisted = np.flatnonzero(~found)
        lost_ids.refuse_uncomparable_detections(
            path,
            truth,
            class_keys[unlisted],
            image[unlisted],
            lambda i: locate(int(unlisted[i])),
            fields["class"],
        )
        if unknown_classes == "reject":
            checks.fail_at(
                path,
                ~found,
                locate,
                fields["class"],
                lambda i: f"class {checks.show(class_keys[i])} is not one of the split's classes",
            )
        dropped = int((~found).sum())
        dropped_classes = distinct_keys(class_keys[~found])
        columns = (image, cls, boxes, score, area, free, bad_id, kept_at, alias)
        columns, locate = _narrowed(found, columns, locate)
        image, cls, boxes, score, area, free, bad_id, kept_at, alias = columns
    unreadable = _unreadable_on_lost(truth, image, cls, score, unfit, kept_at, alias)
    if unreadable.any():  # pycocotools never fetches them: left out, counted
        columns = (image, cls, boxes, score, area, free, bad_id, kept_at, alias)
        columns, locate = _narrowed(~unreadable, columns, locate)
        image, cls, boxes, score, area, free, bad_id, kept_at, alias = columns
    at[0] = SCORES
    checks.fail_at(  # a bad score only on a detection of a class pycocotools evaluates
        path,
        unread_fields.bad_scores(score),
        locate,
        "score",
        "missing or not a number (pycocotools reads the score of every detection of a "
        "class the split lists)",
    )
    uncompared_unfit = 0
    at[0] = UNFIT
    if unfit is not None:
        bad = np.flatnonzero(uncompared.fields(unfit[kept_at]))
        kind = uncompared.kinds(unfit[kept_at])
        keyed = np.flatnonzero(kind != None)  # noqa: E711 - elementwise
        if len(bad) or len(keyed):
            if rank_of is None:
                group = _groups(truth, image, cls, alias)
                rank = uncompared.ranks(group, score)
                mixed = uncompared.mixed(group, rank, kind, truthful(truth))
                mixed = keyed[mixed[keyed]]
                rank = rank[bad]
            else:
                rank = rank_of(raw.base + kept_at[bad])
                mixed = keyed[rank_of.mixed(raw.base + kept_at[keyed])]
            compared = np.union1d(bad[rank < uncompared.CAP], mixed)
            if len(compared):
                field, message = unfit[kept_at[compared[0]]][:2]
                raise InputError(path, message, record=locate(int(compared[0])), field=field)
        if len(bad):
            keep = np.ones(len(score), bool)
            keep[bad] = False
            columns = (image, cls, boxes, score, area, free, bad_id, kept_at, alias)
            columns, locate = _narrowed(keep, columns, locate)
            image, cls, boxes, score, area, free, bad_id, kept_at, alias = columns
            uncompared_unfit = len(bad)
    at[0] = POLICY
    checks.check_boxes(path, boxes, locate, fields["bbox"], policy)
    if policy == "reject":  # else scored as pycocotools does: NaN ranks last
        checks.fail_at(
            path,
            ~np.isfinite(score),
            locate,
            "score",
            lambda i: f"must be a finite number, got {score[i]} (box policy: reject)",
        )
    boxes, box_counts, corners = checks.apply_box_policy(
        path,
        boxes,
        truth.image_width[image],
        truth.image_height[image],
        locate,
        policy,
        fields["bbox"],
        None if raw.corners is None else raw.corners[kept_at],
    )
    return Resolved(
        image=image.astype(np.int32),
        cls=cls.astype(np.int32),
        boxes=boxes,
        score=score,
        dropped=dropped,
        dropped_images=dropped_images,
        box_counts={
            **box_counts,
            "non_finite_score": int((~np.isfinite(score)).sum()),
            **({} if area is None else {AREA_COUNT[raw.reading]: len(area)}),
            **({uncompared.COUNT: uncompared_unfit} if uncompared_unfit else {}),
            **(raw.extra_counts or {}),
            **({UNREADABLE_ON_LOST: int(unreadable.sum())} if unreadable.any() else {}),
            **({} if free is None else {as_given.FREE: int(free.sum())}),
            **({UNDER_CHANGED_VALUE: int(alias.sum())} if alias is not None else {}),
        },
        dropped_classes=dropped_classes,
        area=area,
        free=free if free is not None and free.any() else None,
        unwritable=bad_id if bad_id is not None and (bad_id >= 0).any() else None,
        infinite_box=bool(np.isinf(raw.boxes).any()),
        alias=alias if alias is not None and alias.any() else None,
        corners=said_corners(boxes, corners),
        record=record_positions(raw)[kept_at],
    )


def record_positions(raw):
    """Per row of ``raw``, the position of the record it carries in the file, 0-based:
    a JSON file's index in its top-level array, a CSV file's data row (header and
    blank lines not counted), a label folder's record in the order the loader reads
    them (files in name order, lines in file order: ``label_folders``); a row laid out
    "as given" carries the record ``as_given.layout`` names."""
    if raw.records is not None:
        return raw.records.astype(np.int64)
    return raw.base + np.arange(len(raw.score), dtype=np.int64)


def _changed_value_classes(truth, raw, image, class_keys, found):
    """``lost_ids.changed_value_classes`` of a COCO JSON block (the only results
    pycocotools reads; a CSV or label file names classes, not ids), else None."""
    if raw.fields.get("class") != "category_id":
        return None
    return lost_ids.changed_value_classes(truth, image, class_keys, found)


def _groups(truth, image, cls, alias=None):
    """Per record, its (image, class) entry of pycocotools' ``_dts``: a detection under
    a changed value (``alias``) is one apart from the lost category's own."""
    n_classes = len(truth.classes)
    group = image.astype(np.int64) * n_classes + cls
    if alias is not None:
        group = np.where(alias, group + truth.n_images * n_classes, group)
    return group


def add_counts(total, counts):
    """``total`` plus ``counts`` key by key (the first block's key order; a key only
    some blocks give, ``uncompared.COUNT``, after them)."""
    if total is None:
        return dict(counts)
    keys = list(total) + [key for key in counts if key not in total]
    return {key: total.get(key, 0) + counts.get(key, 0) for key in keys}


def file_ranks(path, truth, raws, exact=None):
    """``uncompared.FileRanks`` over the ``Raw`` blocks ``raws()`` gives (a JSON file's,
    read again when needed, or a whole file's one block); ``exact``: as for
    ``uncompared.ranks`` (``exact_scores.cap_values``)."""

    def blocks():
        for raw in raws():
            image, found_image = checks.resolve(
                path, raw.image_ids, raw.known_images, raw.locate, "", ""
            )
            cls, found_class = checks.resolve(
                path, raw.class_keys, raw.known_classes, raw.locate, "", ""
            )
            aliases = _changed_value_classes(truth, raw, image, raw.class_keys, found_class)
            alias = None
            if aliases is not None:
                alias, found_class = aliases[0], found_class | aliases[0]
                cls = np.where(alias, aliases[1], cls)
            group = _groups(truth, image, cls, alias)
            found = found_image & found_class
            looked_up = truth.looked_up(
                image[found], cls[found], None if alias is None else alias[found]
            )
            group[~found] = -1
            group[np.flatnonzero(found)[~looked_up]] = -1  # never compared (``np.unique``)
            n = len(raw.score)
            unfit = raw.unfit if raw.unfit is not None else np.full(n, None, object)
            yield raw.base + np.arange(n), group, raw.score, unfit

    return uncompared.FileRanks(blocks, exact, truthful(truth))
