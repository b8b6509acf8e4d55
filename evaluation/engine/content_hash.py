"""A split's identity: ``GroundTruth.content_hash`` and the id kinds it marks.

The canonical form a split is hashed in (``content_hash``), the hash schemes, the
id kinds a ``typed`` hash starts with, and the image part a shard slice shares with its
split (``share_images_digest``). ``GroundTruth`` delegates its methods here.
"""

import hashlib
import json

import numpy as np

from .data import ATTRIBUTES, REPEATED_GIVEN

#: How ``GroundTruth.content_hash`` is taken, newest first: ``corners`` (engine 2.23.0
#: on) adds a corner format's corners as read where one says more than its xywh row
#: (``GroundTruth.corners``: voc, voc07 and kitti2d measure overlap on them), so a split
#: frozen before, under ``repeats``, keeps its hash; ``repeats`` (engine 2.22.0 on) adds
#: the annotations of a repeated id as given (``REPEATED_GIVEN``: the VOC,
#: KITTI and toolbox readings score them) and the column saying which rows those are,
#: so a split frozen before, under ``heights``, keeps its hash; ``heights`` (engine
#: 2.18.2 on) adds the city-scale ``height`` keys where one differs from its box's h
#: (read by ``miss-rate-cityscale`` since then), so a split frozen before, under
#: ``named``, keeps the hash its files verify against; ``named`` (engine 2.17.6 on)
#: adds the categories' own names where one is shown otherwise (shared names shown as
#: ``car (id 1)``), so a file naming its categories so literally hashes apart; ``typed``
#: (engine 2.15.0 on) hashes the kind of a text id family, so ids that match different
#: predictions hash apart; ``untyped`` is the hash before (ids by their text only). The
#: older two are kept to verify splits frozen under them. Each hashes a split as the
#: one after it does unless the split holds what the newer one adds.
HASH_SCHEMES = ("corners", "repeats", "heights", "named", "typed", "untyped")
#: Id kinds (``id_kind``) a ``typed`` hash leaves out: so numeric splits keep their hash.
NUMERIC_ID_KINDS = ("int", "number")


def id_kind(ids, id_type):
    """What predictions an id family matches (``loaders.raw_blocks._json_keys``):
    ``"int"`` (int64 ids), ``"number"``, ``"text"`` or ``"json"`` (COCO JSON families,
    ``loaders.ids``) or ``"plain"`` (CSV or file-name text: matched as text, whatever a
    JSON result's id type)."""
    if id_type:
        return id_type
    return "int" if ids.dtype.kind in "iu" else "plain"


def _canonical_nan(values):
    """One NaN bit pattern, so equal content hashes equal whatever NaN a file made."""
    values = np.asarray(values, "<f8")
    return np.where(np.isnan(values), np.nan, values)


