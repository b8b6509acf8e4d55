"""What a pedestrian miss-rate preset reads of a split (``pedestrian.evaluate_setups``
and ``setup_counts``): the classes it evaluates (a neighbouring label is none; under
``cityscale`` only category id 1), the boxes that never count, the images whose ids the
CityPersons script's ``np.unique`` loses or merges (left out; FPPI's image count) and
that script's exact score order where it is not float64's.
"""

import numpy as np

from .pedestrian_setups import CITYSCALE_HEIGHT_RANGES, category_one, ignore_flags, neighbours_of


def evaluated_classes(truth, protocol):
    """(class index, [neighbour indices]) for every evaluated class: each class of the
    split except those that are only a neighbouring label of another present class;
    under ``cityscale`` only the class of category id 1 (``category_one``). Labels are
    the categories' own names (``neighbours_of``)."""
    near_of = {k: neighbours_of(truth, protocol, k) for k in range(len(truth.classes))}
    if protocol.variant == "cityscale":
        lost = truth.unique_lost_masks()
        kept = category_one(truth) & (True if lost is None else ~lost[1])
        return [(int(k), near_of[int(k)]) for k in np.flatnonzero(kept)]
    neighbour_only = {j for k, near in near_of.items() for j in near if j != k}
    return [(k, near_of[k]) for k in range(len(truth.classes)) if k not in neighbour_only]


def exact_order(predictions, protocol):
    """``(rank, {height range: key})`` per prediction (rank -1, key NaN where not
    given) of the CityPersons script's exact order (``Predictions.cityscale_order``)
    under ``cityscale``; None elsewhere or where float64's order is the script's."""
    found = predictions.cityscale_order() if protocol.variant == "cityscale" else None
    if found is None:
        return None
    index, rank, keys = found
    ranks = np.full(len(predictions), -1, np.int64)
    ranks[index] = rank
    by_range = {}
    for height, key in zip(CITYSCALE_HEIGHT_RANGES, keys):
        if key is not None:
            by_range[height] = np.full(len(predictions), np.nan)
            by_range[height][index] = key
    return ranks, by_range


def lost_images(truth, protocol):
    """Per image, whether the CityPersons script's ``evaluate`` loses its id in
    ``p.imgIds = list(np.unique(p.imgIds))`` (``GroundTruth.unique_lost_masks``: its
    boxes and detections are never looked up), or None (nothing lost, or another
    variant: the toolbox keys images by file)."""
    lost = truth.unique_lost_masks() if protocol.variant == "cityscale" else None
    return None if lost is None else lost[0]


def not_counted(truth, protocol):
    """Per box, whether it never counts: a flag makes it an ignore box
    (``ignore_flags``), its image is lost (``lost_images``), or it is written with a
    value ``np.unique`` changed a lost id into (``GroundTruth.alias``): the toolbox
    keeps every id and leaves it out; the CityPersons script finds it under the lost
    entry (``imgToAnns[C]``, ``_gts[C, 1]``) and counts it there, as a lost image's
    own boxes are not; or it is an annotation of a repeated id this reading does not
    read (``GroundTruth.repeated_left_out``: the script reads pycocotools' copies, the
    toolbox each as given)."""
    flagged = ignore_flags(truth, protocol)
    if protocol.variant != "cityscale":
        return flagged | truth.alias_boxes() | truth.repeated_left_out(False)
    left_out = truth.left_out_boxes(True)  # what the script's _gts never holds
    return flagged if left_out is None else flagged | left_out


def image_count(truth, protocol):
    """The images false positives are divided by: the CityPersons script's ``I0 =
    len(_pe.imgIds)`` counts an id ``np.unique`` merged into another's once
    (``GroundTruth.unique_counted_images``); elsewhere every image."""
    counted = truth.unique_counted_images() if protocol.variant == "cityscale" else None
    return truth.n_images if counted is None else int(counted.sum())
