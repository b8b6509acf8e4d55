"""What pycocotools' ``np.unique`` loses of a COCO JSON split, decided once at load.

``unique_lost`` gives, per id family, the ids ``COCOeval.evaluate``'s
``list(np.unique(...))`` loses (``ids.unique_lost``), whether their JSON types decided
it, and the ids it merges into another's entry; ``GroundTruth.unique_lost_images``,
``unique_lost_classes`` and ``unique_merged_images`` keep the answer every rule reads.
``unread_on_lost`` finds the annotations with a value pycocotools would raise on but
never reads, being on such an image or category.
"""

import numpy as np

from ..data import ALIAS_CLASS, ALIAS_IMAGE
from ..errors import InputError
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
    alias = cols.get("box_alias")
    if alias is not None:  # read there: under the lost entry (``changed_value_refs``)
        on_lost &= alias[bad] == 0
    return bad[on_lost]


def unfetched_classes(lost, nan, class_type):
    """Of the classes whose id ``np.unique`` loses (mask ``lost``), those whose
    annotations ``getAnnIds``' list test ``ann['category_id'] in catIds`` never
    fetches: every one of a text family (cut of U+0000), else only a NaN (mask
    ``nan``). What ``fetched_by_category`` finds running that test on the loader's
    columns, for a ``GroundTruth``, which keeps no written kinds
    (``cityscale_raises._prepared``)."""
    return lost if class_type in ("text", "json") else lost & nan


def changed_keys(keys):
    """``{changed: lost}``: the typed keys (``ids.typed_key``) pycocotools looks the
    lost ids ``keys`` (typed keys) up under, numpy's value of each, which finds no
    listed id, and the lost key of each. A number is lost
    only in a float64 array (its float64 value; a whole one keyed as the integer, as
    ``coco_records.whole_ids`` keys a whole float), text only in a ``<U`` array (its
    trailing U+0000 cut); a NaN finds nothing (no key: NaN equals nothing)."""
    changed = {}
    for key in as_typed_keys(keys):
        value = ids_module.key_value(key)
        if isinstance(value, str):
            changed.setdefault(ids_module.typed_key(value.rstrip("\x00")), key)
            continue
        value = float(value)
        if value == value:
            whole = int(value) if value.is_integer() else value
            changed.setdefault(ids_module.typed_key(whole), key)
    return changed


def changed_class_keys(truth):
    """``changed_keys`` of a ground truth's lost classes ({} when none)."""
    lost = truth.unique_lost_classes
    if lost is None or not len(lost):
        return {}
    return changed_keys(ids_module.keys_of(truth.class_ids, truth.class_id_type)[lost])


def changed_value_refs(path, cols, image_ids, class_ids, lost):
    """The annotations pycocotools scores under a lost id's changed value (found by the
    third red team of engine 2.18.0): ``imgToAnns`` and ``_gts`` hold every
    annotation, listed or not, so the value numpy changed a lost image or category id
    into (``changed_keys``) finds the annotations of an *unlisted* image or category
    written with that value, and ``evaluate`` scores them under the lost entry
    (images ``[2^63 + 1, 5]``: an annotation of image 2^63; categories ``[0.5, 2^53 +
    1]``: one of category 2^53). Returns None where there is none, else ``(alias,
    image column, class column)``: per annotation (``cols``: every one, in file
    order) its ``GroundTruth.alias`` bits, and the id columns with each such one's id
    made the lost entry's (the loader then keeps it as a box of that entry). Only an
    annotation whose other id pycocotools finds too is one (a listed id it does not
    lose, or a changed value). A repeated annotation id on one makes a copy of the last
    annotation of that id (``annotation_index.resolve``)."""
    lost_images, lost_classes = image_ids[lost["image"][0]], class_ids[lost["class"][0]]
    if not (len(lost_images) or len(lost_classes)):
        return None
    families = (
        ("box_image_ids", image_ids, lost_images),
        ("box_class_ids", class_ids, lost_classes),
    )
    scored, via, targets = [], [], []
    for column, ids, lost_ids_ in families:
        refs = cols[column]
        listed = np.isin(refs, ids)
        target = np.full(len(refs), -1, np.int64)
        keys = changed_keys(lost_ids_) if len(lost_ids_) else {}
        unlisted = np.flatnonzero(~listed)
        if keys and len(unlisted):
            at = {key: n for n, key in enumerate(as_typed_keys(lost_ids_))}
            target[unlisted] = [
                at[keys[key]] if key in keys else -1 for key in as_typed_keys(refs[unlisted])
            ]
        changed = target >= 0
        scored.append((listed & ~np.isin(refs, lost_ids_)) | changed)
        via.append(changed)
        targets.append(target)
    hits = scored[0] & scored[1] & (via[0] | via[1])
    if not hits.any():
        return None
    alias = np.zeros(len(hits), np.int8)
    columns = []
    for bit, (column, _, lost_ids_), changed, target in zip(
        (ALIAS_IMAGE, ALIAS_CLASS), families, via, targets
    ):
        changed = changed & hits
        alias[changed] |= bit
        values = cols[column].copy()
        values[changed] = lost_ids_[target[changed]]
        columns.append(values)
    return alias, *columns


def as_typed_keys(ids):
    """Typed keys of a column of ids: as they are, or of int64 ids (a family of whole
    ids some of which the file wrote as ``1.0`` or ``true``, whose types still decide
    what ``np.unique`` loses: ``unique_lost``'s ``by_type``)."""
    ids = np.asarray(ids)
    if ids.dtype == object:
        return ids.tolist()
    return [ids_module.typed_key(int(v)) for v in ids.tolist()]


