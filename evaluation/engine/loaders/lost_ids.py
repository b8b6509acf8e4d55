"""What pycocotools' ``np.unique`` loses of a COCO JSON split, decided once at load.

``unique_lost`` gives, per id family, the ids ``COCOeval.evaluate``'s
``list(np.unique(...))`` loses (``ids.unique_lost``), whether their JSON types decided
it, and the ids it merges into another's entry; ``GroundTruth.unique_lost_images``,
``unique_lost_classes`` and ``unique_merged_images`` keep the answer every rule reads.
``unread_on_lost`` finds the annotations with a value pycocotools would raise on but
never reads, being on such an image or category.
"""

import numpy as np

from . import ids as ids_module


def unique_lost(ids, id_type, kinds, listed=None):
    """``(positions, by_type, merged)``: the ids (``GroundTruth`` ids of ``id_type``,
    written as ``kinds`` says) pycocotools' ``np.unique`` loses (``ids.unique_lost``),
    whether their JSON types (``true``, ``1.0``) decided that, and those that share
    another's entry (``ids.unique_merged``). ``listed``: ``(ids, kinds)`` of the list
    ``np.unique`` runs on where it is not ``ids`` (the categories as listed, repeats
    and all: ``getCatIds``)."""
    if listed is None:
        listed = ids, kinds
    if not id_type and not listed[1].any():  # int64: exact
        return np.zeros(0, np.int64), False, np.zeros(0, np.int64)
    values = ids_module.as_written(ids, id_type, kinds)
    written = ids_module.as_written(listed[0], id_type, listed[1])
    lost = ids_module.unique_lost(values, written)
    merged = ids_module.unique_merged(values) if len(lost) else np.zeros(0, np.int64)
    if not listed[1].any():
        return lost, False, merged
    plain = ids_module.unique_lost(
        ids_module.as_written(ids, id_type, None), ids_module.as_written(listed[0], id_type, None)
    )
    return lost, not np.array_equal(plain, lost), merged


def unread_on_lost(cols, bad_rows, rows, image_ids, class_ids, lost):
    """The rows (of ``rows``, None: every row) with a bad ``bbox`` or ``area`` placed on
    an image or under a category whose id pycocotools' ``np.unique`` loses
    (``lost``: ``unique_lost`` of each family): ``evaluate`` never fetches them, so
    it never reads the value and scores the file. They are left out here and counted
    (``unreadable_on_lost_ids``): every protocol reads one ground truth."""
    if not bad_rows or not lost:
        return np.zeros(0, np.int64)
    bad = np.array(sorted(bad_rows), np.int64)
    if rows is not None:
        bad = bad[np.isin(bad, rows)]
    lost_images, lost_classes = image_ids[lost["image"][0]], class_ids[lost["class"][0]]
    if not (len(lost_images) or len(lost_classes)):
        return np.zeros(0, np.int64)
    on_lost = np.isin(cols["box_image_ids"][bad], lost_images) | np.isin(
        cols["box_class_ids"][bad], lost_classes
    )
    return bad[on_lost]


def unfetched(lost, image_ids, class_ids, class_type):
    """``(image ids, class ids)`` whose annotations pycocotools' ``getAnnIds(imgIds=
    p.imgIds, catIds=p.catIds)`` never fetches after ``evaluate``'s ``np.unique``
    (``lost``: ``unique_lost`` of each family; the ids, typed keys where not int64,
    in ``GroundTruth`` order), or None when none. Images are looked up in
    ``imgToAnns`` (a dict): a lost image is never fetched. Categories by the list test
    ``ann['category_id'] in catIds`` (``==``): a numeric id numpy rounded still equals
    its value and is fetched; a text id cut of its trailing U+0000 is not, nor a NaN
    (numpy's is another object, and NaN == NaN is false)."""
    images = image_ids[lost["image"][0]]
    lost_classes = np.zeros(len(class_ids), bool)
    lost_classes[lost["class"][0]] = True
    nan = class_ids == ids_module.NUMBER + "nan" if class_ids.dtype == object else False
    classes = class_ids[unfetched_classes(lost_classes, nan, class_type)]
    if not (len(images) or len(classes)):
        return None
    return images, classes


def unfetched_classes(lost, nan, class_type):
    """Of the classes whose id ``np.unique`` loses (mask ``lost``), those whose
    annotations ``getAnnIds``' list test ``ann['category_id'] in catIds`` never
    fetches (``unfetched``): every one of a text family (cut of U+0000), else only a
    NaN (mask ``nan``)."""
    return lost if class_type in ("text", "json") else lost & nan
