"""The pedestrian setups and the miss-rate presets (``pedestrian.evaluate_setups``
reads them): setup ranges, the reading rules of the toolbox (Dollár et al., TPAMI 2012),
the city-scale code (Zhang et al., CVPR 2017) and the toolbox's Caltech script."""

from dataclasses import dataclass, field

import numpy as np

from .data import name_key
from .errors import InputError
from .operating_point import FPPI_POINTS

MIN_OVERLAP = 0.5
HEIGHT_EXPANSION = 1.25
CLAMP = 1e-10
CURVE_POINTS = 120  # at most this many stored curve points per setup and class
CITYSCALE_FPPI_POINTS = (0.0100, 0.0178, 0.0316, 0.0562, 0.1000, 0.1778, 0.3162, 0.5623, 1.0000)
VARIANTS = ("toolbox", "cityscale")


@dataclass(frozen=True)
class Setup:
    """A pedestrian setup: closed ranges of box height (px) and visibility ratio;
    ``None`` is an open upper end."""

    name: str
    height: tuple
    visibility: tuple

    def counts(self, height, visibility, upper_open=False, script=False):
        """Per box: inside the setup (closed ranges; ``upper_open``: h < h_hi, as
        ``dbEval``'s ``filterGtFun``). ``script``: the city-scale code's test
        (``_prepare``: out when ``h < lo or h > hi or v < lo or v > hi``), so a NaN
        compares as inside; for numbers the same closed ranges."""
        (h_lo, h_hi), (v_lo, v_hi) = self.height, self.visibility
        if script:
            return ~((height < h_lo) | (height > h_hi) | (visibility < v_lo) | (visibility > v_hi))
        inside = (height >= h_lo) & (visibility >= v_lo)
        if h_hi is not None:
            inside &= (height < h_hi) if upper_open else (height <= h_hi)
        if v_hi is not None:
            inside &= visibility <= v_hi
        return inside

    def keeps(self, det_height, expansion):
        """Per detection: inside the expanded height range [lo / e, hi * e)."""
        lo, hi = self.height
        keep = det_height >= lo / expansion
        if hi is not None:
            keep &= det_height < hi * expansion
        return keep


SETUPS = (
    Setup("reasonable", (50.0, None), (0.65, None)),
    Setup("small", (50.0, 75.0), (0.65, None)),
    Setup("heavy", (50.0, None), (0.20, 0.65)),
    Setup("all", (20.0, None), (0.20, None)),
)
#: The city-scale code's ``Params.HtRng`` / ``VisRng``: its open ends are ``1e5 ** 2``
#: (1e10), so a box taller than 1e10 px is outside and a detection needs h < 1.25e10.
CITYSCALE_BOUND = 1e5**2
CITYSCALE_SETUPS = tuple(
    Setup(
        s.name,
        (s.height[0], CITYSCALE_BOUND if s.height[1] is None else s.height[1]),
        (s.visibility[0], CITYSCALE_BOUND if s.visibility[1] is None else s.visibility[1]),
    )
    for s in SETUPS
)
#: The setups' distinct height ranges: the CityPersons script's exact order of integer
#: scores beyond 2**53 is kept once per range (``loaders.exact_scores``).
CITYSCALE_HEIGHT_RANGES = tuple(sorted({s.height for s in CITYSCALE_SETUPS}))
#: ``accumulate``'s ``catIds = [1]``: the one category the city-scale code evaluates.
CITYSCALE_CATEGORY = 1

_NEIGHBOURS = ("person?", "people", "ignore")


