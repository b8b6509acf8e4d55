"""Ground truth from a file into validated ``GroundTruth`` columns (COCO JSON, CSV,
label folders): ids resolved, image sizes and boxes checked under the box policy, the
annotations pycocotools scores picked (``annotation_index``), areas and attributes
finished. ``loaders.load_truth`` is the entry point (options, cache)."""

import numpy as np

from ..boxes import said_corners
from ..data import GroundTruth
from ..errors import InputError
from . import (
    annotation_index,
    attributes,
    checks,
    coco_json,
    csv_truth,
    id_families,
    label_folders,
    lost_ids,
    repeated_ids,
)
from . import ids as ids_module
from .ids import csv_ids, ids_like


def _shown(values, id_type):
    """Ids as ``GroundTruth`` keeps them: typed keys (object arrays) as display text,
    int64 and CSV text as they are."""
    if values.dtype != object:
        return values
    return ids_module.display(values, id_type)


#: ``box_counts`` key (only where non-zero): the annotations of an unlisted image or
#: category kept under the lost id whose changed value they are written with
#: (``GroundTruth.alias``; ``provenance.changed_value_counts`` says per protocol).
UNDER_CHANGED_VALUE = "annotations_under_changed_value"


def _raise_if_scored(path, bad_rows, rows, n, unread=()):
    """The first annotation with a bad ``bbox`` or ``area`` that is scored (``rows``:
    the source rows scored, None for all ``n``), as an error naming it; one never
    scored (pycocotools never reads it either) is left out with its image or id.
    ``unread``: rows pycocotools never reads either, as their image or category id is
    one its ``np.unique`` loses (``lost_ids.unread_on_lost``)."""
    if not bad_rows:
        return
    scored = set(range(n)) if rows is None else set(rows.tolist())
    hits = sorted(set(bad_rows) & scored - set(unread))
    if hits:
        field, message = bad_rows[hits[0]]
        raise InputError(path, message, record=f"annotations[{hits[0]}]", field=field)


def _all_booleans(kinds):
    """Whether every category id as listed is ``true``/``false`` (``id_kinds``): numpy
    then makes pycocotools' ``catIds`` a boolean array."""
    return bool(len(kinds)) and bool((kinds == ids_module.BOOLEAN).all())


def _cityscale_faults(city_rows, rows):
    """``GroundTruth.cityscale_faults`` from the loader's ``city_rows`` (file row ->
    {field: (message, truthy)}): per field, ``[box, record, message, truthy]`` of the
    annotations kept (``rows``: the source rows kept, None for all), in box order
    (``"ignore_read"``: its message is whether ``int()`` of the truthy value is
    nonzero)."""
    if not city_rows:
        return {}
    if rows is None:
        position = {row: row for row in city_rows}
    else:
        at = np.flatnonzero(np.isin(rows, np.fromiter(city_rows, np.int64)))
        position = {int(rows[i]): int(i) for i in at}
    faults = {}
    for row in sorted(position, key=position.get):
        for field, (message, truthy) in sorted(city_rows[row].items()):
            entry = [position[row], f"annotations[{row}]", message, bool(truthy)]
            faults.setdefault(field, []).append(entry)
    return faults