def content_hash(truth, scheme="corners"):
    """SHA-256 of the canonical content: identical splits hash identically.

    Canonical form: images in id order with sizes and sorted tags, classes in
    order, boxes sorted by (image, class, x, y, w, h, flags, area) — so the
    order of records in the source file does not change the hash. Only a split
    with road attributes or don't-care regions adds them (the box columns gain
    occlusion, truncation and visibility; the sorted regions follow), so a split
    without them keeps the hash it was frozen with. The city-scale ``vis_ratio``
    column is added only where it says more than the visibility
    (``_vis_ratio_says_more``); under the ``heights`` scheme (and ``repeats``) the
    city-scale ``height_key`` (an annotation's ``height``) only where it differs from
    the box's h (``_height_says_more``; marked after the boxes). A height the script
    cannot compare (refused where it reads it, ``cityscale_faults["height"]``) is not
    hashed: a split frozen with one keeps its hash, and every protocol other than
    ``miss-rate-cityscale`` scores it as before.

    Ids are hashed as their text. Under the ``typed`` scheme (``HASH_SCHEMES``) a
    split whose image or class ids are not numbers (``id_kind``: JSON text,
    JSON-quoted text, CSV or file-name text) first hashes the two families' kinds,
    so the image id ``1`` and the text ``"1"`` — which match different detections
    (pycocotools' ``loadRes`` refuses a result whose ``image_id`` has the other
    type) — hash apart; a split of numeric ids hashes as before (no mark).
    ``untyped`` leaves the kinds out: the hash of splits frozen before.

    Under the ``named`` scheme (and ``heights``, ``repeats``) a split where a category's
    shown name (``classes``) is not its own (``category_names``: categories sharing a
    name) then hashes the own names, so two ``car`` categories and a file naming them
    ``car (id 1)``, ``car (id 2)`` — which the rules naming classes score apart — hash apart;
    a split whose names are all its own hashes as under ``typed``.

    Under the ``repeats`` scheme (the default) a split holding annotations of a
    repeated id as given (``GroundTruth.repeated == REPEATED_GIVEN``, read by voc,
    voc07, kitti2d, miss-rate and miss-rate-caltech; ``loaders.repeated_ids``) hashes
    those rows too, with the ``repeated`` column (0 / ``REPEATED_COPY`` /
    ``REPEATED_GIVEN``) and its mark, so two files differing only in an annotation a
    later one with its id replaces hash apart; the older schemes leave those rows out
    (``_hashed_boxes``), as every engine before 2.21.0 held them. A split without such
    rows hashes as under ``heights``.

    Under the ``corners`` scheme (the default) a split whose corners as read say more
    than its xywh rows (``GroundTruth.corners``: some ``x1 + w`` or ``y1 + h`` misses
    the ``x2``, ``y2`` a VOC XML, CSV or KITTI file gives, which voc, voc07 and kitti2d
    read) hashes the corners too, after the other columns, with the mark
    ``\x00corners``, so it hashes apart from its xywh twin (the COCO JSON a converter
    writes, ``w = x2 - x1``), which those protocols can score otherwise at an
    exactly-at-threshold overlap. A split without such corners hashes as under
    ``repeats``.
    """
    if scheme not in HASH_SCHEMES:
        raise ValueError(f"unknown hash scheme {scheme!r}; use {', '.join(HASH_SCHEMES)}")
    form = _form(truth, scheme)
    # one value per distinct form: a scheme adding nothing to this split shares it
    newest = _form(truth, HASH_SCHEMES[0])
    name = "_content_hash" if form == newest else f"_{scheme}_hash"
    cached = truth.__dict__.get(name)
    if cached is not None:  # frozen: computed once (the loaders and annotate ask)
        return cached
    mark, heights, given, corners = form
    hashed = truth if given else _hashed_boxes(truth)
    value = _hash(hashed, mark, heights, given, corners)
    object.__setattr__(truth, name, value)
    return value


def _form(truth, scheme):
    """What ``scheme``'s hash of ``truth`` holds beyond the boxes every scheme hashes:
    its mark (``_mark``), its height keys (``_hashes_heights``), its rows as given
    (``_hashes_given``), its corners as read (``_hashes_corners``)."""
    return (
        _mark(truth, scheme),
        _hashes_heights(truth, scheme),
        _hashes_given(truth, scheme),
        _hashes_corners(truth, scheme),
    )


def _hashes_corners(truth, scheme):
    """Whether ``scheme``'s hash of ``truth`` holds its corners as read: ``corners``
    only, and only where they say more than its xywh rows (``GroundTruth.corners``)."""
    return scheme == "corners" and truth._corners_say_more()


def _given(truth):
    """Per box, whether it is an annotation of a repeated id as given (None: none is)."""
    if truth.repeated is None or not (given := truth.repeated == REPEATED_GIVEN).any():
        return None
    return given


def _hashes_given(truth, scheme):
    """Whether ``scheme``'s hash of ``truth`` holds its rows as given (``REPEATED_GIVEN``)
    and its ``repeated`` column: ``repeats`` and ``corners``, only where it has such rows."""
    return scheme in ("corners", "repeats") and _given(truth) is not None


def _hashed_boxes(truth):
    """``truth`` without the annotations of a repeated id as given
    (``GroundTruth.repeated``: ``REPEATED_GIVEN``, read by the readings that never
    read ids): what every engine before 2.21.0 held, so a split frozen under a scheme
    before ``repeats`` keeps its hash (those schemes hash two files differing only in
    an annotation a later one with its id replaces alike, though the VOC, KITTI and
    toolbox readings score them apart: ``repeats`` hashes them apart)."""
    given = _given(truth)
    if given is None:
        return truth
    from .shards import keep_boxes

    kept = keep_boxes(truth, np.flatnonzero(~given))
    object.__setattr__(kept, "repeated", None)
    truth.share_images_digest(kept)
    return kept


