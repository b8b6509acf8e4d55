"""What a level result keeps so that its numbers can be recomputed under image weights
(a paired image bootstrap, an image tag), and the recomputation.

Per (level or setup, class), numpy arrays indexed by the split's images:

* **KITTI levels** (``difficulty``). The devkit re-matches at every score threshold
  (``computeStatistics`` takes, per box, the detection of *greatest overlap* among
  those at or above the threshold), so a detection has no single outcome: the same
  detection can be a true positive at one threshold and a false positive at a lower
  one. What is kept instead is exact for every threshold:

  - ``n_gt`` (per image): the counted boxes;
  - ``tp_image``, ``tp_score``: the first pass's true positives (the scores
    ``getThresholds`` samples from);
  - ``step_image``, ``step_score``, ``step_tp``, ``step_fp``: per image, at each of its
    distinct detection scores s (at least the lowest true-positive score: no sampled
    threshold is lower), how much its (TP, FP) counts at threshold s exceed those at
    its next higher score. An image's counts at a threshold t are the sum of its
    steps with ``step_score >= t``.

* **Pedestrian setups** (``pedestrian``). Matching is once per image, by score, so
  each kept detection has one outcome: ``det_image``, ``det_score``, ``det_outcome``
  (1 true positive, 0 false positive, -1 ignored) in the order ``compRoc``
  concatenates them (images ascending, each image's detections by score, stable),
  and ``n_gt`` per image.

Weights are integer image multiplicities (``bootstrap.resampled_weights``; a tag's
0/1 mask): an image of weight w gives the numbers of w adjacent copies of it (copy c's
detections right after copy c-1's), weight 0 the split without it. Under weights of
one every number equals the unweighted result bit for bit, because the unweighted
result is computed by these same functions (``difficulty``, ``pedestrian``).
"""

import io
import json
import math
import zipfile

import numpy as np

from .operating_point import matlab_descending
from .pedestrian_curve import read_references

KITTI_FIELDS = ("n_gt", "tp_image", "tp_score", "step_image", "step_score", "step_tp", "step_fp")
SETUP_FIELDS = ("n_gt", "det_image", "det_score", "det_outcome")
#: A setup's optional order key (``_tie_runs``), kept where present.
_KEY = "det_key"
#: Per image, whether it is one of the CityPersons script's ``p.imgIds`` entries (an
#: id ``np.unique`` merges into another's is not: ``GroundTruth.unique_counted_images``);
#: only where one is not.
FPPI_IMAGE = "fppi_image"
_OPTIONAL = (_KEY, FPPI_IMAGE)
N_SAMPLE_POINTS = 41


class NoSamples(Exception):
    """A stored level result written before the arrays were kept (re-score it)."""


# KITTI -------------------------------------------------------------------------------


def kitti_thresholds(scores_desc, n_gt):
    """``getThresholds`` (KITTI devkit ``evaluate_object.cpp``) on true-positive scores
    sorted descending: walking them, a score is kept when its recall (i+1)/n_gt is at
    least as close to the current target as the next score's recall (i+2)/n_gt, or it
    is the last; each kept score moves the target up by 1/40. At most 41 are kept
    (``eval_class`` reads 41 slots).

    .. math:: \\text{keep } i \\iff r_{i+1} - c \\ge c - r_i \\;\\lor\\; i = n-1,
              \\quad r_i = (i+1)/n_{gt},\\; c \\mathrel{+}= 1/40

    Vectorised per kept score; every comparison is the devkit's double arithmetic.
    """
    n = len(scores_desc)
    if n == 0:
        return np.zeros(0)
    i = np.arange(n, dtype=np.float64)
    left = (i + 1) / n_gt
    right = np.r_[(i[:-1] + 2) / n_gt, left[-1:]]
    is_last = np.zeros(n, bool)
    is_last[-1] = True
    kept, current, start = [], 0.0, 0
    while start < n and len(kept) < N_SAMPLE_POINTS:
        keep = ~((right[start:] - current) < (current - left[start:])) | is_last[start:]
        j = start + int(np.argmax(keep))
        kept.append(scores_desc[j])
        current += 1.0 / (N_SAMPLE_POINTS - 1.0)
        start = j + 1
    return np.asarray(kept, np.float64)


