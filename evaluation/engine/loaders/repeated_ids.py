"""Both readings of a COCO JSON split whose annotation ids repeat (red team audit12 F3).

pycocotools 2.0.11 reads an id given twice through ``anns[id]`` (``loadAnns``): each
occurrence ``getAnnIds`` fetches becomes a copy of the *last* annotation with that id
(``annotation_index.resolve``). That is pycocotools' own rule, which the CityPersons
script inherits (it uses pycocotools' ``COCO`` class). The VOC devkit
(``VOCevaldet.m``), KITTI's devkit and the pedestrian toolbox never read an id: they
score every annotation as the file gives it (converters often restart ids on each
image: ``1, 2`` on image 1, ``1, 2`` on image 2).

One ground truth holds both: the rows pycocotools scores, as ``resolve`` gives them
(``GroundTruth.repeated`` marks its copies ``REPEATED_COPY``), and each annotation
such a copy replaces or that is never fetched, as given (``REPEATED_GIVEN``), placed
where the file has it (images in ascending id, file order within one), so the
readings that keep every annotation see them in file order. ``GroundTruth.
repeated_left_out`` says what each reading leaves out; the content hash leaves the
``REPEATED_GIVEN`` rows out (``content_hash``): the rows hashed are those of every
engine before, so a split frozen then keeps its hash.
"""

import collections
import dataclasses

import numpy as np

from ..boxes import edges
from ..data import BOX_COLUMNS, REPEATED_COPY, REPEATED_GIVEN
from ..errors import InputError
from . import annotation_index, attributes, checks, ids


def given_rows(cols, image_ids, class_ids, bad_rows):
    """Source rows read as given by the readings that never read ids: each annotation
    of a listed image and category whose id a later annotation repeats (pycocotools
    reads a copy of that one in its place, or never fetches it). Left out: those
    written with a changed value (``box_alias``: an unlisted id, which those readings
    never read) and those with a bad ``bbox``/``area`` (pycocotools never reads it;
    those readings would refuse it)."""
    ids = cols["box_ids"]
    replaced = annotation_index._last_of_each_id(ids) != np.arange(len(ids))
    if not replaced.any():
        return np.zeros(0, np.int64)
    listed = np.isin(cols["box_image_ids"], image_ids) & np.isin(cols["box_class_ids"], class_ids)
    alias = cols.get("box_alias")
    if alias is not None:
        listed &= alias == 0
    rows = np.flatnonzero(replaced & listed)
    if bad_rows:
        rows = rows[~np.isin(rows, np.fromiter(bad_rows, np.int64))]
    return rows


def readings(path, cols, resolved, listed, bad_rows, policy, vis_ratio):
    """``merge``'s arguments after the truth, read from ``cols`` before ``take``:
    pycocotools' rows and the occurrence each takes the place of (``resolved``:
    ``annotation_index.resolve(slots=True)``), that occurrence's image rank, the rows
    as given (``given_rows``) and their columns (``given_columns``). ``listed``: the
    split's ``(image_ids, class_ids, image_order)``."""
    rows, occurrence = resolved
    image_ids, class_ids, image_order = listed
    as_given = given_rows(cols, image_ids, class_ids, bad_rows)
    rank = image_rank(cols["box_image_ids"][occurrence], image_ids)
    given = None
    if len(as_given):
        given = given_columns(
            path, cols, as_given, image_ids, class_ids, image_order, policy, vis_ratio
        )
    return rows, occurrence, rank, given, as_given


def image_rank(box_image_ids, image_ids):
    """Each annotation's image's position in ``image_ids`` (pycocotools' order)."""
    by_key = np.argsort(image_ids, kind="stable")
    return by_key[np.searchsorted(image_ids[by_key], box_image_ids)]


