"""Difficulty-level evaluation in the KITTI 2D style (Geiger et al., CVPR 2012).

The rules of the KITTI object development kit's ``evaluate_object.cpp``, stated in our
own words (the function named in brackets is where the devkit applies each):

* Levels [``cleanData``]: a ground-truth box of the class counts (``n_gt``) unless its
  occlusion exceeds the level's maximum, its truncation exceeds the level's maximum or
  its height ``y2 - y1`` is *at most* the level's minimum height; then it is ignored.
  Attributes not given (NaN) exceed nothing, like the devkit's -1. A box of the
  neighbouring class (van for car, person_sitting for pedestrian) is ignored; other
  classes take no part. A detection whose height, truncated to an integer, is below
  the minimum is ignored — of *any* class (the devkit tests the height before the
  class) — and otherwise takes part only if of the class. Ignored boxes and
  detections can be matched but count neither way.
* Matching [``computeStatistics``], per image, ground truth in file order, overlap
  (IoU of the pixel corners) strictly above the class's threshold: to collect the
  recall thresholds each box takes, among untaken detections, the one with the highest
  score (first in file order on ties); to count at a score threshold it takes the one
  with the greatest overlap among non-ignored detections scoring at least the
  threshold (first on ties), and only if there is none, the first ignored one. A pair
  with an ignored side is taken but counts neither way. False positives: untaken
  non-ignored detections at or above the threshold, less those whose intersection
  over their own area with a don't-care region exceeds the class's threshold.
* Sampling [``getThresholds``, ``eval_class``]: the true positives' scores, sorted
  descending, are walked keeping a score when its recall is at least as close to the
  next 1/40 step as the following score's; precision at each kept threshold, 41
  slots (later slots 0), each replaced by the maximum to its right. AP over 40 recall
  positions (Simonelli et al., ICCV 2019) is the mean of slots 1-40; the older 11-point
  AP the mean of slots 0, 4, ..., 40.

Class names compare case-insensitively, on each category's own name: categories that
share a name (shown ``Car (id 1)``, ``Car (id 2)``) or differ only in case are one
class, as label lines of that name are to the devkit, keyed by the first one's shown
name. A class with no counted box at a level is
absent there (None): the devkit only evaluates classes it has detections for.
"""

from bisect import bisect_right
from dataclasses import dataclass, field

import numpy as np

from .errors import InputError
from .level_samples import LevelSamples, kitti_class, kitti_steps

N_SAMPLE_POINTS = 41  # level_samples.N_SAMPLE_POINTS
_NO_DETECTION = -10000.0  # the devkit's initial "valid detection" score


@dataclass(frozen=True)
class Level:
    name: str
    min_height: float
    max_occlusion: float
    max_truncation: float


@dataclass(frozen=True)
class DifficultyProtocol:
    """A difficulty-level preset: levels, per-class overlap, neighbouring classes."""

    name: str
    version: int
    description: str
    levels: tuple
    class_overlap: dict = field(default_factory=dict)
    neighbours: dict = field(default_factory=dict)
    headline_level: str = "moderate"


KITTI_2D = DifficultyProtocol(
    name="kitti2d",
    version=1,
    description="KITTI 2D object detection: easy / moderate / hard levels (box height, "
    "occlusion, truncation), don't-care regions, neighbouring classes ignored, overlap "
    "strictly above 0.7 for cars and 0.5 for pedestrians and cyclists, AP over 40 recall "
    "positions and 11 points (object devkit evaluate_object.cpp)",
    levels=(
        Level("easy", 40, 0, 0.15),
        Level("moderate", 25, 1, 0.30),
        Level("hard", 25, 2, 0.50),
    ),
    class_overlap={"car": 0.7, "pedestrian": 0.5, "cyclist": 0.5},
    neighbours={"car": ("van",), "pedestrian": ("person_sitting",)},
)

DIFFICULTY_PRESETS = {KITTI_2D.name: KITTI_2D}


def get_difficulty_protocol(name_or_protocol):
    if isinstance(name_or_protocol, DifficultyProtocol):
        return name_or_protocol
    try:
        return DIFFICULTY_PRESETS[name_or_protocol]
    except KeyError:
        raise InputError(
            "protocol",
            f"unknown difficulty protocol {name_or_protocol!r}; known: "
            f"{', '.join(DIFFICULTY_PRESETS)}",
        ) from None


