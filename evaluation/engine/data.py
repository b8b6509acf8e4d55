"""Columnar containers for ground truth and predictions.

Everything downstream of the loaders works on these arrays; no metric function ever
sees a file. Boxes are ``[x, y, w, h]`` in pixels (float64), as in COCO-style JSON; a
corner format's corners as read ride beside where ``x + w`` misses them (``corners``).
"""

from dataclasses import dataclass, field

import numpy as np

from .score_conflicts import ScoreConflictReadings
from .truth_readings import (  # noqa: F401  (the marks re-exported: imported from here)
    ALIAS_CLASS,
    ALIAS_COPY,
    ALIAS_IMAGE,
    REPEATED_COPY,
    REPEATED_GIVEN,
    TruthReadings,
)

#: Per-box road attributes of ``GroundTruth`` (NaN where not given).
ATTRIBUTES = ("occlusion", "truncation", "visibility")
#: The per-box columns of ``GroundTruth`` every box has (the optional ones, None where
#: a split has none: ``OPTIONAL_BOX_COLUMNS``), which a shard slice cuts
#: (``shards.keep_boxes``) and ``loaders.repeated_ids.merge`` interleaves.
BOX_COLUMNS = (
    "box_ids",
    "box_image",
    "box_class",
    "boxes",
    "box_area",
    "crowd",
    "difficult",
    "ignore",
    "ignore_key",
    "ignore_key_fraction",
    "iscrowd_fraction",
    "occlusion",
    "truncation",
    "visibility",
)
#: The per-box columns of ``GroundTruth`` a split may lack (None there).
OPTIONAL_BOX_COLUMNS = ("vis_ratio", "height_key", "alias", "repeated", "corners")


def name_key(name):
    """How a preset's or a protocol's class name is compared with a category's own name
    (``GroundTruth.category_names``): in any case (``str.casefold``). Every rule that
    names classes (per-class IoU, difficulty classes, neighbouring labels) matches
    through ``GroundTruth.classes_named``, never on the shown name ``classes``."""
    return str(name).casefold()


def _reads_as_zero(text):
    try:
        return float(text) == 0
    except ValueError:
        return False


