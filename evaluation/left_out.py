"""What the reference reading left out of a split or a predictions file, in words.

Under the platform's default input policy (``services.input_policy``) a file that
pycocotools 2.0.11 accepts is scored as it scores it: annotations of images or
categories the file does not list are never evaluated (``COCOeval._prepare`` walks only
``getImgIds()``/``getCatIds()``), an annotation id given twice resolves to the last
annotation with it and an image or category id listed twice is its last entry
(``COCO.createIndex``), and detections of categories the split does not list are
kept by ``loadRes`` but never looked at by ``evaluate``. Nothing of that is silent:
the split page, the version page, the API and the client show these lines, built
here from the counts the engine stored (``annotations_left_out`` of a split,
``counts`` of a result).
"""

#: How many class ids a line names before it says "and N more".
SHOWN_IDS = 20


def _ids(ids):
    ids = [str(i) for i in ids]
    shown = ", ".join(ids[:SHOWN_IDS])
    more = len(ids) - SHOWN_IDS
    return f"{shown} and {more} more" if more > 0 else shown


def _plural(n, one, many):
    return f"{n} {one if n == 1 else many}"


#: Each count of a split's reading, as (count, what one is, what many are, the rest of
#: its line). Lines follow this order; a zero count makes none.
_ANNOTATION_LINES = (
    ("annotations_of_unlisted_images", "annotation", "annotations",
     "of images the file does not list left out (never scored, as in pycocotools)"),
    ("annotations_of_unlisted_categories", "annotation", "annotations",
     "of categories the file does not list left out (never scored, as in pycocotools)"),
    ("duplicate_id_copies", "annotation", "annotations",
     "with a repeated id scored as a copy of the last annotation with that id (as "
     "pycocotools' index does) under coco, recall40 and miss-rate-cityscale; the other "
     "protocols read each annotation as given"),
    ("duplicate_ids_never_fetched", "annotation", "annotations",
     "with a repeated id on an image or category whose id pycocotools' np.unique changes "
     "left out: it never fetches them, so they make no copy of the last annotation"),
    ("duplicate_image_entries", "entry", "entries",
     "of image ids listed more than once left out: each image is its last entry (as "
     "pycocotools' index keeps it)"),
    ("duplicate_category_entries", "entry", "entries",
     "of category ids listed more than once left out: each category is its last entry "
     "(as pycocotools' index keeps it)"),
    ("unread_image_sizes", "image width or height", "image widths or heights",
     "of a type the field cannot hold left unread (pycocotools never reads them)"),
    ("unread_image_tags", "image tag list", "image tag lists",
     "of a type the field cannot hold left unread (pycocotools never reads them)"),
    ("unread_category_names", "category name", "category names",
     "of a type the field cannot hold left unread (pycocotools never reads them)"),
    ("unread_attributes", "box attribute", "box attributes",
     "(difficult, ignore, occlusion, truncation, visibility) of a type or value the field "
     "cannot hold left unread (pycocotools never reads them)"),
    ("unread_dont_care", "don't-care region", "don't-care regions",
     "that cannot be read left out (pycocotools never reads them)"),
    ("iscrowd_text_or_null", "iscrowd value", "iscrowd values",
     'given as text or null: text int() reads is read as pycocotools reads it ("1" a crowd '
     'region, "0" an ignored box)'),
    ("iscrowd_pycocotools_raises", "iscrowd value", "iscrowd values",
     "of these int() cannot read (null, other text, a list or object) scored all the same "
     '(null, "", [] and {} as regular boxes, the others as ignored regular boxes, as '
     "pycocotools' truthiness reads them), where pycocotools raises on such a box it "
     "scores"),
    ("unreadable_on_lost_ids", "annotation", "annotations",
     "with a bbox or area pycocotools would raise on left out: their image or category "
     "id is one its np.unique changes, so it never reads them"),
    ("annotations_under_changed_value", "annotation", "annotations",
     "of an image or category the file does not list, written with the value "
     "pycocotools' np.unique changes a listed id into: scored under that id by "
     "pycocotools' rules (coco, recall40), left out by the others"),
    ("categories_renamed", "category", "categories",
     'sharing a name named with their ids ("car (id 3)"): per-class numbers are kept by '
     "name"),
)  # fmt: skip


def annotation_lines(counts):
    """Lines for a split's ``annotations_left_out`` (or a result's truth counts): what
    the reference reading left out or read its own way (``_ANNOTATION_LINES``; an empty
    list when nothing)."""
    counts = counts or {}
    lines = []
    for key, one, many, rest in _ANNOTATION_LINES:
        n = int(counts.get(key, 0))
        if n:
            lines.append(f"{_plural(n, one, many)} {rest}")
    return lines