def given_columns(path, cols, rows, image_ids, class_ids, image_order, policy, vis_ratio):
    """The ``GroundTruth`` per-box columns of the source rows ``rows`` as given (the
    same readings as ``truth_columns.read_truth``'s, nothing counted), or None where
    the box policy refuses one of them (``reject``): then every reading reads
    pycocotools' copies, as before engine 2.21.0."""
    given = dict(cols)
    given.pop("box_alias_copies", None)  # resolve's, per row it gives: not these rows
    annotation_index.take(given, rows)
    locate = lambda i: f"annotations[{rows[i]}]"  # noqa: E731
    box_image, _ = checks.resolve(path, given["box_image_ids"], image_ids, locate, "", "")
    box_class, _ = checks.resolve(path, given["box_class_ids"], class_ids, locate, "", "")
    boxes, area = given["boxes"], given["box_area"]
    area_given = given.get("box_area_given")
    area_given = ~np.isnan(area) if area_given is None else area_given
    try:
        checks.check_boxes(path, boxes, locate, "bbox", policy)
        if policy == "reject":
            frame = cols["image_width"][image_order], cols["image_height"][image_order]
            checks.check_inside(
                path, boxes, frame[0][box_image], frame[1][box_image], locate, "bbox"
            )
            checks.fail_at(path, area_given & ~np.isfinite(area), locate, "area", "not finite")
            checks.fail_at(path, area_given & (area < 0), locate, "area", "negative")
    except InputError:
        return None
    with checks.ieee():
        area = np.where(area_given, area, boxes[:, 2] * boxes[:, 3])
    unread = collections.defaultdict(int)  # counted on pycocotools' rows only
    road = attributes.finish(
        path, given, image_ids, locate, path, locate, unread, None, as_given=vis_ratio == "as-given"
    )
    box_ids = given["box_ids"]  # as ``GroundTruth`` shows them (``truth_columns._shown``)
    return {
        "box_ids": ids.display(box_ids, "text") if box_ids.dtype == object else box_ids,
        "box_image": box_image,
        "box_class": box_class,
        "boxes": boxes,
        "box_area": area,
        "crowd": given["crowd"],
        "difficult": given["difficult"],
        "ignore": given["ignore"],
        "ignore_key": given.get("ignore_key"),
        "ignore_key_fraction": given.get("ignore_key_fraction"),
        "iscrowd_fraction": given["ignore"],
        "occlusion": road["occlusion"],
        "truncation": road["truncation"],
        "visibility": road["visibility"],
        "rank": image_rank(given["box_image_ids"], image_ids),
    }


def merge(truth, rows, occurrence, occurrence_rank, given, given_rows_):
    """``truth`` (the rows pycocotools scores: source ``rows``, ``occurrence`` the
    source row whose place each takes, as ``annotation_index.resolve`` gives them, or
    None where nothing was resolved; ``occurrence_rank``: its image's position) with
    the rows as given (``given``: ``given_columns``, or None; ``given_rows_`` their
    source rows) interleaved, each after the copy made in its place, so the rows every
    other reading keeps are in file order within an image; ``GroundTruth.repeated``
    marks both."""
    copy = np.zeros(truth.n_boxes, bool) if occurrence is None else rows != occurrence
    mark = np.where(copy, REPEATED_COPY, 0).astype(np.int8)
    if given is None or not len(given_rows_):
        return dataclasses.replace(truth, repeated=mark) if copy.any() else truth
    extra = len(given_rows_)
    keys = (  # image (pycocotools' order), then file order; a copy before the original
        np.r_[np.zeros(truth.n_boxes, np.int8), np.ones(extra, np.int8)],
        np.r_[occurrence, given_rows_],
        np.r_[occurrence_rank, given["rank"]],
    )
    order = np.lexsort(keys)
    columns = {}
    for name in BOX_COLUMNS:
        ours, theirs = getattr(truth, name), given[name]
        if name == "box_ids":
            columns[name] = np.concatenate([ours, np.asarray(theirs)])[order]
            continue
        theirs = np.zeros(extra, ours.dtype) if theirs is None else theirs
        columns[name] = np.concatenate([ours, np.asarray(theirs, ours.dtype)])[order]
    # the optional columns only where the split has them; the CityPersons script, which
    # reads them, never reads a given row
    if truth.vis_ratio is not None:
        columns["vis_ratio"] = np.r_[truth.vis_ratio, np.full(extra, np.nan)][order]
    if truth.height_key is not None:
        columns["height_key"] = np.r_[truth.height_key, given["boxes"][:, 3]][order]
    if truth.alias is not None:
        columns["alias"] = np.r_[truth.alias, np.zeros(extra, truth.alias.dtype)][order]
    if truth.corners is not None:  # a row as given: its edges as x + w (no corners read)
        columns["corners"] = np.r_[truth.corners, edges(given["boxes"])][order]
    columns["repeated"] = np.r_[mark, np.full(extra, REPEATED_GIVEN, np.int8)][order]
    position = np.empty(len(order), np.int64)
    position[order] = np.arange(len(order))
    faults = {
        field: [[int(position[entry[0]]), *entry[1:]] for entry in entries]
        for field, entries in truth.cityscale_faults.items()
    }
    return dataclasses.replace(truth, **columns, cityscale_faults=faults)
