"""Image shards: match a split a slice of images at a time, merge into one set of records.

Matching depends on nothing outside one (image, class) group (``matching``), and the
reasons on nothing outside one image (``reasons``). So a split cut into contiguous runs
of image indices can be matched shard by shard, each shard with only its images' boxes
and detections, and the pieces merged into exactly the records of one whole run:

* detection fields are concatenated and put in accumulation order — class, score
  descending, then image and file position (``tie_order="image"``, pycocotools) or file
  position alone (``"file"``, the VOC devkit) — the same total order ``accumulation_order.orders``
  builds, so every detection lands where the whole run puts it;
* a shard's indices are translated to the whole file's: detection positions
  (``det_order``), box indices (``match_box``, ``det_ref_box``) and detection indices
  (``match_det``, ``gt_ref_det``);
* per-box fields are scattered back to the split's box order.

A shard keeps every image of the split (ids, sizes, tags: small) and only its own
boxes and detections (the bulk), so its memory follows the shard, not the split.
Match rows come in shard order (a set equal to the whole run's); their order decides
no number (``MatchRecords.sparse_outcomes`` sorts them).
"""

import dataclasses

import numpy as np

from .data import BOX_COLUMNS, OPTIONAL_BOX_COLUMNS
from .loaders import exact_scores
from .loaders.cache import _from_arrays, _to_arrays
from .matching import match
from .records import MatchRecords

#: Per-detection columns of ``MatchRecords`` (first axis) and the one on the second.
_DET_FIELDS = (
    "det_class",
    "det_image",
    "det_score",
    "det_rank",
    "det_order",
    "det_box",
    "det_reason",
    "det_ref_box",
    "det_ref_iou",
)
_BOX_RECORD_FIELDS = ("gt_class", "gt_image", "gt_reason", "gt_ref_det", "gt_ref_iou")


def plan(n_images, images_per_shard):
    """Contiguous ``(start, stop)`` runs of image indices covering ``range(n_images)``."""
    size = max(1, int(images_per_shard))
    return [(lo, min(lo + size, n_images)) for lo in range(0, max(n_images, 1), size)]


def truth_slice(truth, start, stop):
    """``(truth of images [start, stop) only, box_index)``: the slice keeps every image
    (indices stay the split's) and the boxes and don't-care regions of its own images,
    in file order; ``box_index`` maps its boxes to the split's."""
    box_index = np.flatnonzero((truth.box_image >= start) & (truth.box_image < stop))
    regions = (truth.region_image >= start) & (truth.region_image < stop)
    sliced = keep_boxes(truth, box_index, regions)
    truth.share_images_digest(sliced)  # its images are the split's: hashed once
    return sliced, box_index


def keep_boxes(truth, box_index, regions=None):
    """``truth`` with the boxes ``box_index`` (sorted) only, every image kept (and the
    don't-care regions ``regions``, a mask; None: every one)."""
    optional = OPTIONAL_BOX_COLUMNS
    return dataclasses.replace(
        truth,
        **{name: getattr(truth, name)[box_index] for name in BOX_COLUMNS},
        **{
            name: None if getattr(truth, name) is None else getattr(truth, name)[box_index]
            for name in optional
        },
        cityscale_faults=_faults_slice(truth.cityscale_faults, box_index),
        **(
            {}
            if regions is None
            else {
                "region_image": truth.region_image[regions],
                "regions": truth.regions[regions],
                "region_corners": (
                    None if truth.region_corners is None else truth.region_corners[regions]
                ),
            }
        ),
    )


def _faults_slice(faults, box_index):
    """``GroundTruth.cityscale_faults`` of the boxes ``box_index`` (sorted), renumbered."""
    sliced = {}
    for field, entries in faults.items():
        at = np.searchsorted(box_index, [entry[0] for entry in entries])
        kept = [
            [int(i), *entry[1:]]
            for i, entry in zip(at, entries)
            if i < len(box_index) and box_index[i] == entry[0]
        ]
        if kept:
            sliced[field] = kept
    return sliced


def predictions_slice(predictions, start, stop, positions=None):
    """``(detections on images [start, stop), their positions in the file)``, in file
    order. ``positions``: the candidates' file positions if already narrowed down."""
    if positions is None:
        positions = np.flatnonzero((predictions.image >= start) & (predictions.image < stop))
    else:
        positions = np.sort(positions)
    sliced = dataclasses.replace(
        predictions,
        image=predictions.image[positions],
        cls=predictions.cls[positions],
        boxes=predictions.boxes[positions],
        score=predictions.score[positions],
        area=None if predictions.area is None else predictions.area[positions],
        free=None if predictions.free is None else predictions.free[positions],
        unwritable=None if predictions.unwritable is None else predictions.unwritable[positions],
        alias=None if predictions.alias is None else predictions.alias[positions],
        corners=None if predictions.corners is None else predictions.corners[positions],
        record=None if predictions.record is None else predictions.record[positions],
        score_conflicts=exact_scores.restrict(predictions.score_conflicts, positions),
    )
    return sliced, positions