def _corners(xywh, read=None):
    """Corner boxes as the devkit reads them: ``read`` (the label file's corners,
    ``GroundTruth.corners``) where given, else ``x + w``, ``y + h``."""
    if read is not None:
        return read
    # a non-finite box (inf + -inf = NaN) is the devkit's C double arithmetic: quiet
    with np.errstate(over="ignore", invalid="ignore"):
        return _column_corners(xywh)


def _column_corners(xywh):
    return np.column_stack(
        [xywh[:, 0], xywh[:, 1], xywh[:, 0] + xywh[:, 2], xywh[:, 1] + xywh[:, 3]]
    )


def _overlap(det, other, own_area=False):
    """(len(det), len(other)) overlap of corner boxes: IoU, or over the detection's own
    area; 0 where the intersection is empty (devkit ``imageBoxOverlap``). Huge or
    non-finite corners overflow as the devkit's C doubles do: quietly (audit14 F4)."""
    with np.errstate(over="ignore", invalid="ignore"):
        return _overlap_of(det, other, own_area)


def _overlap_of(det, other, own_area):
    x1 = np.maximum(det[:, None, 0], other[None, :, 0])
    y1 = np.maximum(det[:, None, 1], other[None, :, 1])
    x2 = np.minimum(det[:, None, 2], other[None, :, 2])
    y2 = np.minimum(det[:, None, 3], other[None, :, 3])
    w, h = x2 - x1, y2 - y1
    valid = (w > 0) & (h > 0)
    inter = np.where(valid, w * h, 0.0)
    det_area = ((det[:, 2] - det[:, 0]) * (det[:, 3] - det[:, 1]))[:, None]
    if own_area:
        denominator = np.broadcast_to(det_area, inter.shape)
    else:
        other_area = ((other[:, 2] - other[:, 0]) * (other[:, 3] - other[:, 1]))[None, :]
        denominator = det_area + other_area - inter
    out = np.zeros(inter.shape)
    np.divide(inter, denominator, out=out, where=valid)
    return out


class _Image:
    """One image's part in one class and level, as plain lists: per image there are
    a handful of boxes, where Python loops beat array calls. Overlaps come in
    precomputed (``iou[i][j]``, ground truth ``i``, detection ``j``, both in file
    order); counts are memoised per set of detections at or above a threshold."""

    __slots__ = ("gt_counted", "regular", "score", "iou", "thr", "in_region", "ranked", "_memo")

    def __init__(self, gt_counted, regular, score, iou, in_region, thr):
        self.gt_counted = gt_counted  # per box: counted (else ignored)
        self.regular = regular  # per detection: regular (else ignored)
        self.score = score
        self.iou = iou
        self.in_region = in_region
        self.thr = thr
        self.ranked = sorted(-s for s in score)  # negated, ascending
        self._memo = {}

    def tp_scores(self):
        """First pass: the scores of the true positives (highest-score candidate)."""
        assigned = [False] * len(self.score)
        scores = []
        for i, row in enumerate(self.iou):
            best, j = _NO_DETECTION, -1
            for k, overlap in enumerate(row):
                if not assigned[k] and overlap > self.thr and self.score[k] > best:
                    best, j = self.score[k], k
            if j < 0:
                continue
            assigned[j] = True
            if self.gt_counted[i] and self.regular[j]:
                scores.append(self.score[j])
        return scores

    def counts(self, threshold):
        """Second pass at a score threshold: (tp, fp)."""
        available = bisect_right(self.ranked, -threshold)  # scores >= threshold
        if available not in self._memo:
            self._memo[available] = self._count(threshold)
        return self._memo[available]

    def _count(self, threshold):
        n = len(self.score)
        open_ = [self.score[k] >= threshold for k in range(n)]
        tp = 0
        for i, row in enumerate(self.iou):
            j, best, fallback = -1, 0.0, -1
            for k in range(n):
                if not open_[k] or row[k] <= self.thr:
                    continue
                if self.regular[k]:
                    if row[k] > best:
                        j, best = k, row[k]
                elif fallback < 0:
                    fallback = k
            j = j if j >= 0 else fallback
            if j < 0:
                continue
            open_[j] = False  # taken
            tp += self.gt_counted[i] and self.regular[j]
        fp = sum(1 for k in range(n) if open_[k] and self.regular[k] and not self.in_region[k])
        return tp, fp


