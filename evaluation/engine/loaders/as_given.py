"""Results read "as given": pycocotools 2.0.11 keeps each result's own ``id``.

When a results file's first result has none of ``caption``, a non-empty ``bbox``,
``segmentation`` and ``keypoints`` (``result_readings.GIVEN``), ``COCO.loadRes`` sets
nothing: ``createIndex`` keys the results by their own ids (``anns[ann['id']] = ann``,
a later result of an id replacing an earlier one) while ``imgToAnns`` keeps every
result; ``COCOeval._prepare`` then takes ``loadAnns(getAnnIds(imgIds, catIds))``:

* for each image of the split in ascending id order, each of its results in file
  order whose category the split lists, *the last result of that result's id* — so a
  repeated id puts that last result in the place of every one of them (twice if two
  share it), in its own image and category (``_dts[dt['image_id'], dt['category_id']]``);
* ``evaluateImg`` marks a truth box taken with the detection's id, ``gtm[t, g] =
  d['id']`` (a float array), and skips a box only while ``gtm > 0``: a detection whose
  id numpy reads as 0, below 0 or NaN leaves the box it matched free for the next
  detection (``free``) — under ``coco`` (``Protocol.zero_id_unmatched``, the same line
  as truth id 0), read by ``matching``; an id numpy cannot write there (text that is
  no number, an integer beyond float64) raises when the detection matches a box
  (``unwritable``: its record, for ``matching`` to refuse the file then).

``emit`` lays a file's records out that way, before the usual lookup (``detection_blocks.
resolve``): rows in ascending image order, each row the last record of its record's id
(one of an unlisted class stays itself and is dropped with its class), ``locate``
naming the record whose values the row carries; ``box_counts[REPLACED]`` counts the
rows replaced. Without repeated ids the rows keep file order (no reordering: nothing
changes for pycocotools' numbers, and positions stay the file's).
"""

import numpy as np

from . import checks, result_readings

#: ``box_counts`` keys: rows given the values of a later record of the same id, and
#: detections whose id leaves a matched box free.
REPLACED = "replaced_by_id"
FREE = "free_id"


def unwritable(ids, records):
    """Per row the file's record number where numpy cannot write the id into a
    float array (``result_readings.as_float``), else -1."""
    bad = np.fromiter((result_readings.as_float(v) is None for v in ids.tolist()), bool, len(ids))
    return np.where(bad, records, -1).astype(np.int64)


def free_ids(ids):
    """Whether each id, as numpy writes it into pycocotools' float ``gtm`` array, is
    not above 0 (0, negative, NaN, null, false, text such as "-1"); an id numpy
    cannot write (left unfit by the reader) counts as holding."""
    values = [result_readings.as_float(v) for v in ids.tolist()]
    return np.fromiter((v is not None and not v > 0 for v in values), bool, len(values))


def emit(path, raw, unknown_images):
    """``raw`` (a ``detection_blocks.Raw`` of the whole file, read ``GIVEN``) laid out
    as pycocotools' ``_prepare`` takes its records; its ``free`` column set; the
    count of replaced rows in ``raw.extra_counts``."""
    return _with_free(raw, *layout(path, raw, unknown_images))


def layout(path, raw, unknown_images):
    """``(source, replaced)``: row i of the laid-out file carries record ``source[i]``
    (``emit``; also read by ``exact_scores``, which replays pycocotools' ranking of
    integer scores beyond 2**53 on these rows), ``replaced`` rows carrying another
    record than their own."""
    ids = raw.ids
    n = len(ids)
    image, found_image = checks.resolve(path, raw.image_ids, raw.known_images, raw.locate, "", "")
    _, listed = checks.resolve(path, raw.class_keys, raw.known_classes, raw.locate, "", "")
    if not found_image.all() and unknown_images != "drop":
        return np.arange(n), 0  # resolve refuses it, naming the record
    keys = [_key(v) for v in ids.tolist()]
    last = {}
    for i in np.flatnonzero(found_image).tolist():
        last[keys[i]] = i  # createIndex: anns[ann['id']] = ann
    source = np.arange(n)
    for i in np.flatnonzero(found_image & listed).tolist():
        source[i] = last[keys[i]]
    replaced = int((source != np.arange(n)).sum())
    if not replaced:
        return source, 0
    order = np.argsort(np.where(found_image, image, -1), kind="stable")
    return source[order], replaced


_NAN = object()


def _key(value):
    """An id as a dict keys it in pycocotools: Python equality (1, 1.0, true alike),
    and every ``NaN`` one key — Python's ``json`` gives each NaN literal the same float
    object, which a dict finds by identity (a slice-by-slice read gives new ones)."""
    return _NAN if isinstance(value, float) and value != value else value


def _with_free(raw, source, replaced):
    """``raw``'s rows taken from ``source`` (row i carries record ``source[i]``)."""
    import dataclasses

    locate = raw.locate
    identity = bool(np.array_equal(source, np.arange(len(source))))
    taken = {}
    if not identity:
        for name in ("image_ids", "class_keys", "boxes", "score", "shown", "area", "unfit", "ids"):
            taken[name] = getattr(raw, name)[source]
        taken["locate"] = lambda i: locate(int(source[i]))
        taken["records"] = raw.base + source  # the record whose values the row carries
    ids = taken.get("ids", raw.ids)
    return dataclasses.replace(
        raw,
        **taken,
        free=free_ids(ids),
        unwritable=unwritable(ids, raw.base + source),
        extra_counts={REPLACED: replaced},
    )
