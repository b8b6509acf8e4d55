"""The order in which detections are matched and accumulated.

pycocotools 2.0.11 ranks an image's detections of a class by descending score
(``evaluateImg``: a stable sort, file order on ties) and accumulates a class over
images in ascending id order (``accumulate``); the VOC devkit sorts the whole results
file by descending score (stable). ``orders`` builds both at once for every class,
and pycocotools' own order where it ranks integer scores beyond 2**53 otherwise than
float64 (``loaders.exact_scores``).
"""

import numpy as np


def run_starts(sorted_values):
    """True where a run of equal values begins (length n, also for n = 0)."""
    mask = np.ones(len(sorted_values), bool)
    mask[1:] = sorted_values[1:] != sorted_values[:-1]
    return mask


def _ranks(sorted_group):
    """Position of each element within its run of equal group ids."""
    n = len(sorted_group)
    if not n:
        return np.zeros(0, np.int64)
    starts = np.flatnonzero(run_starts(sorted_group))
    return np.arange(n) - np.repeat(starts, np.diff(np.r_[starts, n]))


def _narrow(values, largest):
    """The smallest integer type for ``values``: numpy sorts 16-bit keys by radix."""
    for dtype in (np.uint16, np.uint32):
        if largest < np.iinfo(dtype).max:
            return values.astype(dtype)
    return values


def orders(predictions, n_classes, tie_order="image", exact=None):
    """Accumulation order, ranks within (image, class) groups, and the order key.

    Accumulation order is (class, score desc, image, file) for ``tie_order="image"``
    — pycocotools ranks detections within an (image, class) by descending score with
    file order on ties, and accumulates a class over images in ascending id order —
    and (class, score desc, file) for ``"file"``, the VOC devkit's stable sort of the
    whole results file. Ranks within an (image, class) are the same under both.

    ``exact``: ``Predictions.score_order``'s ``(index, rank, key)``, pycocotools' own
    order of the classes holding integers beyond 2**53 that it ranks otherwise than
    float64 (``loaders.exact_scores``): there the order is (class, key, image, rank)
    — its ``accumulate``'s stable sort of the images' ranked lists joined in image
    order — and ``rank`` gives the ranks (the order within an image, unless int64
    negation wraps around in ``accumulate``). The key is returned in accumulation
    order, NaN for the other detections, or None without ``exact``.
    """
    image = _narrow(predictions.image, len(predictions.image) and predictions.image.max())
    primary = -predictions.score
    if tie_order == "file":
        by_image = np.arange(len(image))
    elif exact is None:
        by_image = np.argsort(image, kind="stable")
    else:  # ties: pycocotools' rank within the image, file order elsewhere
        within_image = np.arange(len(image))
        within_image[exact[0]] = exact[1]
        by_image = np.lexsort((within_image, image))
        primary[exact[0]] = exact[2]
    by_score = by_image[np.argsort(primary[by_image], kind="stable")]
    cls = _narrow(predictions.cls, n_classes)
    acc = by_score[np.argsort(cls[by_score], kind="stable")]
    within = np.argsort(image[acc], kind="stable")  # (image, class, score, file)
    grouped = acc[within]
    group = predictions.image[grouped].astype(np.int64) * n_classes + predictions.cls[grouped]
    rank = np.empty(len(acc), np.int64)
    rank[within] = _ranks(group)
    if exact is None:
        return acc, rank, None
    theirs = np.full(len(acc), -1, np.int64)
    theirs[exact[0]] = exact[1]
    theirs = theirs[acc]
    rank = np.where(theirs >= 0, theirs, rank)
    key = np.full(len(image), np.nan)
    key[exact[0]] = exact[2]
    return acc, rank, key[acc]
