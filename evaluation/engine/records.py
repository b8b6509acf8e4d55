"""Match records: the result of matching, kept so that re-scoring never re-matches.

Detections are stored in *accumulation order* — class, then score descending, then
image (ascending id), then position in the predictions file — the order in which
pycocotools' ``accumulate`` walks them; under ``tie_order="file"`` (VOC devkit) ties
keep file order instead of image order. Matches are stored sparsely, one row per
(size bucket, IoU slot, detection) that found a box. Re-weighting images (bootstrap
resampling, tag slices) therefore needs no sort and no IoU: only new running sums.
"""

import json
import zipfile
from dataclasses import dataclass, field, fields

import numpy as np

from . import npz_view

#: The member of a records file holding its provenance (``MatchRecords.save``).
PROVENANCE = "provenance"


def read_provenance(path):
    """The provenance dict a records file was saved with, or None (files written
    without it: before engine 2.18, or by the platform, which keeps it elsewhere)."""
    data = npz_view.arrays(npz_view.read_file(path))
    if PROVENANCE not in data:
        return None
    return json.loads(str(data[PROVENANCE]))


class MissingReasons(ValueError):
    """Records saved before reasons were added to the engine: no reasons, no boxes."""


def run_starts(det_class, key, det_image=None):
    """Where a run of tied detections starts along an order: a new class, order key
    or (given ``det_image``) image. NaN keys tie with each other — pycocotools' and
    the toolbox's stable sorts keep NaN scores in order, together — or an image's
    weighted copies would interleave them (red team audit16 F1)."""
    change = np.ones(len(key), bool)
    change[1:] = (det_class[1:] != det_class[:-1]) | (
        (key[1:] != key[:-1]) & ~(np.isnan(key[1:]) & np.isnan(key[:-1]))
    )
    if det_image is not None:
        change[1:] |= det_image[1:] != det_image[:-1]
    return change


