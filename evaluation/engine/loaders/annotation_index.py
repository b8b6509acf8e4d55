"""Which annotations of a COCO-style ground-truth file are scored, as pycocotools does.

pycocotools 2.0.11 (``COCO.createIndex``, ``COCO.getAnnIds``, ``COCOeval._prepare``;
checked by running it in ``tests/engine/test_annotation_index.py``):

* ``getAnnIds(imgIds=sorted image ids, catIds=sorted category ids)`` walks
  ``imgToAnns`` image by image in ascending id, each image's annotations in file
  order, keeping those whose ``category_id`` is a listed category; an annotation of an
  image or category the file does not list is never scored (it is accepted, not
  refused).
* ``loadAnns`` then looks each id up in ``anns``, a dict filled in file order, so an id
  given twice resolves to the *last* annotation with it: every annotation of that id
  becomes a copy of the last one, placed under the last one's image and category
  (copies of a last annotation whose image or category is not listed are dropped).
  Only the occurrences ``getAnnIds`` fetches make a copy: one on an image whose id
  ``evaluate``'s ``np.unique`` loses, or that its category test does not keep, is
  never fetched, so it makes none (counted: ``duplicate_ids_never_fetched``); one
  under an unlisted category that test keeps makes one (``resolve``).

* ``createIndex`` fills ``imgs[img['id']] = img`` and ``cats[cat['id']] = cat``, so an
  image or a category listed twice is one image or category, its last entry
  (``last_entries``). Names are never read, so two categories may share one: here
  each such class is named ``"<name> (id <id>)"`` (per-class numbers are keyed by name).

``annotations="reference"`` (the default) reproduces this and counts what it did;
``"strict"`` (an option on the platform, whose default is ``reference`` too) refuses
duplicate ids and names and unknown images or categories, naming the record.
"""

import numpy as np

from ..data import ALIAS_COPY
from . import unread_fields

ANNOTATION_POLICIES = ("reference", "strict")
#: What ``resolve`` counts (0 for every other format and under ``strict``).
COUNTS = (
    "annotations_of_unlisted_images",
    "annotations_of_unlisted_categories",
    "duplicate_id_copies",
    "duplicate_ids_never_fetched",
    "duplicate_image_entries",
    "duplicate_category_entries",
    "categories_renamed",
    "unreadable_on_lost_ids",
    *unread_fields.COUNTS,
)
#: The columns of one image / one category in ``coco_truth._Records``.
IMAGE_COLUMNS = ("image_ids", "image_width", "image_height", "image_tags", "image_id_kinds")
CATEGORY_COLUMNS = ("class_ids", "class_names", "class_id_kinds")

#: Per-annotation columns of ``coco_truth._Records.annotations``.
PER_ANNOTATION = (
    "box_ids",
    "box_image_ids",
    "box_class_ids",
    "box_class_id_kinds",
    "boxes",
    "box_area",
    "box_area_given",
    "crowd",
    "crowd_wide",
    "difficult",
    "ignore",
    "ignore_key",
    "ignore_key_fraction",
    "occlusion",
    "truncation",
    "visibility",
    "vis_ratio",
    "vis_ratio_kind",
    "height_key",
    "height_given",
    "box_alias",
)


def _last_of_each_id(ids):
    """For each position, the position of the last annotation with the same id."""
    n = len(ids)
    if n == 0:
        return np.zeros(0, np.int64)
    order = np.argsort(ids, kind="stable")
    ordered = ids[order]
    starts = np.flatnonzero(np.r_[True, ordered[1:] != ordered[:-1]])
    ends = np.r_[starts[1:], n] - 1
    run = np.repeat(np.arange(len(starts)), np.diff(np.r_[starts, n]))
    last = np.empty(n, np.int64)
    last[order] = order[ends[run]]  # stable: the run's last element is the last in file
    return last