@dataclass(frozen=True, eq=False)
class GroundTruth(TruthReadings):
    """A benchmark split: images, classes and annotated boxes.

    Images are held in ascending id order; ``box_image`` and ``box_class`` index into
    ``image_ids`` and ``classes``. ``box_area`` is the area used for size buckets (the
    annotation's own ``area`` when given, else ``w * h``). Image sizes are NaN where the
    file gives none (COCO-style JSON makes them optional, as pycocotools does).
    ``box_policy`` is the policy the boxes were loaded under (``loaders.BOX_POLICIES``)
    and ``box_counts`` what it found: boxes overhanging the frame, zero-area boxes.

    Road attributes, per box, NaN where the file gives none: ``occlusion`` (the KITTI
    levels: 0 fully visible, 1 partly, 2 largely occluded, 3 unknown), ``truncation``
    (0-1, the fraction of the object outside the frame) and ``visibility`` (0-1, the
    visible fraction, as pedestrian benchmarks give it). ``regions`` are class-agnostic
    don't-care areas (xywh) on image ``region_image``: no box, no class.
    """

    classes: tuple  # class names; position = class index
    class_ids: np.ndarray  # external ids (COCO category ids), same order: as image_ids
    image_ids: np.ndarray  # ascending (pycocotools' order); int64, or text (see below)
    image_width: np.ndarray
    image_height: np.ndarray
    image_tags: tuple  # per image: tuple of tag strings
    box_ids: np.ndarray  # int64 external annotation ids (or 1-based line numbers)
    box_image: np.ndarray  # int32
    box_class: np.ndarray  # int32
    boxes: np.ndarray  # (n, 4) float64 xywh
    box_area: np.ndarray
    crowd: np.ndarray  # bool
    difficult: np.ndarray  # bool
    ignore: np.ndarray  # bool
    source: str = ""
    #: What text ids are (``loaders.ids``): ``""`` int64 ids or CSV/file-name text;
    #: COCO JSON ids that are not all 64-bit integers: ``"number"`` (the ids' decimal
    #: or float text), ``"text"`` (JSON strings), ``"json"`` (JSON strings shown quoted).
    image_id_type: str = ""
    class_id_type: str = ""
    box_policy: str = "keep"
    box_counts: dict = field(default_factory=dict)
    #: A COCO JSON annotation's own ``ignore`` key (bool per box): pycocotools never
    #: reads it (``_prepare`` overwrites ``ignore`` from ``iscrowd``), so only the
    #: pedestrian setups do, as ignore boxes; all False where not given.
    ignore_key: np.ndarray = None
    #: Where that ``ignore`` key is nonzero but strictly between -1 and 1 (0.5): the
    #: city-scale code ignores the box (truthy) yet passes ``int(ignore) = 0`` as its
    #: crowd flag, so matches it by plain IoU. All False where not given.
    ignore_key_fraction: np.ndarray = None
    occlusion: np.ndarray = None  # float64 per box, NaN = not given
    truncation: np.ndarray = None
    visibility: np.ndarray = None
    #: The visibility the city-scale script compares with its setups' ranges, per box
    #: (``miss-rate-cityscale`` only): COCO JSON read with ``vis_ratio="as-given"``
    #: gives an annotation's ``vis_ratio`` as it is (a NaN here is a given NaN), else
    #: its visibility, else 1.0 (``loaders.attributes``). None under the other
    #: readings: that protocol then takes ``visibility`` (1.0 where NaN).
    vis_ratio: np.ndarray = None
    #: The height the city-scale script compares with its setups' height ranges, per
    #: box (``miss-rate-cityscale`` only): where a COCO JSON annotation read with
    #: ``vis_ratio="as-given"`` has a ``height`` key, that key as given (any number,
    #: NaN too; a boolean as 0/1; an integer beyond float64 as +-inf:
    #: ``loaders.annotation_flags.height_columns``), else the box's h (``bbox[3]``,
    #: where the script would raise KeyError). None where no annotation gives one
    #: (and under the other readings): that protocol then takes ``bbox[3]``.
    height_key: np.ndarray = None
    #: Where the ``ignore`` flag is a COCO JSON ``iscrowd`` strictly between -1 and 1
    #: (pycocotools ignores such a box); the city-scale code never reads ``iscrowd``,
    #: so ``miss-rate-cityscale`` leaves these boxes regular. All False where not given
    #: (CSV and label folders: their ``ignore`` is their own flag).
    iscrowd_fraction: np.ndarray = None
    #: Where the CityPersons script would raise reading a COCO JSON annotation, per
    #: field (``"vis_ratio"``, ``"height"``: not comparable, ``"ignore"``: ``int()``
    #: raises):
    #: ``[box, record, message, truthy]`` lists; checked by ``cityscale_raises`` under
    #: ``miss-rate-cityscale`` only (the other references never read these keys).
    #: ``"id"``: an annotation id numpy cannot write into a float array (message: the
    #: id shown), which pycocotools' ``evaluateImg`` raises on where matched; read by
    #: ``sequential_walk.refuse_unwritable_ids`` under ``coco``.
    cityscale_faults: dict = field(default_factory=dict)
    region_image: np.ndarray = None  # int32 index into image_ids
    regions: np.ndarray = None  # (m, 4) float64 xywh
    #: The regions' corners as read, as ``corners`` (kitti2d reads them); None alike.
    region_corners: np.ndarray = None
    #: Images (int64 indices, ascending) whose COCO JSON id pycocotools 2.0.11's
    #: ``evaluate`` loses in ``np.unique`` (``loaders.ids.unique_lost``): under its rules
    #: (``tie_order="image"``) their boxes and detections are left out and counted.
    unique_lost_images: np.ndarray = None
    #: Classes (int64 indices) whose category id that ``np.unique`` loses, alike
    #: (``evaluate`` runs it on ``p.catIds`` too).
    unique_lost_classes: np.ndarray = None
    #: Whether the ids' JSON types (``true``, ``1.0`` for an int) decided what is lost:
    #: the ids as shown would lose others, so the hash adds the lost images and classes.
    unique_lost_by_type: bool = False
    #: Images (int64 indices) whose id that ``np.unique`` rounds to another's entry
    #: (``loaders.ids.unique_merged``): the CityPersons script's FPPI does not count
    #: them as images.
    unique_merged_images: np.ndarray = None
    #: Per class, how many entries pycocotools 2.0.11's ``p.catIds =
    #: list(np.unique(p.catIds))`` gives it (``loaders.id_families.repeated_entries``:
    #: a NaN listed twice, or equal ids a NaN-disturbed sort leaves apart, among ids
    #: beyond 64 bits); its family (``tie_order="image"``) evaluates the category once
    #: per entry and counts it that often in every mean over classes
    #: (``scoring.mean_present``). None where every class is one entry.
    class_repeats: np.ndarray = None
    #: Whether every category id is written ``true``/``false``: numpy makes pycocotools'
    #: ``catIds`` a boolean array, and ``getAnnIds``' ``in catIds`` raises OverflowError on
    #: an integer it cannot convert (``lost_ids.refuse_uncomparable_detections``).
    boolean_class_ids: bool = False
    #: Each class's own name, as the file gives it. ``classes`` shows two categories
    #: that share a name as ``"car (id 1)"``, ``"car (id 2)"`` (``loaders.
    #: annotation_index.rename_shared_names``); the rules that name classes read this
    #: one (``classes_named``). None: the same as ``classes``.
    category_names: tuple = None
    #: Per box, where it is an annotation of an image or category the file does not
    #: list, written with the value pycocotools' ``np.unique`` changed a lost id into
    #: (``loaders.lost_ids.changed_value_refs``): ``ALIAS_IMAGE`` (its image),
    #: ``ALIAS_CLASS`` (its category), both bits, else 0; ``box_image``/``box_class``
    #: hold the lost entry it is scored under there. pycocotools' family scores it
    #: (``left_out_boxes``), every other reading leaves it out. None: no such box.
    alias: np.ndarray = None
    #: Per box (int8), where a COCO JSON annotation id is given more than once
    #: (``loaders.repeated_ids``): ``REPEATED_COPY`` a copy of the last annotation with
    #: that id, which pycocotools' ``loadAnns`` puts in the place of each occurrence
    #: (read only by its family and by ``miss-rate-cityscale``, whose script uses its
    #: ``COCO`` class); ``REPEATED_GIVEN`` an occurrence as the file gives it (read
    #: only by the others: the VOC devkit, KITTI and the toolbox never read ids); 0 a
    #: box every reading reads. None: no id is repeated (``repeated_left_out``).
    repeated: np.ndarray = None
    #: Per box (n, 4) float64, the corners ``x1, y1, x2, y2`` as a corner format gives
    #: them (VOC XML, CSV, KITTI labels), where some ``x1 + w`` or ``y1 + h`` is not the
    #: ``x2`` or ``y2`` read (``w = x2 - x1`` rounded: 17.8 + (50.6 - 17.8) is
    #: 50.599999999999994). The protocols whose reference reads corners (the VOC
    #: devkit's matching rule, KITTI) take the right and bottom edges from here
    #: (``boxes.edges``). None: the source gives xywh, or every edge rebuilds exactly.
    corners: np.ndarray = None

    def __post_init__(self):
        if self.category_names is None:
            object.__setattr__(self, "category_names", tuple(self.classes))
        for name in ATTRIBUTES:
            if getattr(self, name) is None:
                object.__setattr__(self, name, np.full(self.n_boxes, np.nan))
        if self.ignore_key is None:
            object.__setattr__(self, "ignore_key", np.zeros(self.n_boxes, bool))
        if self.ignore_key_fraction is None:
            object.__setattr__(self, "ignore_key_fraction", np.zeros(self.n_boxes, bool))
        if self.iscrowd_fraction is None:
            object.__setattr__(self, "iscrowd_fraction", np.zeros(self.n_boxes, bool))
        if self.region_image is None:
            object.__setattr__(self, "region_image", np.zeros(0, np.int32))
        if self.regions is None:
            object.__setattr__(self, "regions", np.zeros((0, 4)))
        for name in ("unique_lost_images", "unique_lost_classes", "unique_merged_images"):
            if getattr(self, name) is None:
                object.__setattr__(self, name, np.zeros(0, np.int64))

    def classes_named(self, name):
        """Indices of the classes whose own name (``category_names``) is ``name`` in
        any case (``name_key``): every category of that name, ascending."""
        key = name_key(name)
        return [k for k, own in enumerate(self.category_names) if name_key(own) == key]

    def _height_says_more(self):
        """Whether ``height_key`` holds a height other than the box's h (a height key
        that differs from ``bbox[3]``): only then is it hashed, so a split whose
        ``height`` keys all equal its boxes' h (as the city-scale files' own do) keeps
        the hash it had before the key was read."""
        if self.height_key is None:
            return False
        return not np.array_equal(self.height_key, self.boxes[:, 3], equal_nan=True)

    def _corners_say_more(self):
        """Whether the boxes' or the regions' corners as read say more than their xywh
        (``corners``, ``region_corners``): only then are they hashed (``corners``)."""
        return self.corners is not None or self.region_corners is not None

    def _vis_ratio_says_more(self):
        """Whether ``vis_ratio`` holds anything ``visibility`` does not say (a value
        given beside another visibility, out of 0-1, NaN, ``false``): only then is it
        hashed, so a split whose ``vis_ratio`` keys all read the same under
        ``"read"`` keeps that reading's hash."""
        if self.vis_ratio is None:
            return False
        derived = np.where(np.isnan(self.visibility), 1.0, self.visibility)
        return not np.array_equal(self.vis_ratio, derived, equal_nan=True)

    def has_attributes(self):
        """Whether any box carries an attribute or any image a don't-care region."""
        given = any(not np.isnan(getattr(self, name)).all() for name in ATTRIBUTES)
        return given or len(self.region_image) > 0

    @property
    def n_images(self):
        return len(self.image_ids)

    @property
    def n_boxes(self):
        return len(self.box_image)

    def zero_id_boxes(self):
        """Boxes whose annotation id is 0 (only COCO JSON ids can be: CSV and label
        folders number boxes from 1), for ``Protocol.zero_id_unmatched``. pycocotools
        writes the id into a float array (``dtm[t, d] = gt['id']``), so a text id counts
        when numpy reads it as 0 (``"0"``, ``"0.0"``, ``" -0 "``: Python's ``float``)."""
        ids = self.box_ids
        if ids.dtype.kind in "iu":
            return ids == 0
        return np.fromiter((_reads_as_zero(v) for v in ids.tolist()), bool, len(ids))

    def tags(self):
        """Every tag used by at least one image, sorted."""
        return sorted({t for tags in self.image_tags for t in tags})

    def tag_mask(self, tag):
        """0/1 int64 weights selecting the images that carry ``tag``."""
        return np.fromiter((tag in t for t in self.image_tags), bool, self.n_images).astype(
            np.int64
        )

    def content_hash(self, scheme="corners"):
        """SHA-256 of the canonical content, under ``scheme`` (``content_hash.HASH_SCHEMES``):
        identical splits hash identically (``content_hash.content_hash``)."""
        from .content_hash import content_hash

        return content_hash(self, scheme)

    def id_kinds(self):
        """``{"image": kind, "class": kind}`` of the two id families (``content_hash.id_kind``)."""
        from .content_hash import id_kinds

        return id_kinds(self)

    def share_images_digest(self, other):
        """Let ``other`` reuse this truth's hashed image part
        (``content_hash.share_images_digest``)."""
        from .content_hash import share_images_digest

        return share_images_digest(self, other)