@dataclass(eq=False)
class MatchRecords:
    """Per-detection outcomes for every size bucket and IoU slot.

    A detection is, for size bucket a and slot t: a *true positive* if it matched a
    box that counts in bucket a; *ignored* if it matched an ignored box (crowd,
    difficult, outside the bucket) or matched nothing and lies outside the bucket
    itself; otherwise a *false positive*.

    Attributes
    ----------
    det_rank : int32 array
        Rank within its (image, class) by descending score; a cap of ``m``
        detections per image keeps ranks ``< m``.
    det_outside : bool array (areas, detections)
        The detection's own area is outside the bucket.
    match_config, match_det, match_box, match_iou : arrays (matches,)
        ``config = area * slots + slot``; ``match_box`` indexes the split's boxes.
    gt_ignored : bool array (areas, boxes)
        Ground truth that does not count towards the number of positives.
    det_box : float64 array (detections, 4)
        The detection's ``[x, y, w, h]``, for export and drill-down.
    det_reason, det_ref_box, det_ref_iou : arrays (detections,)
        Why it is what it is at the primary IoU (``reasons.DETECTION_REASONS`` codes),
        the box that reason is about (-1 if none) and its IoU (NaN if none).
    gt_reason, gt_ref_det, gt_ref_iou : arrays (boxes,)
        ``reasons.BOX_REASONS`` codes, the related detection (-1) and its IoU (NaN).

    The last seven are None for records saved before reasons existed (``has_reasons``;
    ENGINE_VERSION did not change with them, as no number did);
    ``reasons.attach`` computes them from the split and the predictions.
    """

    protocol: str
    classes: tuple
    area_names: tuple
    thresholds: np.ndarray  # (slots, classes)
    n_images: int
    det_class: np.ndarray
    det_image: np.ndarray
    det_score: np.ndarray
    det_rank: np.ndarray
    det_order: np.ndarray
    det_outside: np.ndarray
    match_config: np.ndarray
    match_det: np.ndarray
    match_box: np.ndarray
    match_iou: np.ndarray
    gt_class: np.ndarray
    gt_image: np.ndarray
    gt_ignored: np.ndarray
    tie_order: str = "image"  # records saved before engine 2.1 were all "image"
    det_box: np.ndarray | None = None
    det_reason: np.ndarray | None = None
    det_ref_box: np.ndarray | None = None
    det_ref_iou: np.ndarray | None = None
    gt_reason: np.ndarray | None = None
    gt_ref_det: np.ndarray | None = None
    gt_ref_iou: np.ndarray | None = None
    #: Boxes a match with which is no true positive (annotation id 0 under ``coco``:
    #: ``protocols.Protocol.zero_id_unmatched``); None when there are none.
    gt_void: np.ndarray | None = None
    #: Per detection of a class pycocotools orders otherwise than float64 (integer
    #: scores beyond 2**53, ``loaders.exact_scores``), the key of that order: within
    #: the class by ascending key, then image, then ``det_rank`` (equal keys are
    #: pycocotools' ties). NaN for the other detections (score descending, then image,
    #: then file position); None when every class follows its float64 scores.
    det_key: np.ndarray | None = None
    #: Per detection, whether its score is an integer beyond float64's range
    #: (``Predictions.overflowing``; shown as infinite): pycocotools 2.0.11's precision
    #: fill stops at the first recall point landing on it (``average_precision.fill_stops``).
    #: Kept under the COCO order only; None when the file holds no such score.
    det_overflow: np.ndarray | None = None
    #: Per class, how often pycocotools' ``p.catIds`` lists it (``GroundTruth.
    #: class_repeats``), kept under its family (``tie_order="image"``) only: every mean
    #: over classes counts the class that often (``scoring.mean_present``). None: once.
    class_repeats: np.ndarray | None = None
    #: Per detection, the position of its record in the predictions file
    #: (``Predictions.record``, int64): where the loaders left records out (classes or
    #: images outside the split, fields pycocotools never reads) or laid them out "as
    #: given", ``det_order`` (the index among the loaded detections) is not it. None:
    #: ``det_order`` is the file position — or, for records saved before engine 2.24.0,
    #: which never kept it, the file position only if nothing was left out
    #: (``file_positions``).
    det_record: np.ndarray | None = None
    _sparse: dict = field(default_factory=dict, repr=False)

    @property
    def n_detections(self):
        return len(self.det_class)

    def order_key(self):
        """What orders detections within a class before image: ``det_key`` where
        kept, else ``-det_score``."""
        if self.det_key is None:
            return -self.det_score
        return np.where(np.isnan(self.det_key), -self.det_score, self.det_key)

    def file_positions(self):
        """Each detection's record position in the predictions file, 0-based:
        ``det_record`` where kept, else ``det_order``."""
        return self.det_order if self.det_record is None else self.det_record

    @property
    def has_reasons(self):
        return self.det_reason is not None and self.det_box is not None

    def require_reasons(self):
        """Raise a clear error for records saved before reasons existed."""
        if not self.has_reasons:
            raise MissingReasons(
                "these match records were saved before per-detection reasons existed and carry "
                "none; "
                "score the predictions again, or add them with reasons.attach(records, "
                "truth, predictions.boxes[records.det_order], protocol)"
            )

    @property
    def n_slots(self):
        return self.thresholds.shape[0]

    def class_bounds(self):
        """Start of each class's run of detections, plus the end: shape (K + 1,)."""
        return np.searchsorted(self.det_class, np.arange(len(self.classes) + 1))

    def n_positives(self, area=0, weights=None):
        """Non-ignored ground-truth count per class, weighted per image if asked."""
        w = (~self.gt_ignored[area]).astype(np.int64)
        if weights is not None:
            w = w * weights[self.gt_image]
        return np.bincount(self.gt_class, weights=w, minlength=len(self.classes))

    def sparse_outcomes(self, area):
        """Weight-independent sparse views of one size bucket, computed once.

        ``tp_slot, tp_det``: every true positive, slot-major then rank order.
        Counting: a detection counts (TP or FP) at slot t unless ignored; the base
        is "unmatched" (counts iff inside the bucket) and ``delta_*`` lists where a
        match changes that: key ``t * n + detection``, sign +1 if it now counts.
        """
        if area not in self._sparse:
            n = self.n_detections
            in_area = self.match_config // self.n_slots == area
            slot = (self.match_config[in_area] % self.n_slots).astype(np.int64)
            det = self.match_det[in_area].astype(np.int64)
            box_ignored = self.gt_ignored[area, self.match_box[in_area]]
            key = slot * n + det
            # A match with a void box that counts is read as no match (pycocotools:
            # dtm holds id 0): not a TP, counted unless the detection is outside.
            void = np.zeros(len(key), bool)
            if self.gt_void is not None:
                void = self.gt_void[self.match_box[in_area]] & ~box_ignored
            tp = np.sort(key[~box_ignored & ~void])
            outside = self.det_outside[area, det]
            changes = (box_ignored != outside) & ~void
            delta_order = np.argsort(key[changes])
            self._sparse[area] = {
                **self._tie_groups(),
                "tp_slot": tp // max(n, 1),
                "tp_det": tp % max(n, 1),
                "counted": ~self.det_outside[area],
                "delta_key": key[changes][delta_order],
                "delta_det": det[changes][delta_order],
                "delta_sign": np.where(outside[changes], 1, -1)[delta_order],
            }
        return self._sparse[area]

    def _tie_groups(self):
        """Runs of detections with one class, image and score (order key, where
        ``det_key`` is kept), adjacent in accumulation order: the copies of a weighted
        image repeat each run as a whole.

        Under ``tie_order="image"`` the copies of an image have adjacent ids, so copy
        c's tied detections all precede copy c + 1's. Under ``"file"`` the rule is that
        a weight w repeats each *record* w times in place (one copy per image copy),
        so every detection is a run of its own.
        """
        n = self.n_detections
        if self.tie_order == "file":
            return {"tie_start": np.arange(n), "tie_end": np.arange(1, n + 1)}
        change = run_starts(self.det_class, self.order_key(), self.det_image)
        starts = np.flatnonzero(change)
        lengths = np.diff(np.r_[starts, n])
        return {
            "tie_start": np.repeat(starts, lengths),
            "tie_end": np.repeat(starts + lengths, lengths),
        }

    def outcomes(self, area=0, slot=0):
        """Dense ``(is_tp, is_ignored)`` boolean arrays for one bucket and slot."""
        sparse = self.sparse_outcomes(area)
        is_tp = np.zeros(self.n_detections, bool)
        is_tp[sparse["tp_det"][sparse["tp_slot"] == slot]] = True
        counted = sparse["counted"].copy()
        in_slot = sparse["delta_key"] // max(self.n_detections, 1) == slot
        counted[sparse["delta_det"][in_slot]] = sparse["delta_sign"][in_slot] > 0
        return is_tp, ~counted

    def matched_box(self, slot=0, area=0):
        """Index of each detection's matched box (or -1), for drill-down."""
        out = np.full(self.n_detections, -1, np.int64)
        chosen = self.match_config == area * self.n_slots + slot
        out[self.match_det[chosen]] = self.match_box[chosen]
        return out

    def save(self, path, provenance=None):
        """Write as an uncompressed ``.npz`` file: the cause pages read and hash-check it
        on a process's first request, and inflating is most of that time (500,000
        detections: 65 MB stored, 0.12-0.18 s of CPU to hash and load, against 29 MB and
        0.40 s deflated at level 1; ``np.load`` reads either, so older files still load).

        ``provenance``: a JSON-able dict of what the records were scored with (the CLI's
        ``--records``: protocol and its version, engine version, box policy, the split's
        fingerprint, the protocol record), kept as the ``PROVENANCE`` member and read by
        ``read_provenance``; ``load`` ignores it, so files with and without it load alike.
        """
        arrays = {}
        if provenance is not None:
            arrays[PROVENANCE] = np.array(json.dumps(provenance, sort_keys=True))
        for f in fields(self):
            if f.name.startswith("_"):
                continue
            value = getattr(self, f.name)
            if value is None:
                continue
            arrays[f.name] = value if isinstance(value, np.ndarray) else np.array(value)
        with zipfile.ZipFile(path, "w", zipfile.ZIP_STORED) as z:
            for name, value in arrays.items():
                with z.open(f"{name}.npy", "w", force_zip64=True) as f:
                    np.lib.format.write_array(f, np.asanyarray(value), allow_pickle=False)

    @classmethod
    def load(cls, path):
        """Records from a file written by ``save`` (or deflated, by older versions)."""
        return cls.from_buffer(npz_view.read_file(path))

    @classmethod
    def from_buffer(cls, buffer):
        """Records from a records file's bytes (``npz_view.read_file``): the arrays are views
        into it, not copies (``npz_view``), so a caller that hash-checked ``buffer``
        uses exactly the bytes it checked."""
        data = npz_view.arrays(buffer)
        values = {
            f.name: data[f.name]
            for f in fields(cls)
            if not f.name.startswith("_") and f.name in data
        }
        values["tie_order"] = str(values.get("tie_order", "image"))
        values["protocol"] = str(values["protocol"])
        values["classes"] = tuple(str(c) for c in values["classes"])
        values["area_names"] = tuple(str(a) for a in values["area_names"])
        values["n_images"] = int(values["n_images"])
        return cls(**values)