def kitti_class(samples, weights=None):
    """AP of one level and class from its samples under image ``weights`` (None: one).

    .. math:: \\mathrm{AP}_{R40} = \\tfrac{1}{40}\\sum_{k=1}^{40} \\max_{k' \\ge k}
              p(t_{k'}), \\qquad \\mathrm{AP}_{R11} = \\tfrac{1}{11}\\sum_{k=0,4,\\dots,40}
              \\max_{k' \\ge k} p(t_{k'})

    with p(t) = TP(t) / (TP(t) + FP(t)) summed over images (0 when both are 0), the
    thresholds t_k from ``kitti_thresholds``, slots past the last threshold 0 (KITTI
    devkit ``eval_class``; AP over 40 recall positions: Simonelli et al., ICCV 2019).
    Returns ``{"AP_R40", "AP_R11", "n_gt", "precision"}`` (None values when no box
    counts under these weights).
    """
    w = _weights(weights, len(samples["n_gt"]))
    n_gt = int(np.dot(w, samples["n_gt"]))
    if n_gt == 0:
        return {"AP_R40": None, "AP_R11": None, "n_gt": 0, "precision": None}
    scores = np.repeat(samples["tp_score"], w[samples["tp_image"]])
    thresholds = kitti_thresholds(np.sort(scores)[::-1], n_gt)
    order = np.argsort(-samples["step_score"], kind="stable")
    neg = -samples["step_score"][order]
    step_w = w[samples["step_image"]][order]
    cum_tp = np.r_[0, np.cumsum(step_w * samples["step_tp"][order])]
    cum_fp = np.r_[0, np.cumsum(step_w * samples["step_fp"][order])]
    reach = np.searchsorted(neg, -thresholds, side="right")  # steps with score >= t
    tp, fp = cum_tp[reach], cum_fp[reach]
    precision = np.zeros(N_SAMPLE_POINTS)
    total = tp + fp
    np.divide(tp, total, out=precision[: len(thresholds)], where=total > 0)
    precision = np.maximum.accumulate(precision[::-1])[::-1]
    return {
        "AP_R40": float(precision[1:].sum() / 40),
        "AP_R11": float(precision[0::4].sum() / 11),
        "n_gt": n_gt,
        "precision": precision.tolist(),
    }


def kitti_steps(images, n_gt_image, tp_lists):
    """The samples of one level and class from ``difficulty._Image`` objects:
    ``images`` is ``[(image index, _Image)]``, ``tp_lists`` each one's first-pass
    true-positive scores."""
    tp_image = np.concatenate(
        [np.full(len(s), image, np.int64) for (image, _), s in zip(images, tp_lists)] or [[]]
    ).astype(np.int32)
    tp_score = np.asarray([s for scores in tp_lists for s in scores], np.float64)
    floor = tp_score.min() if len(tp_score) else np.inf
    step_image, step_score, step_tp, step_fp = [], [], [], []
    for image, im in images:
        last_tp = last_fp = 0
        for score in sorted({s for s in im.score if s >= floor}, reverse=True):
            tp, fp = im.counts(score)
            if tp != last_tp or fp != last_fp:
                step_image.append(image)
                step_score.append(score)
                step_tp.append(tp - last_tp)
                step_fp.append(fp - last_fp)
                last_tp, last_fp = tp, fp
    return {
        "n_gt": np.asarray(n_gt_image, np.int64),
        "tp_image": tp_image,
        "tp_score": tp_score,
        "step_image": np.asarray(step_image, np.int32),
        "step_score": np.asarray(step_score, np.float64),
        "step_tp": np.asarray(step_tp, np.int64),
        "step_fp": np.asarray(step_fp, np.int64),
    }


# Pedestrian setups --------------------------------------------------------------------


