"""From a flag to its cause: the pair of versions compared on one split, one image's
boxes for the drill-down, and the links from a failing rule.

Everything is read from the stored match records (``evaluation.outcomes``); nothing is
matched again on a request. Visibility goes through ``access.version_for``: another
team's version, split or image is ``DoesNotExist`` (a 404), never a 403.
"""

from dataclasses import dataclass

import numpy as np

from .access import version_for
from .scores import _scorecards


class NotScored(Exception):
    """The version has no finished primary scorecard on the split."""


@dataclass
class Side:
    """One version on one split: its primary scorecard and what it stored."""

    version: object
    card: object
    records: object

    @property
    def evaluation(self):
        return self.card.evaluation


@dataclass
class Pair:
    """A candidate and (optionally) the reference it is compared with, on one split."""

    split: object
    candidate: Side
    reference: Side | None
    truth: object
    thresholds: np.ndarray  # deployed score threshold per class (the suite's)
    protocol: str

    @property
    def classes(self):
        return list(self.truth.classes)


def deployed_thresholds(detector, truth):
    """The deployed score threshold of each class of ``truth`` (the split), under the
    detector's current suite: ``class_thresholds.thresholds_of``, the one source of "the
    deployed threshold", matching names in any case, by the categories' own names."""
    from ..class_thresholds import thresholds_of
    from ..suites import current_suite

    return np.array(
        thresholds_of(current_suite(detector), list(truth.classes), list(truth.category_names))
    )


def _side(version, split):
    from evaluation import outcomes

    detector = version.detector
    sets = list(version.prediction_sets.current().filter(split=split))
    cards = _scorecards(sets, [detector.primary_protocol])
    card = next(iter(cards.values()), None)
    if card is None:
        raise NotScored(
            f"{version.label} has no finished {detector.primary_protocol} scorecard on {split}"
        )
    return Side(version, card, outcomes.records_of(card))


def default_reference(version):
    """The version a candidate is compared with by default: the baseline of its newest
    judgement, else the detector's current baseline."""
    from .. import verdicts
    from ..models import Judgement

    judgement = Judgement.objects.filter(version=version).order_by("-id").first()
    if judgement is not None and judgement.baseline_id:
        return judgement.baseline
    return verdicts.baseline_for(version)


def pair_for(user, version_id, split_id, against=None):
    """The candidate ``version_id`` and the reference version ``against`` (default:
    ``default_reference``) on the split ``split_id``. Raises ``DoesNotExist`` for what
    the user may not see or a split the candidate was not scored on, ``NotScored`` for
    a reference without a scorecard there."""
    from evaluation import outcomes
    from evaluation.models import BenchmarkSplit

    from ..models import ModelVersion

    version = version_for(user, version_id)
    split_ids = version.prediction_sets.current().values_list("split_id", flat=True)
    if int(split_id) not in set(split_ids):
        raise BenchmarkSplit.DoesNotExist(f"no split {split_id} scored for this version")
    split = BenchmarkSplit.objects.get(pk=split_id)
    if against is None:
        reference_version = default_reference(version)
    else:
        reference_version = version_for(user, against)
        if reference_version.detector_id != version.detector_id:
            raise ModelVersion.DoesNotExist("compare versions of one detector")
    candidate = _side(version, split)
    reference = None
    if reference_version is not None and reference_version.pk != version.pk:
        try:
            reference = _side(reference_version, split)
        except NotScored:
            reference = None
    truth = outcomes.truth_of(candidate.evaluation)
    return Pair(
        split=split,
        candidate=candidate,
        reference=reference,
        truth=truth,
        thresholds=deployed_thresholds(version.detector, truth),
        protocol=candidate.card.protocol,
    )


def _image_side(side, image):
    """One version's detections on one image (score descending) with their stored
    reason, related box and IoU, and the score of the detection that matched each box."""
    from evaluation.engine.reasons import BOX_REASONS, DETECTION_REASONS, MATCHED

    records = side.records
    rows = np.flatnonzero(records.det_image == image)
    rows = rows[np.argsort(-records.det_score[rows], kind="stable")]
    detections = [
        {
            "box": [round(float(v), 2) for v in records.det_box[d]],
            "class": int(records.det_class[d]),
            "score": round(float(records.det_score[d]), 4),
            "outcome": DETECTION_REASONS[records.det_reason[d]],
            "iou": None
            if np.isnan(records.det_ref_iou[d])
            else round(float(records.det_ref_iou[d]), 3),
            "truth": int(records.det_ref_box[d]),
        }
        for d in rows
    ]
    boxes = {}
    for b in np.flatnonzero(records.gt_image == image):
        reason, det = int(records.gt_reason[b]), int(records.gt_ref_det[b])
        iou = float(records.gt_ref_iou[b])
        boxes[int(b)] = {
            "reason": BOX_REASONS[reason],
            "score": round(float(records.det_score[det]), 4) if reason == MATCHED else None,
            # The related detection (matching, or nearest for a missed box), if any.
            "near": None
            if det < 0
            else {
                "score": round(float(records.det_score[det]), 4),
                "iou": None if np.isnan(iou) else round(iou, 3),
            },
        }
    return {
        "label": side.version.label,
        "version": side.version.pk,
        "detections": detections,
    }, boxes


