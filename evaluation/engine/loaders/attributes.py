"""Road attributes of ground truth, checked once for every format.

Per box (NaN where the file gives none): ``occlusion``, an integer level (KITTI: 0
fully visible, 1 partly occluded, 2 largely occluded, 3 unknown; any integer is
read, as the devkit reads it with ``%d``); ``truncation``, a finite number (KITTI:
0 to 1); ``visibility``, the visible fraction, 0 to 1. Per image, don't-care regions:
class-agnostic boxes that no class owns.

In COCO-style JSON the attributes are annotation keys ``occlusion``, ``truncation``,
``visibility`` and the regions a top-level list ``dont_care`` of ``{"image_id",
"bbox"}``. Read with ``vis_ratio="read"`` (``load_truth``'s default), an annotation's
``vis_ratio`` key (the city-scale benchmark's name, read by its ``eval_MR_multisetup.py``
``_prepare``) is the visibility of a box without a readable ``visibility``: where
both are given ``visibility`` wins (counted as ``vis_ratio_beside_visibility``), and
each ``vis_ratio`` read is counted (``visibility_from_vis_ratio``). A ``vis_ratio``
outside 0-1 or of another type is treated as a ``visibility`` would be.

Read with ``vis_ratio="as-given"`` (``load_truth``'s default since engine 2.14.0) the
``visibility`` column is the one ``"read"`` gives (the key the toolbox, Caltech and
KITTI readings take, so their numbers do not change), and ``GroundTruth.vis_ratio``
holds the city-scale script's value per box for ``miss-rate-cityscale``: the
annotation's ``vis_ratio`` exactly as given (any number, NaN and infinities too, or a
boolean as 0/1; null or text refused upstream) wherever the key is present — beside a
``visibility`` too, as the script never reads that key — else the ``visibility``,
else 1.0. Counted: ``visibility_from_vis_ratio`` boxes took their ``vis_ratio``,
``vis_ratio_beside_visibility`` of them overrode a readable ``visibility``; a
``vis_ratio`` is never left unread (nor refused under ``annotations="strict"``).

In a boxes CSV they are columns of those names, and a row with ``dont_care`` = 1 is a
region (its label is not read).
"""

import numpy as np

from ..boxes import said_corners
from . import checks


def _column(cols, name, n):
    values = cols.get(name)
    return np.full(n, np.nan) if values is None else np.asarray(values, np.float64)


#: Where the visibility came from, in ``GroundTruth.box_counts`` of a split read with
#: ``vis_ratio="read"`` or ``"as-given"`` (every format; 0 where the key cannot occur).
VISIBILITY_SOURCE_COUNTS = ("visibility_from_vis_ratio", "vis_ratio_beside_visibility")