def pieces(truth, predictions, ranges):
    """Yield ``(truth slice, box_index, predictions slice, positions)`` per shard, with
    one sort of the detections by image (not one scan of the file per shard)."""
    by_image = np.argsort(predictions.image, kind="stable")
    bounds = np.searchsorted(predictions.image[by_image], [r[0] for r in ranges] + [ranges[-1][1]])
    for k, (start, stop) in enumerate(ranges):
        sliced_truth, box_index = truth_slice(truth, start, stop)
        sliced, positions = predictions_slice(
            predictions, start, stop, by_image[bounds[k] : bounds[k + 1]]
        )
        yield sliced_truth, box_index, sliced, positions


def save_piece(path, truth, box_index, predictions, positions):
    """One shard's input as one ``.npz``: its truth slice, predictions slice, maps."""
    arrays = {f"truth.{k}": v for k, v in _to_arrays(truth).items()}
    arrays.update({f"predictions.{k}": v for k, v in _to_arrays(predictions).items()})
    np.savez(path, box_index=box_index, positions=positions, **arrays)


def load_piece(path):
    """``(truth slice, box_index, predictions slice, positions)`` from ``save_piece``."""
    with np.load(path, allow_pickle=False) as data:
        parts = {"truth": {}, "predictions": {}}
        for name in data.files:
            kind, _, field = name.partition(".")
            if kind in parts:
                parts[kind][field] = data[name]
        box_index, positions = data["box_index"], data["positions"]
    return (
        _from_arrays("truth", parts["truth"]),
        box_index,
        _from_arrays("predictions", parts["predictions"]),
        positions,
    )


def match_shard(truth, box_index, predictions, positions, protocol):
    """Match one shard; records whose detection positions, box indices and matches
    are the whole split's, and whose per-box fields cover the shard's boxes (listed in
    ``box_index``, returned beside them)."""
    records = match(truth, predictions, protocol)
    records.det_order = positions[records.det_order].astype(np.int64)
    records.match_box = box_index[records.match_box].astype(np.int32)
    records.det_ref_box = _mapped(records.det_ref_box, box_index).astype(np.int32)
    return records


def save_shard_records(path, records, box_index):
    """A shard's records and its ``box_index`` as one ``.npz`` (uncompressed: a shard's
    records live only until the merge)."""
    arrays = {
        f.name: getattr(records, f.name)
        for f in dataclasses.fields(records)
        if not f.name.startswith("_") and getattr(records, f.name) is not None
    }
    np.savez(path, box_index=box_index, **{k: np.asarray(v) for k, v in arrays.items()})


def load_shard_records(path):
    """``(records, box_index)`` saved by ``save_shard_records``."""
    with np.load(path, allow_pickle=False) as data:
        box_index = data["box_index"]
    return MatchRecords.load(path), box_index


def merge(shards, n_boxes):
    """One ``MatchRecords`` from the ``(records, box_index)`` of every shard: equal,
    field for field, to matching the whole split at once (match rows aside: the same
    rows, in shard order).

    Raises ValueError when the shards do not cover each of the ``n_boxes`` boxes
    exactly once, are not in the order of their runs of images, or were matched under
    different settings.
    """
    return merged_with_order(shards, n_boxes)[0]


def take_referenced(values, ref, offset=0):
    """``values[ref + offset]`` where ``ref >= 0``, else -1. Only the referenced
    entries are read: a shard (or class group) with boxes and no detection has an empty
    ``values``, and ``np.where`` would index it for the unreferenced ones too."""
    out = np.full(len(ref), -1, np.int64)
    hit = ref >= 0
    out[hit] = values[ref[hit] + offset]
    return out