def detection_lines(counts):
    """Lines for a result's ``counts``: detections of classes the split does not list
    (``dropped_predictions``, ``dropped_classes``), images pycocotools' ``np.unique``
    loses (``images_left_out``, from ``engine.provenance.lost_images``), classes its
    category list gives more than once (``classes_repeated``, counted that often in
    every mean) and, for a re-scored file, detections of images the split no longer
    holds."""
    counts = counts or {}
    lines = []
    dropped = int(counts.get("dropped_predictions") or 0)
    if dropped:
        ids = counts.get("dropped_classes")
        named = f": ids {_ids(ids)}" if ids else ""
        lines.append(
            f"{_plural(dropped, 'detection', 'detections')} of classes the split does not "
            f"list {'was' if dropped == 1 else 'were'} left out{named}"
        )
    for what, one, many, family in (
        ("images", "image", "images", "image"),
        ("classes", "class", "classes", "category"),
    ):
        lost = counts.get(f"{what}_left_out") or {}
        n, ids = int(lost.get(what) or 0), lost.get("ids") or []
        if n:
            boxes = int(lost.get("truth_boxes") or 0)
            lines.append(
                f"{_plural(n, one, many)} left out with "
                f"{_plural(boxes, 'ground-truth box', 'ground-truth boxes')} and "
                f"{'its' if n == 1 else 'their'} detections, as in {_reference(lost)} (its "
                f"np.unique of the {family} ids changes {'this id' if n == 1 else 'these ids'}: "
                f"rounded to float64 or a trailing U+0000 cut): ids {_ids(ids)}"
                + (" …" if n > len(ids) else "")
            )
    unreadable = int(
        ((counts.get("boxes") or {}).get("predictions") or {}).get("unreadable_on_lost_ids") or 0
    )
    if unreadable:
        lines.append(
            f"{_plural(unreadable, 'detection', 'detections')} with a score or field "
            "pycocotools would raise on left out: their image or class id is one its "
            "np.unique changes, so it never reads them"
        )
    changed = counts.get("under_changed_value") or {}
    if changed:
        boxes, dets = int(changed.get("truth_boxes") or 0), int(changed.get("detections") or 0)
        lines.append(
            f"{_plural(boxes, 'ground-truth box', 'ground-truth boxes')} and "
            f"{_plural(dets, 'detection', 'detections')} of an image or category the file "
            "does not list, written with the value pycocotools' np.unique changes a listed "
            "id into, "
            + (
                "scored under that id, as in pycocotools"
                if changed.get("scored")
                else "left out, as this protocol's reference leaves out records of unlisted ids"
            )
        )
    copies = counts.get("repeated_ids") or {}
    if copies:
        read = copies.get("read") == "copies"
        n = int(copies.get("copies" if read else "as_given") or 0)
        lines.append(
            f"{_plural(n, 'annotation', 'annotations')} with a repeated id "
            + (
                "scored as a copy of the last annotation with that id, as in pycocotools"
                if read
                else "read as given (this protocol's reference never reads annotation ids), "
                "not as pycocotools' copies of the last annotation with that id"
            )
        )
    repeated = (counts.get("classes_repeated") or {}).get("classes") or {}
    if repeated:
        named = ", ".join(f"{name} ({int(n)} times)" for name, n in sorted(repeated.items()))
        lines.append(
            f"{_plural(len(repeated), 'class', 'classes')} counted more than once in every "
            "mean over classes, as pycocotools counts "
            f"{'it' if len(repeated) == 1 else 'them'} (its np.unique of the category ids "
            f"gives {'it' if len(repeated) == 1 else 'each'} more than one entry): {named}"
        )
    images = int(counts.get("dropped_unknown_images") or 0)
    if images:
        lines.append(
            f"{_plural(images, 'detection', 'detections')} of images the split no longer "
            f"holds {'was' if images == 1 else 'were'} left out"
        )
    return lines


def _reference(lost):
    """The reference a ``*_left_out`` count follows, from its reason (pycocotools, or
    the CityPersons script under ``miss-rate-cityscale``)."""
    script = "CityPersons" in (lost.get("reason") or "")
    return "the CityPersons script" if script else "pycocotools"


def of_split(split):
    """The lines of a stored split (empty when nothing was left out)."""
    return annotation_lines(split.annotations_left_out)


def of_result(result):
    """The lines of a stored result (``Scorecard.result``): its detections left out."""
    return detection_lines((result or {}).get("counts"))