@dataclass(frozen=True, eq=False)
class Predictions(ScoreConflictReadings):
    """A detector's output on one split, resolved against that split's indices.

    What its ``score_conflicts`` record means for a protocol is read by the methods of
    ``score_conflicts.ScoreConflictReadings`` (``score_conflict``, ``score_order``,
    ``overflowing``, ``cityscale_conflict``, ``cityscale_booleans``, ``cityscale_order``)."""

    image: np.ndarray  # int32 index into GroundTruth.image_ids
    cls: np.ndarray  # int32 index into GroundTruth.classes
    boxes: np.ndarray  # (n, 4) float64 xywh
    score: np.ndarray  # float64
    dropped: int = 0  # records of classes outside the split, dropped by policy
    dropped_images: int = 0  # records of images outside the split (unknown_images="drop")
    unknown_images: str = "reject"  # the policy they were loaded under
    source: str = ""
    box_policy: str = "keep"
    box_counts: dict = field(default_factory=dict)  # out of frame, outside, clipped, zero area
    extra: dict = field(default_factory=dict)
    dropped_classes: tuple = ()  # the class keys (as text) of the ``dropped`` records
    #: Where pycocotools would order integer scores beyond 2**53 otherwise than float64
    #: (``loaders.exact_scores.check``): per checked cap, its order (which ``match``
    #: takes under the COCO order) and the refusal raised under another cap; under
    #: ``"cityscale"`` the refusal of ``miss-rate-cityscale``; under
    #: ``"beyond_float64"`` the detections holding an integer score beyond float64's
    #: range (``overflowing``). Empty for a file without such scores.
    score_conflicts: dict = field(default_factory=dict)
    #: Each detection's area for size ranges, when the file is not read as boxes
    #: (pycocotools' ``loadRes``: a segmentation's RLE area, ``loaders/mask_results.py``;
    #: the result's own area or its keypoints' extent, ``loaders/result_readings.py``);
    #: None: w * h of the box.
    area: np.ndarray = None
    #: Detections whose own id, read "as given" (``loaders/as_given.py``), is not above
    #: 0: under ``coco`` a box one of them matches stays free (pycocotools' ``gtm > 0``);
    #: None: none such.
    free: np.ndarray = None
    #: Per detection read as given, the file's record number where numpy cannot write
    #: its id into pycocotools' float ``gtm`` (text that is no number), else -1: under
    #: ``coco`` ``match`` refuses the file if such a detection matches a box (pycocotools
    #: raises there); None: none such.
    unwritable: np.ndarray = None
    #: Per detection, whether its category is one the split does not list, written
    #: with the value pycocotools' ``np.unique`` changed a lost category's id into
    #: (``loaders.lost_ids.changed_keys``): ``cls`` holds that lost category, under
    #: which pycocotools' family scores it; every other reading leaves it out (as any
    #: detection of an unlisted class). None: no such detection.
    alias: np.ndarray = None
    #: Per detection, the corners as read (VOC result files, CSV, KITTI), as
    #: ``GroundTruth.corners``: None where none says more than its xywh.
    corners: np.ndarray = None
    #: Per detection, the position of its record in the file, 0-based (int64;
    #: ``detection_blocks.record_positions`` says how each format counts): where
    #: records were left out (classes or images outside the split, unreadable fields
    #: pycocotools never reads) or laid out "as given", the index of a detection here
    #: is not its record's. None: every detection is the record of its own index.
    record: np.ndarray = None

    def records(self):
        """``record``, or each detection's own index where it is None."""
        if self.record is None:
            return np.arange(len(self.score), dtype=np.int64)
        return self.record

    def alias_detections(self):
        """Per detection, whether it is an ``alias`` detection (all False where none)."""
        if self.alias is None:
            return np.zeros(len(self.score), bool)
        return self.alias

    @property
    def clipped(self):
        return self.box_counts.get("clipped", 0)

    def __len__(self):
        return len(self.score)