def _left_out(truth):
    """Per box, whether KITTI's devkit never reads it: written under a changed value
    (``GroundTruth.alias``: the devkit keeps every id), or pycocotools' copy of a
    repeated id's last annotation (``GroundTruth.repeated``: it reads each as given)."""
    return truth.alias_boxes() | truth.repeated_left_out(False)


def _class_index(truth, name):
    """Every class whose own name is ``name`` (``GroundTruth.classes_named``): the
    devkit knows a class only by the name its label lines carry (``strcasecmp`` in
    ``cleanData``), so categories sharing a name, or differing only in case, are one
    class to it: their boxes and detections are evaluated together."""
    return truth.classes_named(name)


def evaluate_levels(truth, predictions, protocol="kitti2d"):
    """AP per level and class under a difficulty protocol (see the module docstring).

    Returns ``{"protocol": {...}, "levels": {level: {"classes": {class: {"AP_R40",
    "AP_R11", "n_gt", "precision"}}, "AP_R40", "AP_R11"}}, "headline": float|None}``;
    a level's AP is the mean over the classes present there, the headline the
    headline level's AP_R40.
    """
    return evaluate_levels_with_samples(truth, predictions, protocol)[0]


def evaluate_levels_with_samples(truth, predictions, protocol="kitti2d"):
    """``(evaluate_levels' output, level_samples.LevelSamples)``: the output is computed
    from the samples (``level_samples.kitti_class`` at weights of one), so a weighted
    recomputation at weights of one equals it bit for bit."""
    protocol = get_difficulty_protocol(protocol)
    gt_corners = _corners(truth.boxes, truth.corners)
    det_corners = _corners(predictions.boxes, predictions.corners)
    det_height = np.trunc(np.abs(predictions.boxes[:, 3]))  # int32_t height = fabs(...)
    gt_by_image = _group(truth.box_image, truth.n_images)
    det_by_image = _group(predictions.image, truth.n_images)
    region_by_image = _group(truth.region_image, truth.n_images)
    region_corners = _corners(truth.regions, truth.region_corners)
    tallest_minimum = max(level.min_height for level in protocol.levels)
    det_alias = predictions.alias_detections()
    per_level = {level.name: {} for level in protocol.levels}
    parts, classes = {}, []
    for name, thr in protocol.class_overlap.items():
        own = _class_index(truth, name)
        if not own:
            continue
        near = [k for n in protocol.neighbours.get(name, ()) for k in _class_index(truth, n)]
        # boxes and detections under a changed value: the devkit keeps every id
        gt_own = _mask(len(truth.classes), own)[truth.box_class] & ~_left_out(truth)
        gt_part = _mask(len(truth.classes), own + near)[truth.box_class] & ~_left_out(truth)
        det_own = _mask(len(truth.classes), own)[predictions.cls] & ~det_alias
        # a detection below any level's minimum height takes part at that level
        det_part = det_own | ((det_height < tallest_minimum) & ~det_alias)
        scenes = []  # per image: what every level needs, overlaps computed once
        for image in range(truth.n_images):
            g = gt_by_image[image]
            g = g[gt_part[g]]
            d = det_by_image[image]
            d = d[det_part[d]]
            if len(d):
                scenes.append((image, g, d, _overlap(det_corners[d], gt_corners[g]).T))
        for level in protocol.levels:
            hard = (
                (truth.occlusion > level.max_occlusion)
                | (truth.truncation > level.max_truncation)
                | (truth.boxes[:, 3] <= level.min_height)
            )
            counted_all = gt_own & ~hard
            small_all = (det_height < level.min_height) & ~det_alias
            take_all = small_all | det_own
            images = []
            for image, g, d, iou in scenes:
                take = take_all[d]
                if not take.any():
                    continue  # no detection: nothing to count at any threshold
                own_d = d[take]
                regions = region_corners[region_by_image[image]]
                in_region = np.zeros(len(own_d), bool)
                if len(regions):
                    in_region = (_overlap(det_corners[own_d], regions, own_area=True) > thr).any(1)
                images.append(
                    (
                        image,
                        _Image(
                            counted_all[g].tolist(),
                            (~small_all[own_d]).tolist(),
                            predictions.score[own_d].tolist(),
                            iou[:, take].tolist(),
                            in_region.tolist(),
                            thr,
                        ),
                    )
                )
            class_name = truth.classes[own[0]]
            n_gt_image = np.bincount(truth.box_image[counted_all], minlength=truth.n_images)
            part = kitti_steps(images, n_gt_image, [im.tp_scores() for _, im in images])
            parts[(level.name, class_name)] = part
            per_level[level.name][class_name] = kitti_class(part)
        classes.append(truth.classes[own[0]])
    levels = {name: _level_summary(per_class) for name, per_class in per_level.items()}
    headline = levels.get(protocol.headline_level, {}).get("AP_R40")
    samples = LevelSamples(
        "kitti", protocol, truth.n_images, [lv.name for lv in protocol.levels], classes, parts
    )
    output = {
        "protocol": {"name": protocol.name, "version": protocol.version},
        "levels": levels,
        "headline": headline,
    }
    return output, samples