def finish(
    path,
    cols,
    image_ids,
    box_locate,
    region_path,
    region_locate,
    unread=None,
    sources=None,
    as_given=False,
):
    """Checked attribute columns and regions resolved to image indices, as
    ``GroundTruth`` keyword arguments. ``cols["region_image_ids"]`` must already be
    typed like ``image_ids``.

    With ``unread`` (a counts dict: COCO JSON read as pycocotools reads it, which never
    looks at these keys) a value that fails a check is left unread instead — NaN, a
    region left out — and counted (``unread_attributes``, ``unread_dont_care``);
    without, it is refused naming the record and the field. ``cols["vis_ratio"]``
    (optional) fills the visibility where it is NaN after its checks; ``sources`` (a
    counts dict, optional) gets ``VISIBILITY_SOURCE_COUNTS``. With ``as_given``
    (``cols["vis_ratio_kind"]``: 0 absent, 1 number, 2 boolean) the result's
    ``vis_ratio`` is the city-scale script's column (module docstring), else None."""
    n = len(cols["boxes"])
    occlusion = _column(cols, "occlusion", n)
    truncation = _column(cols, "truncation", n)
    visibility = _column(cols, "visibility", n)

    def bad(values, mask, field, message):
        if unread is None:
            checks.fail_at(path, mask, box_locate, field, message)
            return values
        unread["unread_attributes"] += int(mask.sum())
        return np.where(mask, np.nan, values)

    given = ~np.isnan(occlusion)
    occlusion = bad(
        occlusion,
        given & ~np.isfinite(occlusion),
        "occlusion",
        "must be a finite integer level",
    )
    given = ~np.isnan(occlusion)
    occlusion = bad(
        occlusion,
        given & (occlusion != np.round(occlusion)),
        "occlusion",
        lambda i: f"must be an integer level (0 fully visible to 3 unknown), got {occlusion[i]:g}",
    )
    truncation = bad(truncation, np.isinf(truncation), "truncation", "must be a finite number")
    visibility = bad(
        visibility,
        ~np.isnan(visibility) & ~((visibility >= 0) & (visibility <= 1)),
        "visibility",
        lambda i: f"the visible fraction lies within 0-1, got {visibility[i]:g}",
    )
    vis_ratio = _column(cols, "vis_ratio", n)
    script = None
    if as_given:
        kind = np.asarray(cols.get("vis_ratio_kind", np.zeros(n, np.int8)))
        given = kind > 0
        script = np.where(given, vis_ratio, np.where(np.isnan(visibility), 1.0, visibility))
        # the "read" column for the other readings: a number within 0-1, unread silently
        with checks.ieee():
            usable = (kind == 1) & (vis_ratio >= 0) & (vis_ratio <= 1)
        fallback = np.where(usable, vis_ratio, np.nan)
        if sources is not None:
            sources["visibility_from_vis_ratio"] = int(given.sum())
            sources["vis_ratio_beside_visibility"] = int((given & ~np.isnan(visibility)).sum())
    else:
        fallback = bad(
            vis_ratio,
            ~np.isnan(vis_ratio) & ~((vis_ratio >= 0) & (vis_ratio <= 1)),
            "vis_ratio",
            lambda i: f"the visible fraction lies within 0-1, got {vis_ratio[i]:g}",
        )
        if sources is not None:
            sources["visibility_from_vis_ratio"] = int(
                (np.isnan(visibility) & ~np.isnan(fallback)).sum()
            )
            sources["vis_ratio_beside_visibility"] = int(
                (~np.isnan(visibility) & ~np.isnan(fallback)).sum()
            )
    from_ratio = np.isnan(visibility) & ~np.isnan(fallback)
    if from_ratio.any():
        visibility = np.where(from_ratio, fallback, visibility)
    region_ids = cols.get("region_image_ids")
    regions = np.asarray(cols.get("regions", np.zeros((0, 4))), np.float64).reshape(-1, 4)
    corners = cols.get("region_corners")  # a corner format's, as read
    if region_ids is None or len(regions) == 0:
        region_image = np.zeros(0, np.int32)
    else:
        region_image, found = checks.resolve(
            region_path, region_ids, image_ids, region_locate, "", ""
        )
        finite = np.isfinite(regions).all(axis=1)
        sized = (regions[:, 2] >= 0) & (regions[:, 3] >= 0)
        if unread is not None:
            keep = found & finite & sized
            unread["unread_dont_care"] += int((~keep).sum())
            region_image, regions = region_image[keep], regions[keep]
            corners = None if corners is None else corners[keep]
        else:
            checks.require_found(region_path, found, region_ids, region_locate, "image_id", "image")
            checks.check_finite(region_path, regions, region_locate, "bbox")
            checks.fail_at(
                region_path,
                ~sized,
                region_locate,
                "bbox",
                lambda i: f"a region's width and height must be >= 0, got {regions[i].tolist()}",
            )
    return {
        "occlusion": occlusion,
        "truncation": truncation,
        "visibility": visibility,
        "vis_ratio": script,
        "region_image": region_image.astype(np.int32),
        "regions": regions,
        "region_corners": said_corners(regions, corners),
    }