def resolve(cols, image_ids, class_ids, lost_images=None, by_category=None, slots=False):
    """Columns of the annotations pycocotools scores, in the order it reads them, and
    the source row of each (for error locations); counts of what changed.

    ``cols`` holds every annotation in file order; ``image_ids``/``class_ids`` the ids
    the file lists, ``image_ids`` in pycocotools' (sorted) order. An occurrence of a
    repeated id makes a copy of the last annotation with it where ``getAnnIds``
    fetches it: on a listed image its ``np.unique`` does not lose (``lost_images``,
    or None), kept by its category test (``by_category``: ``ann['category_id'] in
    catIds`` as ``lost_ids.fetched_by_category`` runs it, which finds some unlisted
    categories and misses some lost ones; None: the listed categories). Returns
    ``(rows, counts)``; ``rows`` is None when nothing changes (no duplicate id, every
    image and category listed), so the common file keeps its order and content
    exactly. With ``slots``, ``(rows, counts, occurrence)``: the annotation whose place
    each row takes (``repeated_ids.merge`` orders the annotations as given by it).

    An annotation written with the value ``np.unique`` changed a lost id into
    (``cols["box_alias"]``, ``lost_ids.changed_value_refs``: its ids already the lost
    entry's) is fetched under that value; a repeated id on it makes a copy of the last
    annotation, which only pycocotools' reading has (bit ``ALIAS_COPY``: the others
    read it as an annotation of an unlisted id), and a copy of it keeps its bits.
    """
    box_images, box_classes = cols["box_image_ids"], cols["box_class_ids"]
    known_image = np.isin(box_images, image_ids)
    known_class = np.isin(box_classes, class_ids)
    selected = known_image & known_class
    last = _last_of_each_id(cols["box_ids"])
    copies = last != np.arange(len(last))
    never = extra = np.zeros(len(last), bool)
    alias = cols.get("box_alias")
    if copies.any() and (lost_images is not None or by_category is not None):
        fetched = known_image & (known_class if by_category is None else by_category)
        if lost_images is not None:
            fetched &= ~np.isin(box_images, lost_images)
        if alias is not None:  # imgToAnns[C], ``C in catIds``: fetched
            fetched |= alias != 0
        never = selected & copies & ~fetched
        selected = selected & ~never  # not fetched: no copy of the last is made
        extra = fetched & copies & ~known_class  # an unlisted category numpy's == finds
        extra &= selected[last]  # the copy lands where its last annotation points
    counts = {
        "annotations_of_unlisted_images": int((~known_image).sum()),
        "annotations_of_unlisted_categories": int((known_image & ~known_class).sum()),
        "duplicate_id_copies": int((selected & copies).sum() + extra.sum()),
        "duplicate_ids_never_fetched": int(never.sum()),
    }
    if selected.all() and not copies.any():
        return (None, counts, None) if slots else (None, counts)
    picked = np.flatnonzero(selected | extra)
    # imgToAnns in ascending image id (the rank in ``image_ids``: typed keys do not
    # sort as the ids do), file order within an image
    by_key = np.argsort(image_ids, kind="stable")
    rank = by_key[np.searchsorted(image_ids[by_key], box_images[picked])]
    picked = picked[np.argsort(rank, kind="stable")]
    rows = last[picked]
    landed = selected[rows]  # a copy lands where its last annotation points
    if alias is not None:  # the copies only an alias occurrence makes
        made = (alias[picked] != 0) & (alias[rows] == 0)
        cols["box_alias_copies"] = made[landed]
    if slots:
        return rows[landed], counts, picked[landed]
    return rows[landed], counts


def last_entries(cols):
    """Keep the last entry of each image id and each category id, as pycocotools'
    index does; returns the kept rows of each (``images``, ``categories``: for error
    locations) and the counts of entries dropped."""
    kept, counts = {}, {}
    for what, names in (("image", IMAGE_COLUMNS), ("category", CATEGORY_COLUMNS)):
        n = len(cols[names[0]])
        last = _last_of_each_id(cols[names[0]])
        rows = np.flatnonzero(last == np.arange(n))
        counts[f"duplicate_{what}_entries"] = n - len(rows)
        kinds = names[-1]  # how each id was written (``ids.id_kinds``)
        if len(rows) < n and cols[kinds].any():
            # the dict keeps the key as first written (``true``, then ``1``: ``true``)
            first = np.full(n, n, np.int64)
            np.minimum.at(first, last, np.arange(n))
            cols[kinds] = cols[kinds][first[last]]
        if len(rows) < n:
            for name in names:
                values = cols[name]
                cols[name] = (
                    values[rows] if isinstance(values, np.ndarray) else [values[i] for i in rows]
                )
        kept[what] = rows
    return kept, counts


def rename_shared_names(names, shown_ids):
    """Class names with each name two categories share made ``"<name> (id <id>)"``,
    again until no two are alike (a renamed one may meet a name the file gives, which is
    then renamed too); and how many were renamed."""
    names = list(names)
    renamed = [False] * len(names)
    for _ in range(len(names)):  # each pass renames at least one name, or stops
        seen = {}
        for name in names:
            seen[name] = seen.get(name, 0) + 1
        shared = [i for i, name in enumerate(names) if seen[name] > 1]
        if not shared:
            break
        for i in shared:
            names[i] = f"{names[i]} (id {shown_ids[i]})"
            renamed[i] = True
    return names, sum(renamed)


def take(cols, rows):
    """``cols`` with every per-annotation column reduced to ``rows`` (``resolve``'s:
    a copy only an alias occurrence makes gets ``ALIAS_COPY``)."""
    for name in PER_ANNOTATION:
        if name not in cols:  # ``box_alias``: only where some annotation is one
            continue
        values = cols[name]
        cols[name] = values[rows] if isinstance(values, np.ndarray) else [values[i] for i in rows]
    made = cols.pop("box_alias_copies", None)
    if made is not None and made.any():
        cols["box_alias"][made] |= ALIAS_COPY
    return cols