def changed_value_classes(truth, image, class_keys, found):
    """``(alias, cls)``: per record, whether its class is one the split does not list
    (``~found``) written with the value pycocotools' ``np.unique`` changed a lost
    category's id into (``changed_class_keys``), on an image it looks up
    (``image``: indices; an unlisted image is refused or dropped before): its
    ``getAnnIds`` (``ann['category_id'] in catIds``) and ``_dts[img, catId]`` find it
    under the lost category, whose index ``cls`` gives (``loadRes`` checks no
    category). None where there is none."""
    changed = changed_class_keys(truth)
    unlisted = np.flatnonzero(~found)
    if not changed or not len(unlisted):
        return None
    at = {
        key: n
        for n, key in enumerate(
            as_typed_keys(ids_module.keys_of(truth.class_ids, truth.class_id_type))
        )
    }
    keys = as_typed_keys(class_keys[unlisted])
    target = np.array([at[changed[key]] if key in changed else -1 for key in keys], np.int64)
    lost = truth.unique_lost_masks()
    hit = (target >= 0) & ~lost[0][np.asarray(image, np.int64)[unlisted]]
    if not hit.any():
        return None
    alias = np.zeros(len(found), bool)
    alias[unlisted[hit]] = True
    cls = np.zeros(len(found), np.int64)
    cls[unlisted[hit]] = target[hit]
    return alias, cls


def fetched_by_category(path, cols, listed, id_type, image_ids, lost):
    """Per annotation (file order), whether pycocotools' ``getAnnIds`` keeps it by its
    category: ``ann['category_id'] in catIds``, run as it runs, on the ids as the file
    wrote them (``box_class_id_kinds``) against ``list(np.unique(getCatIds()))``
    (``listed``: the categories as listed, ``(ids, kinds)`` as ``unique_lost`` takes
    them). That list test compares with numpy's ``==``: an unlisted id numpy rounds
    onto a category's value is kept (so a repeated annotation id there makes a copy of
    the last, ``annotation_index.resolve``), and against a boolean array an integer
    numpy cannot convert raises OverflowError: an annotation on a looked-up image
    (``getAnnIds`` tests only those) holding one is refused, naming it. None where
    the test is exact (int64 ids written as integers)."""
    kinds = cols.get("box_class_id_kinds")
    if kinds is None or (not id_type and not listed[1].any() and not kinds.any()):
        return None
    entries = list(np.unique(ids_module.as_written(listed[0], id_type, listed[1])))
    keys = as_typed_keys(cols["box_class_ids"])
    tested, fetched = {}, np.zeros(len(keys), bool)
    back = {ids_module.BOOLEAN: bool, ids_module.WHOLE_FLOAT: float}
    for n, (key, kind) in enumerate(zip(keys, kinds.tolist())):
        if (key, kind) not in tested:
            value = ids_module.key_value(key)
            value = back[kind](value) if kind else value
            try:
                tested[key, kind] = value in entries
            except OverflowError:
                tested[key, kind] = None
        fetched[n] = bool(tested[key, kind])
        if tested[key, kind] is None and _looked_up_image(cols, n, image_ids, lost):
            raise InputError(
                path,
                f"category_id {ids_module.shown(key)}: pycocotools' getAnnIds compares it "
                "with the category ids as numpy holds them (a boolean array here), and "
                "numpy cannot convert it (OverflowError): it raises",
                record=f"annotations[{n}]",
                field="category_id",
            )
    return fetched


def _looked_up_image(cols, n, image_ids, lost):
    image = cols["box_image_ids"][n]
    listed = bool(np.isin([image], image_ids)[0])
    return listed and not np.isin([image], image_ids[lost["image"][0]])[0]


#: What ``getAnnIds``' ``in catIds`` compares a detection's category with where every
#: category id is ``true``/``false`` (``GroundTruth.boolean_class_ids``): numpy's
#: booleans (which of them, or how many, does not decide whether ``==`` raises).
_BOOLEAN_ENTRIES = [np.True_]


def refuse_uncomparable_detections(path, truth, keys, image, locate, field):
    """Refuse a detection of an unlisted category pycocotools 2.0.11 cannot compare:
    where every category id is a boolean (``GroundTruth.boolean_class_ids``), its
    ``_prepare`` runs ``cocoDt.getAnnIds(imgIds, catIds)``, whose ``ann['category_id']
    in catIds`` compares an integer numpy cannot convert (outside signed 64 bits) with
    a boolean array and raises OverflowError, for a detection on any image it looks up
    (not one whose id its ``np.unique`` loses). ``keys``: the detections' class keys
    (``raw_blocks._json_keys``), ``image`` their image indices. The annotations'
    side: ``fetched_by_category``."""
    if not truth.boolean_class_ids or np.asarray(keys).dtype.kind == "i" or not len(keys):
        return
    lost = truth.unique_lost_masks()
    looked_up = np.ones(len(keys), bool) if lost is None else ~lost[0][image]
    tested = {}
    for n in np.flatnonzero(looked_up).tolist():
        key = keys[n]
        if key not in tested:
            value = ids_module.key_value(key) if isinstance(key, str) else int(key)
            try:
                value in _BOOLEAN_ENTRIES  # noqa: B015  pycocotools' own test
                tested[key] = False
            except OverflowError:
                tested[key] = True
        if tested[key]:
            raise InputError(
                path,
                f"category_id {ids_module.shown(key)}: pycocotools' getAnnIds compares the "
                "detections' categories with the category ids as numpy holds them (a "
                "boolean array here: every category id is true or false), and numpy cannot "
                "convert this one (OverflowError): it raises",
                record=locate(n),
                field=field,
            )