@dataclass(frozen=True)
class MissRateProtocol:
    """A miss-rate preset: setups and the reading rules of one published code."""

    name: str
    version: int
    description: str
    variant: str = "toolbox"
    setups: tuple = SETUPS
    fppi_points: tuple = tuple(FPPI_POINTS.tolist())
    max_detections: int = None  # per image and class, by score; None = every one
    neighbours: dict = field(
        default_factory=lambda: {"person": _NEIGHBOURS, "pedestrian": _NEIGHBOURS}
    )
    headline_level: str = "reasonable"
    aspect_ratio: float = None  # dbEval: counted boxes and detections resized to w = ar * h
    height_upper_open: bool = False  # dbEval: a counted box needs h < h_hi

    def record(self):
        """The full protocol record stored beside every number; ``levels`` lists the
        setups as ``difficulty``'s record lists its levels (``name`` first)."""
        return {
            "name": self.name,
            "version": self.version,
            "description": self.description,
            "kind": "setups",
            "metric": "miss_rate",
            "lower_is_better": True,
            "variant": self.variant,
            "levels": [
                {"name": s.name, "height": list(s.height), "visibility": list(s.visibility)}
                for s in self.setups
            ],
            "iou_threshold": MIN_OVERLAP,
            "ignore_overlap": "intersection over the detection's area >= 0.5",
            "height_expansion": HEIGHT_EXPANSION,
            "max_detections": self.max_detections,
            "fppi_points": list(self.fppi_points),
            "clamp": CLAMP if self.variant == "toolbox" else None,
            "empty_budget": "miss rate 1" if self.variant == "toolbox" else "last recall",
            "neighbours": {k: list(v) for k, v in self.neighbours.items()},
            "headline_level": self.headline_level,
            "aspect_ratio": self.aspect_ratio,
            "height_upper": "open" if self.height_upper_open else "closed",
            "ignore_flags": (
                "the ignore flag only (a COCO JSON annotation's ignore key, a CSV ignore "
                "column); iscrowd, crowd and difficult not read"
                if self.variant == "cityscale"
                else "crowd, ignore and difficult flags"
            ),
            "evaluated_classes": (
                f"category id {CITYSCALE_CATEGORY} only (accumulate's catIds = [1])"
                if self.variant == "cityscale"
                else "every class except neighbouring labels"
            ),
        }


MISS_RATE = MissRateProtocol(
    name="miss-rate",
    version=1,
    description="Log-average miss rate on the pedestrian setups reasonable / small / heavy "
    "occlusion / all, as the pedestrian detection toolbox reads it (Dollar et al., TPAMI "
    "2012: bbGt evalRes/compRoc, dbEval): ignore boxes matched by intersection over the "
    "detection's area, expanded height range for detections, FPPI 10^-2..10^0",
)
#: ``miss-rate-cityscale``: ``eval_MR_multisetup.py`` (``Params``, ``_prepare``,
#: ``evaluateImg``, ``accumulate``, ``summarize``; ``coco.py`` ``loadRes``). How the
#: project's fields become its inputs (a mapping, not a rule of the script): its
#: ``height`` is ``GroundTruth.cityscale_height`` (read ``"as-given"``: a COCO JSON
#: annotation's ``height`` key as it is, where given; else the box's h, where the
#: script raises KeyError; ``loadRes`` sets a detection's to ``bbox[3]``, and so does
#: the engine); its ``vis_ratio`` is ``GroundTruth.cityscale_visibility``
#: (read ``"as-given"``: the annotation's ``vis_ratio`` as it is, beside a
#: ``visibility`` too; else the visibility; 1.0 when neither is given); its ``ignore``
#: is the ``ignore`` key (COCO JSON, its value: a fraction such as 0.5 ignores the box
#: but ``int(0.5) = 0`` makes its overlap plain IoU) or column (CSV), never ``iscrowd``
#: (a fractional one leaves the box regular, as the script never reads it);
#: neighbouring labels and don't-care regions are category-1 boxes with ``ignore: 1``;
#: its images are the split's. Known deviation: an empty detections list scores where
#: ``loadRes`` raises.
MISS_RATE_CITYSCALE = MissRateProtocol(
    name="miss-rate-cityscale",
    version=2,
    description="Log-average miss rate on the same setups as the city-scale benchmark's "
    "evaluation reads it (Zhang et al., CVPR 2017: eval_MR_multisetup.py): category id 1 "
    "only, ignore boxes from the ignore flag and the setup (iscrowd, difficult not read), "
    "a match with the box of annotation id 0 a false positive, open ends 1e10, FPPI "
    "points rounded to four decimals, top 1,000 detections per image, no clamp, an empty "
    "budget reads the last recall",
    variant="cityscale",
    setups=CITYSCALE_SETUPS,
    fppi_points=CITYSCALE_FPPI_POINTS,
    max_detections=1000,
)

