"""Named, versioned metric presets.

A protocol fixes every choice that changes a number: how detections are matched to
ground truth, the IoU thresholds (optionally per class), the recall points at which
precision is interpolated (or the all-point area), the pixel convention, the per-image
detection cap and the size buckets. Results record the protocol's name and version, so
a changed preset is a new version and old scorecards stay interpretable.
"""

import hashlib
import json
import math
from dataclasses import dataclass, field, fields

import numpy as np

from .data import name_key
from .difficulty import DIFFICULTY_PRESETS
from .errors import InputError
from .pedestrian_setups import MISS_RATE_PRESETS

#: Size buckets on box area in px², closed intervals (COCO's convention; an area of
#: exactly 32² is both small and medium, as in pycocotools).
COCO_AREA_RANGES = (
    ("all", 0.0, 1e10),
    ("small", 0.0, 32.0**2),
    ("medium", 32.0**2, 96.0**2),
    ("large", 96.0**2, 1e10),
)

#: The VOC protocols: the devkit looks at no area, so the "all" bucket has no bounds
#: (``None``): a box of negative area (negative width, say) still counts there, as
#: in ``VOCevaldet.m``. The other buckets are this engine's extension.
VOC_AREA_RANGES = (("all", None, None), *COCO_AREA_RANGES[1:])

GREEDY = "greedy"  # COCO: best still-unmatched box, regular boxes before ignored ones
BEST_OVERLAP = "best_overlap"  # VOC devkit: the single best box, taken or not

#: Order of detections tied in score, within a class, when the curve is accumulated.
#: ``image``: ascending image id, then file order (pycocotools ``accumulate``, which
#: concatenates images in id order before a stable sort). ``file``: file order (the VOC
#: devkit sorts the whole results file of a class with MATLAB's stable ``sort``).
TIE_ORDERS = ("image", "file")