def _mark(truth, scheme):
    """The bytes ``scheme``'s hash starts with (``_id_mark``, then ``_names_mark``)."""
    if scheme == "untyped":
        return b""
    named = scheme in ("corners", "repeats", "heights", "named")
    return _id_mark(truth) + (_names_mark(truth) if named else b"")


def _hashes_heights(truth, scheme):
    """Whether ``scheme``'s hash of ``truth`` holds its ``height`` keys: ``heights`` and
    ``repeats`` only, and only where one differs from its box's h (``_height_says_more``)."""
    return scheme in ("corners", "repeats", "heights") and truth._height_says_more()


def id_kinds(truth):
    """``{"image": kind, "class": kind}`` of the two id families (``id_kind``)."""
    return {
        "image": id_kind(truth.image_ids, truth.image_id_type),
        "class": id_kind(truth.class_ids, truth.class_id_type),
    }


def _id_mark(truth):
    """The bytes a ``typed`` hash starts with: empty for numeric ids; else the kinds
    of both id families. An ``untyped`` hash starts with ``[`` (a list's repr), so
    no marked content hashes as unmarked content."""
    kinds = id_kinds(truth)
    if all(kind in NUMERIC_ID_KINDS for kind in kinds.values()):
        return b""
    return b"\x00id kinds " + json.dumps(kinds, sort_keys=True).encode() + b"\n"


def _names_mark(truth):
    """The bytes a ``named`` hash adds after the id mark: empty where every category's
    shown name is its own; else the own names in class order (``ascii``: surrogates
    too). An ``_id_mark`` starts ``\\x00i`` and ends with a newline its JSON never
    holds, this one starts ``\\x00o``, unmarked content ``[``: no two run together."""
    if tuple(truth.category_names) == tuple(truth.classes):
        return b""
    return b"\x00own names " + ascii(list(truth.category_names)).encode() + b"\n"


def _hash(truth, mark, heights, given=False, corners=False):
    attributes = truth.has_attributes()
    digest = _image_digest(truth, mark)
    columns = np.column_stack(
        [
            truth.box_image.astype("<f8"),
            truth.box_class.astype("<f8"),
            truth.boxes.astype("<f8"),
            truth.crowd.astype("<f8"),
            truth.difficult.astype("<f8"),
            truth.ignore.astype("<f8"),
            truth.box_area.astype("<f8"),
        ]
        + ([_canonical_nan(getattr(truth, a)) for a in ATTRIBUTES] if attributes else [])
        + ([truth.ignore_key.astype("<f8")] if truth.ignore_key.any() else [])
        + ([truth.ignore_key_fraction.astype("<f8")] if truth.ignore_key_fraction.any() else [])
        + ([_canonical_nan(truth.vis_ratio)] if _vis_ratio_hashed(truth, given) else [])
        + ([column] if (column := _faults_column(truth)).any() else [])
        + ([_canonical_nan(truth.height_key)] if heights else [])
        + ([truth.alias.astype("<f8")] if (alias := truth.alias is not None) else [])
        + ([truth.repeated.astype("<f8")] if given else [])
        + ([_canonical_nan(truth.corners)] if corners and truth.corners is not None else [])
    )
    order = np.lexsort(columns.T[::-1])
    digest.update(np.ascontiguousarray(columns[order]).tobytes())
    if heights:  # told apart from a split whose other optional column holds the values
        digest.update(b"height_key")
    if alias:  # boxes under a changed value (``GroundTruth.alias``): no split had one
        digest.update(b"changed_value_alias")
    if given:  # rows as given and copies (``repeats``): no split hashed before had them
        digest.update(b"\x00repeated_given")
    if corners and truth.corners is not None:  # as read (``corners``): none hashed before
        digest.update(b"\x00corners")
    if attributes:
        regions = np.column_stack([truth.region_image.astype("<f8"), truth.regions])
        region_corners = corners and truth.region_corners is not None
        if region_corners:
            regions = np.column_stack([regions, _canonical_nan(truth.region_corners)])
            digest.update(b"\x00region_corners")
        regions = regions[np.lexsort(regions.T[::-1])]
        digest.update(b"dont_care")
        digest.update(np.ascontiguousarray(regions, "<f8").tobytes())
    repeats = _counted_repeats(truth)
    if repeats is not None:  # a mark no column or region run ends with
        digest.update(b"\x00class_repeats" + repeats.astype("<i8").tobytes())
    return digest.hexdigest()