MISS_RATE_CALTECH = MissRateProtocol(
    name="miss-rate-caltech",
    version=1,
    description="The toolbox's reading with its Caltech benchmark script's box handling "
    "(dbEval loadGt/loadDt): counted boxes and every detection resized to aspect ratio "
    "0.41 about their centre (height kept), a counted box's height below the setup's upper "
    "bound (h < h_hi)",
    aspect_ratio=0.41,
    height_upper_open=True,
)

MISS_RATE_PRESETS = {p.name: p for p in (MISS_RATE, MISS_RATE_CITYSCALE, MISS_RATE_CALTECH)}


def get_miss_rate_protocol(name_or_protocol):
    if isinstance(name_or_protocol, MissRateProtocol):
        return name_or_protocol
    try:
        return MISS_RATE_PRESETS[name_or_protocol]
    except KeyError:
        raise InputError(
            "protocol",
            f"unknown miss-rate protocol {name_or_protocol!r}; known: "
            f"{', '.join(MISS_RATE_PRESETS)}",
        ) from None


def category_one(truth):
    """Whether each class's id is 1 as Python compares the JSON id with ``accumulate``'s
    ``catIds = [1]`` (``1``, ``1.0`` and ``true`` are; the text ``"1"`` is not). CSV
    and label-folder classes are numbered from 1 in the split's class order."""
    ids = truth.class_ids
    if ids.dtype.kind in "iu":
        return ids == CITYSCALE_CATEGORY
    if truth.class_id_type != "number":
        return np.zeros(len(ids), bool)
    return np.array([float(v) == CITYSCALE_CATEGORY for v in ids.tolist()], bool)


def neighbours_of(truth, protocol, k):
    """The classes whose boxes are ignore boxes for class ``k``: every category whose
    own name (``GroundTruth.classes_named``) is a neighbouring label of ``k``'s own
    name. The toolbox reads a label per box, so two categories named ``people`` are
    both the ``people`` label (not the shown ``people (id 2)``, ``people (id 3)``)."""
    own = name_key(truth.category_names[k])
    labels = {name_key(n): n for n in protocol.neighbours}
    near = protocol.neighbours.get(labels.get(own), ())
    return sorted({j for n in near for j in truth.classes_named(n)})


def ignore_flags(truth, protocol):
    """Per box, whether a flag of the file makes it an ignore box: the toolbox's
    reading takes crowd, ignore and difficult flags; the city-scale code reads only an
    annotation's ``ignore`` key (``_prepare``: ``gt['ignore'] if 'ignore' in gt else
    0``), never ``iscrowd`` — the ``ignore_key`` of COCO JSON and the ``ignore`` column
    of CSV (in COCO JSON that flag is an ``iscrowd`` strictly between -1 and 1,
    ``iscrowd_fraction``, which the city-scale code does not read: not an ignore box)."""
    if protocol.variant == "cityscale":
        return truth.cityscale_ignore()[0] | (truth.ignore & ~truth.iscrowd_fraction)
    return truth.crowd | truth.ignore | truth.difficult | truth.ignore_key


def setup_height(truth, protocol):
    """Per box, the height the setups of ``protocol`` compare: the city-scale script's
    (``GroundTruth.cityscale_height``: an annotation's ``height`` key where read), or
    the box's h (the toolbox and Caltech readings)."""
    if protocol.variant == "cityscale":
        return truth.cityscale_height()
    return truth.boxes[:, 3]


def setup_visibility(truth, protocol):
    """Per box, the visibility the setups of ``protocol`` compare: the city-scale
    script's (``GroundTruth.cityscale_visibility``), or ``visibility`` with 1.0 where
    not given (the toolbox and Caltech readings: the ``visibility`` key, else a
    ``vis_ratio`` within 0-1, whatever the reading)."""
    if protocol.variant == "cityscale":
        return truth.cityscale_visibility()
    return np.where(np.isnan(truth.visibility), 1.0, truth.visibility)