def setup_running_counts(samples, weights=None, nan_first=False):
    """(tp, fp, n_gt, n_images) of one setup and class under image ``weights``: running
    counts over the non-ignored detections in ``compRoc``'s order (a stable sort by
    score of the concatenation, each image's copies adjacent), the weighted number of
    counted boxes and of images. ``nan_first``: NaN scores sort first, as MATLAB's
    descending sort puts them (the toolbox); else last, as numpy's (city-scale).

    The unweighted order is sorted once (``_tie_runs``); under weights each run of
    detections sharing a score and an image is repeated w times as a block (copy c's
    run before copy c+1's — what the stable sort of the duplicated images gives), so a
    replicate costs no sort."""
    n_images = len(samples["n_gt"])
    w = _weights(weights, n_images)
    n_gt = int(np.dot(w, samples["n_gt"]))
    order, run_start, run_length, run_image = _tie_runs(samples, nan_first)
    if weights is None:
        index = order
    else:
        copies = w[run_image]
        out = run_length * copies
        run = np.repeat(np.arange(len(run_start)), out)
        within = np.arange(len(run)) - np.repeat(np.cumsum(out) - out, out)
        index = order[run_start[run] + within % run_length[run]]
    is_tp = samples["det_outcome"][index] == 1
    counted = samples.get(FPPI_IMAGE)  # miss-rate-cityscale: the script's I0
    images = int(w.sum()) if counted is None else int(w[counted].sum())
    return np.cumsum(is_tp), np.cumsum(~is_tp), n_gt, images


def _tie_runs(samples, nan_first=False):
    """The non-ignored detections in accumulation order (stable by score over the
    concatenation) and its runs of equal (score, image): start, length, image. Kept on
    the samples dict after the first call. A ``det_key`` column (``miss-rate-cityscale``
    on integer scores the CityPersons script orders exactly, ``loaders.exact_scores``)
    replaces the descending score: ascending key, equal keys the script's ties."""
    cached = f"_runs_{int(nan_first)}"
    if cached not in samples:
        keep = np.flatnonzero(samples["det_outcome"] != -1)
        scores = samples["det_score"][keep]
        if "det_key" in samples:  # the CityPersons script's exact order (exact_scores)
            order = keep[np.argsort(samples["det_key"][keep], kind="stable")]
        elif nan_first:
            order = keep[matlab_descending(scores)]
        else:
            order = keep[np.argsort(-scores, kind="stable")]
        score, image = samples["det_score"][order], samples["det_image"][order]
        if "det_key" in samples:  # equal keys: the script's ties
            score = samples["det_key"][order]
        same_score = (score[1:] == score[:-1]) | (np.isnan(score[1:]) & np.isnan(score[:-1]))
        change = np.r_[True, ~same_score | (image[1:] != image[:-1])][: len(order)]
        start = np.flatnonzero(change)
        length = np.diff(np.r_[start, len(order)])
        samples[cached] = (order, start, length, image[start].astype(np.int64))
    return samples[cached]


def setup_class(samples, protocol, weights=None):
    """Log-average miss rate of one setup and class under image ``weights``:

    .. math:: \\mathrm{LAMR} = \\exp\\Big(\\tfrac19\\sum_k \\ln \\max(1 - R(f_k),
              10^{-10})\\Big), \\quad \\mathrm{FPPI} = \\mathrm{FP} / \\textstyle\\sum_i w_i

    (toolbox ``dbEval``/``compRoc``; the city-scale variant's reading in
    ``pedestrian_curve.read_references``). Returns ``(miss rates at the nine references,
    LAMR)``, or ``(None, None)`` when no box counts under these weights."""
    nan_first = getattr(protocol, "variant", "toolbox") == "toolbox"
    tp, fp, n_gt, n_images = setup_running_counts(samples, weights, nan_first)
    if n_gt == 0:
        return None, None
    return read_references(tp, fp, n_gt, n_images, protocol)


# One level: the mean and every class --------------------------------------------------


