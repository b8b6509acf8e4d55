"""Road attributes of ground truth, checked once for every format.

Per box (NaN where the file gives none): ``occlusion``, an integer level (KITTI: 0
fully visible, 1 partly occluded, 2 largely occluded, 3 unknown; any integer is
read, as the devkit reads it with ``%d``); ``truncation``, a finite number (KITTI:
0 to 1); ``visibility``, the visible fraction, 0 to 1. Per image, don't-care regions:
class-agnostic boxes that no class owns.

In COCO-style JSON the attributes are annotation keys ``occlusion``, ``truncation``,
``visibility`` and the regions a top-level list ``dont_care`` of ``{"image_id",
"bbox"}``; in a boxes CSV they are columns of those names, and a row with
``dont_care`` = 1 is a region (its label is not read).
"""

import numpy as np

from . import checks


def _column(cols, name, n):
    values = cols.get(name)
    return np.full(n, np.nan) if values is None else np.asarray(values, np.float64)


def finish(path, cols, image_ids, box_locate, region_path, region_locate, unread=None):
    """Checked attribute columns and regions resolved to image indices, as
    ``GroundTruth`` keyword arguments. ``cols["region_image_ids"]`` must already be
    typed like ``image_ids``.

    With ``unread`` (a counts dict: COCO JSON read as pycocotools reads it, which never
    looks at these keys) a value that fails a check is left unread instead — NaN, a
    region left out — and counted (``unread_attributes``, ``unread_dont_care``);
    without, it is refused naming the record and the field."""
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
    region_ids = cols.get("region_image_ids")
    regions = np.asarray(cols.get("regions", np.zeros((0, 4))), np.float64).reshape(-1, 4)
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
        "region_image": region_image.astype(np.int32),
        "regions": regions,
    }