def matlab_colon(a, d, b):
    """MATLAB's ``a:d:b`` for a floating-point step, as MathWorks documents its colon
    algorithm (``colonop.m``, MathWorks support solution 1-4FLI96, quoted in the
    MATLAB Answers thread "Floating Point Accuracy and COLON", 2012): with
    ``n = round((b - a) / d)`` intervals, the first half of the vector is ``a + k*d``
    and the second half ``b - k*d`` counted from the right, so both ends are exact
    and round-off is symmetric; for even ``n`` the middle element is ``(a + b) / 2``
    (from memory; for 0:0.1:1 and -2:0.25:0 it equals both other forms).
    """
    n = math.floor((b - a) / d + 0.5)  # MATLAB's round: halves away from zero
    out = [0.0] * (n + 1)
    for k in range(n // 2 + 1):
        out[k] = a + k * d
        out[n - k] = b - k * d
    if n % 2 == 0:
        out[n // 2] = (a + b) / 2
    return tuple(out)


#: The recall thresholds of the VOC 2007 devkit's ``for t=0:0.1:1``, as MATLAB's colon
#: computes them (``matlab_colon``). The 4th is 0.1 * 3 = 0.30000000000000004, so a
#: recall of exactly 0.3 does not reach it; the 7th and 8th are 1 - 0.4 = 0.6 and
#: 1 - 0.1 * 3 = 0.7 exactly (``np.arange(0, 1.1, 0.1)`` of common Python ports has them
#: one ulp higher). MATLAB's own printout of this vector against ``linspace(0,1,11)``
#: and ``(0:10)*0.1`` is checked in ``tests/engine/test_protocols.py``.
VOC07_RECALL_POINTS = matlab_colon(0.0, 0.1, 1.0)


@dataclass(frozen=True)
class Protocol:
    """A metric preset. See ``PRESETS`` for the published ones.

    ``iou_thresholds`` are *slots*: each slot has one threshold per class, taken from
    ``class_iou_thresholds`` (slot 0 only) when the class is named there. The first
    slot is the primary one: counts, curves, operating points and miss rate use it.
    ``recall_points`` of ``None`` means the all-point area under the precision
    envelope (VOC 2010+).
    """

    name: str
    version: int
    description: str
    matching: str = GREEDY
    iou_thresholds: tuple = (0.5,)
    class_iou_thresholds: dict = field(default_factory=dict)
    recall_points: tuple | None = None
    pixel_offset: float = 0.0
    max_detections: tuple = (None,)
    area_ranges: tuple = COCO_AREA_RANGES
    precision_epsilon: float = 0.0
    coco_summary: bool = False
    tie_order: str = "image"
    #: A match with the ground-truth box of annotation id 0 is no true positive (the box
    #: stays taken): pycocotools 2.0.11 ``evaluateImg`` stores the matched box's id in
    #: ``dtm`` and ``accumulate`` counts ``tps = dtm & ~dtIg``, so id 0 reads as unmatched.
    #: The same line's other half, ``gtm[t, g] = d['id']`` tested ``gtm > 0``: a detection
    #: whose own id is not above 0 (results read as given, ``Predictions.free``) leaves
    #: the box it matched free; under this flag only.
    zero_id_unmatched: bool = False
    #: Ground truth flagged ``difficult`` is neither TP nor FP (the VOC devkit's rule),
    #: or, False, the flag is not read at all (pycocotools never reads it).
    difficult_ignored: bool = True
    #: Custom protocols: every name in ``class_iou_thresholds`` must be a class of the
    #: split. Presets name common classes (car, van, ...) that a split may lack.
    check_class_names: bool = False

    @property
    def max_detections_limit(self):
        return self.max_detections[-1]

    @property
    def reads_corners(self):
        """Whether overlap is measured on the corners as read (``GroundTruth.corners``,
        ``Predictions.corners``): the devkit's matching rule reads corners
        (``VOCevaldet.m``); pycocotools reads xywh (``x + w``)."""
        return self.matching == BEST_OVERLAP

    @property
    def running_recall_sum(self):
        """Whether AP over sampled recall points is the VOC devkit's running sum
        (``ap=ap+p/11``, ``average_precision.recall_point_mean``): the devkit's matching
        with sampled recall points (``voc07`` and custom protocols on it)."""
        return self.matching == BEST_OVERLAP and self.recall_points is not None

    def threshold_table(self, classes, names=None):
        """IoU thresholds as a ``(slots, classes)`` float64 array.

        ``classes`` are the split's class names as shown (``GroundTruth.classes``),
        ``names`` each class's own name (``GroundTruth.category_names``; default: the
        shown ones). A name in ``class_iou_thresholds`` matches the own names in any
        case (``name_key``: ``Car`` and ``car`` are one class to a threshold) and
        applies to *every* category of that name: two categories both named ``car``
        (shown ``car (id 1)``, ``car (id 2)``) both take ``car``'s value, as a devkit
        reading class names would. A key naming no own name may name one renamed
        category as shown (``"car (id 2)"``); that value then wins for it. Under a
        custom protocol a key matching neither is an error.
        """
        names = classes if names is None else names
        table = np.empty((len(self.iou_thresholds), len(classes)))
        for slot, value in enumerate(self.iou_thresholds):
            table[slot] = value
        own = [name_key(n) for n in names]
        shown = [name_key(c) for c in classes]
        unknown = []
        by_shown = []
        for name, value in self.class_iou_thresholds.items():
            key = name_key(name)
            hits = [k for k, o in enumerate(own) if o == key]
            if hits:
                table[0, hits] = value
            elif key in shown:
                by_shown.append((shown.index(key), value))
            else:
                unknown.append(name)
        for k, value in by_shown:  # one category, named as shown: the narrower key
            table[0, k] = value
        if self.check_class_names and unknown:
            raise InputError(
                f"protocol {self.name}",
                f"{', '.join(map(repr, sorted(unknown)))} is not a class of the split "
                f"(classes: {', '.join(map(str, classes))})",
                field="class_iou_thresholds",
            )
        return table

    def digest(self):
        """SHA-256 (hex) of every field that decides a number, ``description`` aside, as
        canonical JSON (sorted keys, floats in Python's round-trip repr): two custom
        protocols given one name but different settings have different digests, so
        rows and results that carry it tell them apart (a name alone does not)."""
        definition = {
            f.name: _plain(getattr(self, f.name)) for f in fields(self) if f.name != "description"
        }
        text = json.dumps(definition, sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(text.encode()).hexdigest()

    def as_dict(self):
        return {
            "name": self.name,
            "version": self.version,
            "matching": self.matching,
            "iou_thresholds": [float(t) for t in self.iou_thresholds],
            "class_iou_thresholds": dict(self.class_iou_thresholds),
            "recall_points": None
            if self.recall_points is None
            else [float(r) for r in self.recall_points],
            "pixel_offset": self.pixel_offset,
            "max_detections": list(self.max_detections),
            "area_ranges": [list(r) for r in self.area_ranges],
            "tie_order": self.tie_order,
            "zero_id_unmatched": self.zero_id_unmatched,
            "difficult_ignored": self.difficult_ignored,
        }


def _plain(value):
    """A protocol field as JSON values (tuples as lists, numpy floats as floats)."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (tuple, list)):
        return [_plain(v) for v in value]
    if isinstance(value, np.generic):
        return value.item()
    return value


PRESETS = {
    "coco": Protocol(
        name="coco",
        version=2,
        description="COCO-style box AP: IoU 0.50:0.05:0.95, 101 recall points, "
        "up to 100 detections per image and class, crowd regions; a difficult flag is "
        "not read (pycocotools 2.0.11).",
        matching=GREEDY,
        # Exactly as numpy makes them, because the reference selects by equality.
        iou_thresholds=tuple(np.linspace(0.5, 0.95, 10).tolist()),
        recall_points=tuple(np.linspace(0.0, 1.0, 101).tolist()),
        max_detections=(1, 10, 100),
        precision_epsilon=float(np.spacing(1)),
        coco_summary=True,
        zero_id_unmatched=True,
        difficult_ignored=False,
    ),
    "voc07": Protocol(
        name="voc07",
        version=3,
        description="PASCAL VOC 2007: 11-point interpolated AP at overlap >= 0.5 "
        "(the devkit's test; the paper says 'exceeds'), inclusive pixel boxes, "
        "difficult boxes neither TP nor FP, ties in file order, recall sampled at "
        "the devkit's floating-point 0:0.1:1 (Everingham et al., IJCV 2010).",
        matching=BEST_OVERLAP,
        iou_thresholds=(0.5,),
        recall_points=VOC07_RECALL_POINTS,
        pixel_offset=1.0,
        area_ranges=VOC_AREA_RANGES,
        tie_order="file",
    ),
    "voc": Protocol(
        name="voc",
        version=3,
        description="PASCAL VOC 2010+: all-point AP, the area under the monotone "
        "precision envelope; matching and ties as voc07 (Everingham et al., IJCV 2010).",
        matching=BEST_OVERLAP,
        iou_thresholds=(0.5,),
        recall_points=None,
        pixel_offset=1.0,
        area_ranges=VOC_AREA_RANGES,
        tie_order="file",
    ),
    "recall40": Protocol(
        name="recall40",
        version=1,
        description="AP at 40 recall positions 1/40 ... 1 (Simonelli et al., ICCV 2019); "
        "IoU 0.7 for vehicles, 0.5 for other classes (common practice).",
        matching=GREEDY,
        iou_thresholds=(0.5,),
        class_iou_thresholds={"car": 0.7, "van": 0.7, "bus": 0.7, "truck": 0.7},
        recall_points=tuple(k / 40 for k in range(1, 41)),
    ),
}

#: Every preset's name: the matching presets and the level presets (difficulty levels,
#: miss-rate setups). No custom protocol may take one.
PRESET_NAMES = frozenset((*PRESETS, *DIFFICULTY_PRESETS, *MISS_RATE_PRESETS))


def get_protocol(name_or_spec):
    """A preset by name, or a custom protocol from a dict (e.g. loaded from JSON)."""
    if isinstance(name_or_spec, Protocol):
        return name_or_spec
    if isinstance(name_or_spec, str):
        try:
            return PRESETS[name_or_spec]
        except KeyError:
            raise InputError(
                "protocol",
                f"unknown protocol {name_or_spec!r}; known: {', '.join(sorted(PRESETS))}",
            ) from None
    return protocol_from_dict(name_or_spec)


# Custom protocols are built in protocol_specs, which reads this module's names.
from .protocol_specs import protocol_from_dict  # noqa: E402  (re-exported)
