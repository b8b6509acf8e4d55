"""Scores written as JSON booleans, where the CityPersons script cannot sort them
(``miss-rate-cityscale``).

The script (``eval_MR_multisetup.py``, as ``eval_demo.py`` drives it: ``evaluate``,
``accumulate``, ``summarize`` for the setups 0..3 in turn) makes pycocotools' calls with
its own cap and a height filter. ``evaluateImg``, per category and image, returns None
when the image has neither an annotation nor a detection of the category; else it ranks
the detections (``np.argsort([-d['score'] ...], kind='mergesort')``), keeps the first
``maxDet`` (1,000), *then* drops those outside the setup's expanded height range
(``hRng[0] / 1.25 <= height < hRng[1] * 1.25``; ``height`` is ``bbox[3]``, set by
``loadRes``), and only then builds ``dtScores`` from what is left. ``accumulate`` reads
category id 1 alone (``catIds = [1]``) and runs ``dtScores = np.concatenate([e['dtScores']
[0:maxDet] for e in E])`` then ``np.argsort(-dtScores, kind='mergesort')``, with ``E``
the images not None. Each list converts on its own (an empty one is float64), so the
joined array is boolean — and numpy's ``-`` raises TypeError — exactly when, in that
setup, every image of ``E`` keeps a detection and keeps booleans alone. The script
stops at the first setup where that happens (after that setup's ``evaluate``: the
ground-truth values it raises on, ``cityscale_raises``, come first).

How the project's inputs map (``pedestrian_setups``): ``E`` holds every image with a
box of the class, of a neighbouring label, or a don't-care region (category-1
annotations of the script), and every image with a detection of the class. The cap is
decided in the script's exact order (Python values, ``exact_scores._values``) wherever
an image has more than 1,000 detections; below it the order does not matter (the kept
set is every detection). ``refusal`` decides on the whole file when it is read, so a
sharded run refuses as the whole one; ``cityscale_raises.check`` raises the entry at its
setup (``Predictions.cityscale_booleans``). Checked against the transliteration
``pedestrian_oracle.cityscale_script`` (``tests/engine/test_cityscale_booleans.py``).
"""

import numpy as np

from ..pedestrian_setups import (
    CITYSCALE_SETUPS,
    HEIGHT_EXPANSION,
    MISS_RATE_CITYSCALE,
    neighbours_of,
)
from . import exact_scores

#: The key of the refusal in ``Predictions.score_conflicts``.
KEY = "cityscale_booleans"


def refusal(path, truth, rows, big, classes):
    """``{"setup", "path", "record", "field", "message"}``: the first setup (the
    script's order) where it joins booleans alone for one of ``classes`` (category id
    1, ``Tops.cityscale_candidates``), or None. ``rows``, ``big``:
    ``exact_scores._affected`` of (at least) those classes."""
    for k in np.asarray(classes).tolist():
        found = _first_setup(truth, {n: v[rows["cls"] == k] for n, v in rows.items()}, big, k)
        if found is not None:
            setup, record, value = found
            return _entry(path, truth, k, setup, record, value)
    return None


def _in_e(truth, k, image):
    """Per image of the split, whether ``evaluateImg`` of the class is not None (never
    for an image whose id ``np.unique`` loses, ``GroundTruth.looked_up``, unless boxes
    written with the value numpy changed its id into are found there: ``_gts[C, 1]``,
    ``GroundTruth.alias``)."""
    part = np.isin(truth.box_class, [k] + neighbours_of(truth, MISS_RATE_CITYSCALE, k))
    left_out = truth.left_out_boxes(True)  # a lost entry's own boxes: not in _gts
    out = np.zeros(truth.n_images, bool)
    out[truth.region_image] = True
    out[image] = True
    out &= truth.looked_up(np.arange(truth.n_images), np.full(truth.n_images, k))
    out[truth.box_image[part if left_out is None else part & ~left_out]] = True
    return out


def _first_setup(truth, rows, big, k):
    """``(setup name, record, value)`` of the first setup whose joined list is boolean
    (the record: the first in file order of that setup's kept detections), or None."""
    image = rows["image"].astype(np.int64)
    if not len(image):
        return None
    n = truth.n_images
    e = _in_e(truth, k, image)
    if (np.bincount(image, minlength=n)[e] == 0).any():
        return None  # an image of E with no detection at all: a float64 list joins in
    in_cap = _in_cap(rows, big, image, n)
    is_bool = rows["kind"] == exact_scores._BOOL
    height = rows["height"]
    for setup in CITYSCALE_SETUPS:
        lo, hi = setup.height
        kept = in_cap & (height >= lo / HEIGHT_EXPANSION) & (height < hi * HEIGHT_EXPANSION)
        held = np.bincount(image[kept], minlength=n)[e]
        numbers = np.bincount(image[kept & ~is_bool], minlength=n)[e]
        if (held > 0).all() and not numbers.any():
            first = int(np.flatnonzero(kept)[np.argmin(rows["record"][kept])])
            return setup.name, int(rows["record"][first]), bool(rows["score"][first])
    return None


def _in_cap(rows, big, image, n):
    """Per row, whether ``evaluateImg`` keeps it among its image's first 1,000 in the
    script's order (numpy's argsort of the Python values, as the script's own call)."""
    cap = exact_scores.CITYSCALE_CAP
    out = np.ones(len(image), bool)
    over = np.flatnonzero(np.bincount(image, minlength=n) > cap)
    if not len(over):
        return out
    by_image = np.argsort(image, kind="stable")  # file order within an image
    starts = np.searchsorted(image[by_image], np.arange(n + 1))
    for i in over.tolist():
        dets = by_image[starts[i] : starts[i + 1]]
        values = exact_scores._values(rows, big, dets)
        with np.errstate(all="ignore"):
            order = np.argsort([-v for v in values], kind="mergesort")
        out[dets[order[cap:]]] = False
    return out


def _entry(path, truth, k, setup, record, value):
    return {
        "setup": setup,
        "path": str(path),
        "record": f"record {record}",
        "field": "score",
        "message": (
            f"score {'true' if value else 'false'} is a boolean, and the CityPersons "
            f"script (eval_MR_multisetup.py) meets booleans alone in class "
            f"{truth.classes[k]!r} in setup {setup!r}: on every image with an annotation "
            "or a detection of the class, the detections it keeps (the first 1,000 by "
            "score, then the setup's expanded height range) are booleans (this record is "
            "the first of those in file order). Its accumulate joins them into a boolean "
            "array and negates it (-dtScores), where numpy raises TypeError. Write the "
            "scores as numbers (1.0, 0.0) to have them scored"
        ),
    }