def merged_with_order(shards, n_boxes):
    """``(merge(shards, n_boxes), order)``: ``order[i]`` is the position, in the shards'
    detections one after the other, of the merged records' detection i."""
    first = shards[0][0]
    for records, _ in shards[1:]:
        same = (records.protocol, records.classes, records.tie_order, records.n_images) == (
            first.protocol,
            first.classes,
            first.tie_order,
            first.n_images,
        )
        same = same and _same_repeats(records.class_repeats, first.class_repeats)
        if not same or not np.array_equal(records.thresholds, first.thresholds):
            raise ValueError("shards matched under different protocols or splits")
    covered = np.bincount(np.concatenate([b for _, b in shards]), minlength=n_boxes)
    if n_boxes and (covered != 1).any():
        box = int(np.flatnonzero(covered != 1)[0])
        raise ValueError(f"box {box} is in {int(covered[box])} shards, not exactly one")

    spans = [(r.det_image.min(), r.det_image.max()) for r, _ in shards if r.n_detections]
    if any(a[1] >= b[0] for a, b in zip(spans, spans[1:])):
        raise ValueError("shards must be given in order of their runs of images")
    det = {name: np.concatenate([getattr(r, name) for r, _ in shards]) for name in _DET_FIELDS}
    if any(r.det_key is not None for r, _ in shards):  # pycocotools' exact order, kept
        det["det_key"] = np.concatenate(
            [np.full(r.n_detections, np.nan) if r.det_key is None else r.det_key for r, _ in shards]
        )
    if any(r.det_overflow is not None for r, _ in shards):  # scores beyond float64
        det["det_overflow"] = np.concatenate(
            [
                np.zeros(r.n_detections, bool) if r.det_overflow is None else r.det_overflow
                for r, _ in shards
            ]
        )
    if any(r.det_record is not None for r, _ in shards):  # records were left out
        det["det_record"] = np.concatenate([r.file_positions() for r, _ in shards])
    outside = np.concatenate([r.det_outside for r, _ in shards], axis=1)
    # Shards hold increasing runs of images and each is in accumulation order, so in
    # their concatenation equal (class, score) under tie_order "image" already stand in
    # image, then file order: two stable sorts finish it, as in ``accumulation_order.orders``.
    # Under "file" the file positions interleave across shards and are sorted first.
    if first.tie_order == "file":
        base = np.argsort(det["det_order"], kind="stable")
    else:
        base = np.arange(len(det["det_order"]))
    key = -det["det_score"]
    if "det_key" in det:
        key = np.where(np.isnan(det["det_key"]), key, det["det_key"])
    by_score = base[np.argsort(key[base], kind="stable")]
    classes = det["det_class"].astype(np.uint16 if len(first.classes) < 2**16 else np.int64)
    order = by_score[np.argsort(classes[by_score], kind="stable")]
    new_index = np.empty(len(order), np.int64)
    new_index[order] = np.arange(len(order))
    offsets = np.cumsum([0] + [r.n_detections for r, _ in shards])

    match_det = np.concatenate(
        [new_index[r.match_det.astype(np.int64) + offsets[k]] for k, (r, _) in enumerate(shards)]
    )
    match_config = np.concatenate([r.match_config for r, _ in shards])

    box = {}
    for name in _BOX_RECORD_FIELDS:
        column = getattr(first, name)
        box[name] = np.empty(n_boxes, column.dtype)
    gt_ignored = np.empty((first.gt_ignored.shape[0], n_boxes), bool)
    for k, (records, box_index) in enumerate(shards):
        for name in _BOX_RECORD_FIELDS:
            box[name][box_index] = getattr(records, name)
        ref = records.gt_ref_det.astype(np.int64)
        box["gt_ref_det"][box_index] = take_referenced(new_index, ref, offsets[k])
        gt_ignored[:, box_index] = records.gt_ignored
    gt_void = None
    if any(r.gt_void is not None for r, _ in shards):
        gt_void = np.zeros(n_boxes, bool)
        for records, box_index in shards:
            if records.gt_void is not None:
                gt_void[box_index] = records.gt_void

    merged = MatchRecords(
        protocol=first.protocol,
        classes=first.classes,
        area_names=first.area_names,
        thresholds=first.thresholds,
        n_images=first.n_images,
        **{name: values[order] for name, values in det.items()},
        det_outside=outside[:, order],
        match_config=match_config,
        match_det=match_det.astype(np.int32),
        match_box=np.concatenate([r.match_box for r, _ in shards]),
        match_iou=np.concatenate([r.match_iou for r, _ in shards]),
        gt_ignored=gt_ignored,
        tie_order=first.tie_order,
        gt_void=gt_void,
        class_repeats=first.class_repeats,
        **box,
    )
    return merged, order


def _same_repeats(a, b):
    """Whether two records count their classes alike (``class_repeats``)."""
    return (a is None) == (b is None) and (a is None or np.array_equal(a, b))


def _mapped(index, table):
    """``table[index]`` where ``index >= 0``, -1 elsewhere."""
    index = np.asarray(index, np.int64)
    return np.where(index >= 0, table[np.maximum(index, 0)] if len(table) else -1, -1)


@dataclasses.dataclass(frozen=True)
class PredictionCounts:
    """What ``provenance.counts`` reads of a whole predictions file, without its
    columns: for the merge step, which never loads the file."""

    n: int
    dropped: int = 0
    box_policy: str = "keep"
    box_counts: dict = dataclasses.field(default_factory=dict)
    dropped_images: int = 0
    unknown_images: str = "reject"
    dropped_classes: tuple = ()
    #: The pieces these counts ride with carry ``Predictions.record`` where records
    #: were left out (engine 2.24.0); False for counts stored before: their pieces'
    #: detections know only their index among the kept ones.
    record_positions: bool = False

    @classmethod
    def of(cls, predictions):
        return cls(
            len(predictions),
            predictions.dropped,
            predictions.box_policy,
            {k: int(v) for k, v in predictions.box_counts.items()},
            predictions.dropped_images,
            predictions.unknown_images,
            tuple(predictions.dropped_classes),
            True,
        )

    @property
    def clipped(self):
        return self.box_counts.get("clipped", 0)

    def __len__(self):
        return self.n