def _vis_ratio_hashed(truth, given):
    """Whether the ``vis_ratio`` column is hashed: where it says more than the visibility
    on the rows pycocotools reads (the CityPersons script's, the only reader of the key:
    a row as given holds NaN there, unread, so ``repeats`` decides as ``heights`` does)."""
    return (_hashed_boxes(truth) if given else truth)._vis_ratio_says_more()


def _faults_column(truth):
    """Per box, what ``cityscale_faults`` changes in the numbers where a split is
    scored (the hash's column, added only where non-zero): 1 a ``vis_ratio`` the
    script cannot compare (refused on reading before engine 2.15.8: no split holds
    one), 4 an ``ignore`` read as truthy text, an array or an object (unread, 0,
    before), 8 that one's ``int()`` nonzero. An ``ignore`` only ``int()`` raises on
    (NaN, null) scores as before where accepted: not hashed, so a split frozen with
    one keeps its hash."""
    column = np.zeros(truth.n_boxes, "<f8")
    for name, bit in (("vis_ratio", 1), ("ignore_read", 4)):
        for entry in truth.cityscale_faults.get(name, ()):
            column[entry[0]] += bit + (8 if name == "ignore_read" and entry[2] else 0)
    return column


def _image_digest(truth, mark=b""):
    """``content_hash``'s SHA-256 state after its id mark (``_id_mark``) and its
    class and image part (classes, image ids, sizes, sorted tags). The bytes of that
    part are built once per ``_images_cell`` (a Python object per image: the costly
    part) and kept as bytes (picklable), then hashed for each truth sharing them."""
    cell = _images_cell(truth)
    if not cell:
        cell.append(repr(list(zip(truth.class_ids.tolist(), truth.classes))).encode())
        cell.append(repr([str(i) for i in truth.image_ids]).encode())
        cell.append(np.ascontiguousarray(truth.image_width, "<f8").tobytes())
        cell.append(np.ascontiguousarray(truth.image_height, "<f8").tobytes())
        cell.append(repr([sorted(t) for t in truth.image_tags]).encode())
        if truth.unique_lost_by_type:  # else the ids as hashed decide them
            lost = (truth.unique_lost_images, [-1], truth.unique_lost_classes)
            cell.append(b"unique_lost" + np.concatenate(lost).astype("<i8").tobytes())
    digest = hashlib.sha256(mark)
    for part in cell:
        digest.update(part)
    return digest


def _counted_repeats(truth):
    """``GroundTruth.class_repeats`` where it can move a number: some class given more
    than one entry has a box of falsy ``iscrowd`` (without one pycocotools' ``_prepare``
    ignores all its boxes and every entry is -1). Splits of that kind were refused
    before engine 2.19.1, so every split frozen before keeps its hash. Else None."""
    repeats = truth.class_repeats
    if repeats is None:
        return None
    # pycocotools' rows: an annotation as given (``repeats``' hash holds them) is not one
    read = ~(truth.crowd | truth.ignore)
    if (given := _given(truth)) is not None:
        read &= ~given
    regular = np.unique(truth.box_class[read])
    return repeats if (repeats[regular] > 1).any() else None


def _images_cell(truth):
    cell = truth.__dict__.get("_images_digest")
    if cell is None:
        cell = []
        object.__setattr__(truth, "_images_digest", cell)
    return cell


def share_images_digest(truth, other):
    """Let ``other`` — a truth holding this one's very class and image columns (the
    same objects, as ``shards.truth_slice`` makes) — reuse the class and image part
    of this truth's ``content_hash`` instead of hashing every image again: a split
    cut into N shard slices hashes its images once, not N times; same digest. Any
    other ``other`` is left to hash its own (returns False)."""
    names = ("class_ids", "classes", "image_ids", "image_width", "image_height", "image_tags")
    names += ("unique_lost_images", "unique_lost_classes", "unique_lost_by_type")
    if any(getattr(other, name) is not getattr(truth, name) for name in names):
        return False
    object.__setattr__(other, "_images_digest", _images_cell(truth))
    return True