def level_counts(truth, protocol="kitti2d"):
    """What a split holds for a difficulty protocol, for its page: boxes counted per
    level and class (the ``n_gt`` of ``evaluate_levels``), don't-care regions, and how
    many boxes give each attribute.

    ``{"levels": {level: {class: n}}, "dont_care_regions": m, "attributes_given":
    {"occlusion": k, "truncation": k, "visibility": k}}``; classes the split lacks are
    left out.
    """
    protocol = get_difficulty_protocol(protocol)
    levels = {}
    for level in protocol.levels:
        hard = (
            (truth.occlusion > level.max_occlusion)
            | (truth.truncation > level.max_truncation)
            | (truth.boxes[:, 3] <= level.min_height)
        )
        counts = {}
        for name in protocol.class_overlap:
            own = _class_index(truth, name)
            if own:
                gt_own = _mask(len(truth.classes), own)[truth.box_class] & ~_left_out(truth)
                counts[truth.classes[own[0]]] = int((gt_own & ~hard).sum())
        levels[level.name] = counts
    return {
        "levels": levels,
        "dont_care_regions": int(len(truth.region_image)),
        "attributes_given": {  # of the boxes the devkit reads
            name: int((~np.isnan(getattr(truth, name)) & ~_left_out(truth)).sum())
            for name in ("occlusion", "truncation", "visibility")
        },
    }


def _mask(n, indices):
    mask = np.zeros(n, bool)
    mask[indices] = True
    return mask


def _group(index, n):
    order = np.argsort(index, kind="stable")
    bounds = np.searchsorted(index[order], np.arange(n + 1))
    return [order[bounds[i] : bounds[i + 1]] for i in range(n)]


def _level_summary(per_class):
    present = [r for r in per_class.values() if r["AP_R40"] is not None]
    mean = lambda key: float(np.mean([r[key] for r in present])) if present else None  # noqa: E731
    return {"classes": per_class, "AP_R40": mean("AP_R40"), "AP_R11": mean("AP_R11")}


def levels_table(result):
    """A plain-text table of ``evaluate_levels``' result: AP per level and class."""
    rows = [f"{'level':<10}{'class':<16}{'n_gt':>6}{'AP_R40':>9}{'AP_R11':>9}"]
    show = lambda v: "-" if v is None else f"{v:.4f}"  # noqa: E731
    for level, entry in result["levels"].items():
        for name, r in entry["classes"].items():
            rows.append(
                f"{level:<10}{name:<16}{r['n_gt']:>6}{show(r['AP_R40']):>9}{show(r['AP_R11']):>9}"
            )
        rows.append(
            f"{level:<10}{'mean':<16}{'':>6}{show(entry['AP_R40']):>9}{show(entry['AP_R11']):>9}"
        )
    rows.append(
        f"headline ({result['protocol']['name']}, moderate AP_R40): {show(result['headline'])}"
    )
    return "\n".join(rows)