def level_statistic(samples, level, weights=None, only=None):
    """``[mean, value of each class]`` of one level (``LevelSamples.classes`` order) under
    image ``weights``: AP over 40 recall positions (kitti2d) or the log-average miss
    rate (setups); NaN where a class has no counted box; the mean is over the classes
    present, as in the unweighted result (``numpy.mean``).

    ``only``: a class name whose value alone is needed (a bootstrap of one class): the
    other entries, the mean included, are left NaN and not computed."""
    values = []
    for name in samples.classes:
        part = samples.parts.get((level, name))
        if part is None or (only is not None and name != only):
            values.append(np.nan)
            continue
        if samples.kind == "kitti":
            value = kitti_class(part, weights)["AP_R40"]
        else:
            value = setup_class(part, samples.protocol, weights)[1]
        values.append(np.nan if value is None else value)
    present = [v for v in values if not math.isnan(v)]
    mean = float(np.mean(present)) if present and only is None else np.nan
    return np.r_[mean, values]


class LevelSamples:
    """Every (level, class)'s samples of one level result, with the protocol output.

    ``kind`` is ``"kitti"`` or ``"setups"``; ``protocol`` the engine protocol object
    (setups: its variant decides the reading); ``parts[(level, class)]`` a dict of
    arrays (``KITTI_FIELDS`` / ``SETUP_FIELDS``)."""

    def __init__(self, kind, protocol, n_images, levels, classes, parts):
        self.kind, self.protocol, self.n_images = kind, protocol, int(n_images)
        self.levels, self.classes, self.parts = list(levels), list(classes), dict(parts)

    def save(self, path, output):
        """One uncompressed ``.npz``: ``meta.json`` and ``output.json`` (the protocol
        output, as bytes) and one member per array."""
        fields = KITTI_FIELDS if self.kind == "kitti" else SETUP_FIELDS
        meta = {
            "kind": self.kind,
            "protocol": self.protocol.name,
            "n_images": self.n_images,
            "levels": self.levels,
            "classes": self.classes,
            "parts": [],
        }
        members = {}
        for k, ((level, name), part) in enumerate(self.parts.items()):
            meta["parts"].append([level, name])
            for field in fields + tuple(name for name in _OPTIONAL if name in part):
                members[f"p{k}_{field}"] = np.asarray(part[field])
        members["meta.json"] = _json_bytes(meta)
        members["output.json"] = _json_bytes(output)
        with open(path, "wb") as f:
            np.savez(f, **members)

    @classmethod
    def load(cls, path):
        """``(output, LevelSamples)`` of a file ``save`` wrote; ``NoSamples`` for a file
        written before (the protocol output as JSON, no arrays)."""
        if not zipfile.is_zipfile(path):
            raise NoSamples(
                "this level result was stored before its per-image samples were kept; "
                "re-score the predictions (e.g. on a new revision of the split) to judge a "
                "tag or significance rule on it"
            )
        with np.load(path, allow_pickle=False) as data:
            meta = json.loads(data["meta.json"].tobytes())
            output = json.loads(data["output.json"].tobytes())
            fields = KITTI_FIELDS if meta["kind"] == "kitti" else SETUP_FIELDS
            parts = {
                (level, name): {
                    field: data[f"p{k}_{field}"]
                    for field in fields + _OPTIONAL
                    if field not in _OPTIONAL or f"p{k}_{field}" in data.files
                }
                for k, (level, name) in enumerate(meta["parts"])
            }
        protocol = _protocol(meta["kind"], meta["protocol"])
        samples = cls(
            meta["kind"], protocol, meta["n_images"], meta["levels"], meta["classes"], parts
        )
        return output, samples


def _protocol(kind, name):
    if kind == "kitti":
        from .difficulty import get_difficulty_protocol

        return get_difficulty_protocol(name)
    from .pedestrian_setups import get_miss_rate_protocol

    return get_miss_rate_protocol(name)


def _json_bytes(value):
    buffer = io.BytesIO(json.dumps(value, sort_keys=True).encode())
    return np.frombuffer(buffer.getvalue(), np.uint8)


def _weights(weights, n_images):
    if weights is None:
        return np.ones(n_images, np.int64)
    w = np.asarray(weights)
    if w.shape != (n_images,):
        raise ValueError(f"weights must have one entry per image ({n_images}), got {w.shape}")
    return w.astype(np.int64)