def read_truth(
    path, images, fmt, classes, policy, ids="any", annotations="reference", vis_ratio="as-given"
):
    entry_counts, bad_rows, city_rows = {}, {}, {}
    listed_keys = {}  # a JSON split's ids as listed (``id_families.order``)
    if fmt == "json":
        cols = coco_json.read_truth(
            path,
            wide=ids == "any",
            loose=annotations != "strict",
            vis_ratio=vis_ratio,
        )
        entry_counts.update(cols.pop("unread_counts"))
        bad_rows = cols.pop("bad_rows")
        city_rows = cols.pop("city_rows")
        image_locate = lambda i: f"images[{i}]"  # noqa: E731
        image_type = id_families.typed_family(
            path, cols, "image_ids", ("box_image_ids", "region_image_ids"), image_locate, "image"
        )
        class_type = id_families.typed_family(
            path, cols, "class_ids", ("box_class_ids",), lambda i: f"categories[{i}]", "category"
        )
        if cols["box_ids"].dtype.kind != "i":  # never sorted: text and numbers may mix
            cols["box_ids"] = ids_module.typed_keys(cols["box_ids"])
        box_locate = lambda i: f"annotations[{i}]"  # noqa: E731
        box_fields = {"image": "image_id", "class": "category_id", "bbox": "bbox", "id": "id"}
        image_path = path
        category_locate = lambda i: f"categories[{i}]"  # noqa: E731
        # getCatIds() is the categories as listed, repeats and all (ids.unique_lost)
        listed_classes = _shown(cols["class_ids"], class_type), cols["class_id_kinds"]
        listed_keys = {"image": cols["image_ids"], "class": cols["class_ids"]}
        if annotations != "strict":  # an image or category listed twice: its last entry
            kept, duplicates = annotation_index.last_entries(cols)
            entry_counts.update(duplicates)
            image_locate = lambda i: f"images[{kept['image'][i]}]"  # noqa: E731
            category_locate = lambda i: f"categories[{kept['category'][i]}]"  # noqa: E731
            shown = _shown(cols["class_ids"], class_type).tolist()  # as the ids are shown
            cols["category_names"] = list(cols["class_names"])  # the rules read these
            cols["class_names"], entry_counts["categories_renamed"] = (
                annotation_index.rename_shared_names(cols["class_names"], shown)
            )
        checks.check_unique(path, cols["class_ids"], category_locate, "id")
        checks.check_unique(
            path,
            np.array(cols["class_names"], dtype=object).astype(str),
            category_locate,
            "name",
            what="name",
        )
        region_locate = lambda i: f"dont_care[{i}]"  # noqa: E731
    elif fmt == "csv":
        image_type = class_type = ""
        cols = csv_truth.csv_truth_columns(path, images, classes)
        image_path = images
        image_locate = lambda i: f"line {cols['image_lines'][i]}"  # noqa: E731
        box_locate = lambda i: f"line {cols['box_lines'][i]}"  # noqa: E731
        box_fields = {"image": "image_id", "class": "label", "bbox": "x_min..y_max", "id": "id"}
        region_locate = lambda i: f"line {cols['region_lines'][i]}"  # noqa: E731
    else:
        image_type = class_type = ""
        cols = label_folders.read_truth(path, images, fmt, classes)
        cols["image_ids"] = csv_ids(cols["image_ids"])
        cols["box_image_ids"] = ids_like(cols["box_image_ids"], cols["image_ids"])
        cols["region_image_ids"] = ids_like(cols["region_image_ids"], cols["image_ids"])
        image_path = cols["image_path"]
        image_locate, box_locate = cols["locate_image"], cols["locate_box"]
        region_locate, box_fields = cols["locate_region"], cols["box_fields"]

    if len(cols["image_ids"]) == 0:
        raise InputError(image_path, "the split lists no images", field="images")
    checks.check_unique(
        image_path, cols["image_ids"], image_locate, "id" if fmt == "json" else "image_id"
    )
    for name in ("image_width", "image_height"):
        values = cols[name]
        field = name.split("_")[1]
        given = ~np.isnan(values)  # absent from the file: NaN (optional in COCO JSON)
        if policy == "keep":  # never read (pycocotools neither): an infinite, zero or
            # negative size is no size (counted as on_images_without_size)
            with checks.ieee():
                values = cols[name] = np.where(np.isinf(values) | (values <= 0), np.nan, values)
            given = ~np.isnan(values)
        checks.fail_at(image_path, given & np.isinf(values), image_locate, field, "must be finite")
        checks.fail_at(
            image_path,
            given & (values <= 0),
            image_locate,
            field,
            lambda i, values=values: f"must be > 0, got {values[i]:g}",
        )
        checks.require_sizes(image_path, values, image_locate, policy, field)
    image_order = id_families.order(cols["image_ids"], image_type, listed_keys.get("image"))
    image_ids = cols["image_ids"][image_order]
    shown = _shown(image_ids, image_type)
    class_order = id_families.order(cols["class_ids"], class_type, listed_keys.get("class"), False)
    class_ids = cols["class_ids"][class_order]
    class_repeats = None
    if class_type:
        class_repeats = id_families.repeated_entries(class_ids, listed_keys.get("class"))
    lost = {}  # what pycocotools' np.unique loses: a COCO JSON file's ids only
    if fmt == "json":
        lost["image"] = lost_ids.unique_lost(shown, image_type, cols["image_id_kinds"][image_order])
        class_shown = _shown(class_ids, class_type)
        class_kinds = cols["class_id_kinds"][class_order]
        lost["class"] = lost_ids.unique_lost(class_shown, class_type, class_kinds, listed_classes)
    annotation_counts = {**dict.fromkeys(annotation_index.COUNTS, 0), **entry_counts}
    rows = repeated = None
    if fmt == "json" and annotations == "strict":
        checks.check_unique(path, cols["box_ids"], box_locate, "id")
    elif fmt == "json":
        aliases = lost_ids.changed_value_refs(path, cols, image_ids, class_ids, lost)
        by_category = lost_ids.fetched_by_category(
            path, cols, listed_classes, class_type, image_ids, lost
        )
        if aliases is not None:  # kept as boxes of the lost entry, marked
            cols["box_alias"], cols["box_image_ids"], cols["box_class_ids"] = aliases
            annotation_counts[UNDER_CHANGED_VALUE] = int((aliases[0] != 0).sum())
        lost_images = image_ids[lost["image"][0]] if len(lost["image"][0]) else None
        rows, resolved, occurrence = annotation_index.resolve(
            cols, image_ids, class_ids, lost_images, by_category, slots=True
        )
        annotation_counts.update(resolved)
        unread = lost_ids.unread_on_lost(cols, bad_rows, rows, image_ids, class_ids, lost)
        _raise_if_scored(path, bad_rows, rows, len(cols["boxes"]), unread)
        if len(unread):  # never read by pycocotools: left out, counted
            kept = np.arange(len(cols["boxes"])) if rows is None else rows
            keep = ~np.isin(kept, unread)
            rows = kept[keep]
            if "box_alias_copies" in cols:  # annotation_index.resolve's, per row
                cols["box_alias_copies"] = cols["box_alias_copies"][keep]
            occurrence = None if occurrence is None else occurrence[keep]
            annotation_counts["unreadable_on_lost_ids"] = len(unread)
        if occurrence is not None:  # a repeated id: the other readings read each as given
            repeated = repeated_ids.readings(
                path,
                cols,
                (rows, occurrence),
                (image_ids, class_ids, image_order),
                bad_rows,
                policy,
                vis_ratio,
            )
        if rows is not None:
            annotation_index.take(cols, rows)
            box_locate = lambda i: f"annotations[{rows[i]}]"  # noqa: E731

    box_image, found = checks.resolve(path, cols["box_image_ids"], image_ids, box_locate, "", "")
    checks.require_found(
        path, found, cols["box_image_ids"], box_locate, box_fields["image"], "image"
    )
    box_class, found = checks.resolve(path, cols["box_class_ids"], class_ids, box_locate, "", "")
    checks.require_found(
        path, found, cols["box_class_ids"], box_locate, box_fields["class"], "class"
    )

    boxes = cols["boxes"]
    checks.check_boxes(path, boxes, box_locate, box_fields["bbox"], policy)
    frame = (cols["image_width"][image_order], cols["image_height"][image_order])
    if policy == "reject":
        for at in range(0, len(boxes), checks.BLOCK_ROWS):  # per block: no full-length
            block = slice(at, at + checks.BLOCK_ROWS)  # per-box width/height copies
            checks.check_inside(
                path,
                boxes[block],
                frame[0][box_image[block]],
                frame[1][box_image[block]],
                lambda i, at=at: box_locate(at + i),
                box_fields["bbox"],
            )
    area = cols["box_area"]
    given = cols.get("box_area_given")
    given = ~np.isnan(area) if given is None else given
    if policy == "reject":  # pycocotools takes a NaN area (in every size range), inf
        checks.fail_at(  # (outside every one) and a negative area (outside too)
            path,
            given & ~np.isfinite(area),
            box_locate,
            "area",
            lambda i: f"must be a finite number, got {area[i]} (box policy: reject)",
        )
        checks.fail_at(
            path,
            given & (area < 0),
            box_locate,
            "area",
            lambda i: f"must be >= 0, got {area[i]:g} (box policy: reject)",
        )
    negative_area = int((given & (area < 0)).sum())
    with checks.ieee():
        area = np.where(given, area, boxes[:, 2] * boxes[:, 3])

    loose = fmt == "json" and annotations != "strict"
    # Read with vis_ratio="unread" (splits frozen before the key was read) a split has
    # neither the column nor the counts: its columns and counts are those it had then.
    counted = vis_ratio != "unread"
    sources = dict.fromkeys(attributes.VISIBILITY_SOURCE_COUNTS, 0)
    road = attributes.finish(
        path,
        cols,
        image_ids,
        box_locate,
        path,
        region_locate,
        annotation_counts if loose else None,
        sources if counted else None,
        as_given=vis_ratio == "as-given",
    )
    height_given = cols.get("height_given")  # the city-scale script's (as-given only)
    height_key = None
    if height_given is not None and height_given.any():
        height_key = np.where(height_given, cols["height_key"], boxes[:, 3])
    names = [cols["class_names"][i] for i in class_order]
    own = cols.get("category_names")
    tags = [cols["image_tags"][i] for i in image_order]
    truth = GroundTruth(
        classes=tuple(names),
        category_names=None if own is None else tuple(own[i] for i in class_order),
        class_ids=_shown(class_ids, class_type),
        image_ids=shown,
        image_width=cols["image_width"][image_order],
        image_height=cols["image_height"][image_order],
        image_tags=tuple(tuple(t) for t in tags),
        box_ids=_shown(cols["box_ids"], "text"),
        box_image=box_image,
        box_class=box_class,
        boxes=boxes,
        # a corner format's corners as read, where one says more than its xywh row
        corners=said_corners(boxes, cols.get("box_corners")),
        box_area=area,
        crowd=cols["crowd"],
        difficult=cols["difficult"],
        ignore=cols["ignore"],
        ignore_key=cols.get("ignore_key"),
        ignore_key_fraction=cols.get("ignore_key_fraction"),
        # COCO JSON's ignore flag is a fractional iscrowd (pycocotools' reading); a CSV
        # ignore column is no iscrowd
        iscrowd_fraction=cols["ignore"] if fmt == "json" else None,
        source=str(path),
        cityscale_faults=_cityscale_faults(city_rows, rows),
        alias=cols["box_alias"] if "box_alias" in cols else None,
        height_key=height_key,
        image_id_type=image_type,
        class_id_type=class_type,
        unique_lost_images=lost.get("image", (None,))[0],
        unique_lost_classes=lost.get("class", (None,))[0],
        unique_lost_by_type=any(by_type for _, by_type, _ in lost.values()),
        unique_merged_images=lost.get("image", (None, None, None))[2],
        class_repeats=class_repeats,
        boolean_class_ids=fmt == "json" and _all_booleans(listed_classes[1]),
        box_policy=policy,
        box_counts={
            **checks.truth_box_counts(boxes, *frame, box_image),
            "area_from_file": int(given.sum()),
            "negative_area_from_file": negative_area,
            "non_finite_area_from_file": int((given & ~np.isfinite(area)).sum()),
            # every format has the count (0 where it cannot occur), so one split written
            # in five formats gives one result
            "iscrowd_outside_0_255": (int(cols["crowd_wide"].sum()) if "crowd_wide" in cols else 0),
            **annotation_counts,
            **(sources if counted else {}),
        },
        **road,
    )
    if repeated is None:
        return truth
    return repeated_ids.merge(truth, *repeated)