def image_drilldown(pair, image):
    """Everything the drill-down draws for image index ``image``: its ground truth
    (each box with the score of the detection that matched it in each version, so the
    page can tell *missed at the threshold* apart), and both versions' detections with
    outcome, score and IoU, from the stored records."""
    from evaluation import images as split_images

    truth = pair.truth
    if not 0 <= image < truth.n_images:
        raise IndexError(image)
    sides, found = {}, {}
    for key, side in (("candidate", pair.candidate), ("reference", pair.reference)):
        if side is not None:
            sides[key], found[key] = _image_side(side, image)
    boxes = np.flatnonzero(truth.box_image == image)
    ignored = pair.candidate.records.gt_ignored[0]
    image_id = str(truth.image_ids[image])
    file_name = split_images.file_names(pair.split).get(image_id, "")
    stored = split_images.images_of(pair.split)
    width, height = float(truth.image_width[image]), float(truth.image_height[image])
    if np.isnan(width) or np.isnan(height):  # sizes are optional: frame the boxes
        extent = truth.boxes[boxes, :2] + truth.boxes[boxes, 2:] if len(boxes) else np.zeros((0, 2))
        width = float(max(extent[:, 0].max(initial=0), 1))
        height = float(max(extent[:, 1].max(initial=0), 1))
    return {
        "image": {
            "index": image,
            "id": image_id,
            "file_name": file_name,
            "width": width,
            "height": height,
            "tags": list(truth.image_tags[image]),
            "source": stored.source if stored else None,
            "url": split_images.image_url(stored, file_name),
        },
        "classes": pair.classes,
        "thresholds": [float(t) for t in pair.thresholds],
        "iou_threshold": float(pair.candidate.records.thresholds[0].min()),
        "truth": [
            {
                "index": int(b),
                "id": str(truth.box_ids[b]),  # the downloads' box_id
                "box": [round(float(v), 2) for v in truth.boxes[b]],
                "class": int(truth.box_class[b]),
                "ignored": bool(ignored[b]),
                "found": {key: found[key][int(b)]["score"] for key in sides},
                "reason": {key: found[key][int(b)]["reason"] for key in sides},
                "near": {key: found[key][int(b)]["near"] for key in sides},
            }
            for b in boxes
        ],
        **sides,
    }


def image_file_for(user, version_id, split_id, image):
    """``(file, MIME type)`` of image index ``image`` of a split the user's visible
    version was scored on, or None when the split has no stored file for it."""
    from evaluation import images as split_images
    from evaluation.models import BenchmarkSplit

    version = version_for(user, version_id)
    if not version.prediction_sets.current().filter(split_id=split_id).exists():
        raise BenchmarkSplit.DoesNotExist("no such split for this version")
    split = BenchmarkSplit.objects.get(pk=split_id)
    stored = split_images.images_of(split)
    if stored is None:
        return None
    truth_ids = _image_ids(split)
    if not 0 <= image < len(truth_ids):
        raise IndexError(image)
    file_name = split_images.file_names(split).get(truth_ids[image], "")
    return split_images.open_image(stored, file_name)


def _image_ids(split):
    """The split's image ids as text, in the engine's order (ascending id)."""
    from evaluation import outcomes

    return [str(i) for i in outcomes.truth_of_split(split).image_ids]


def scored_splits(version):
    """The splits of the version's current prediction sets, in name order."""
    from evaluation.models import BenchmarkSplit

    ids = version.prediction_sets.current().values_list("split_id", flat=True)
    return list(BenchmarkSplit.objects.filter(pk__in=list(ids)).order_by("name", "revision"))


def scored_split_ids(version):
    return [s.pk for s in scored_splits(version)]


def other_versions(version):
    """The detector's other versions, newest first (the reference choices)."""
    return list(version.detector.versions.exclude(pk=version.pk).order_by("-created_at"))
