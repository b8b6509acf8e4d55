"""Match records: the result of matching, kept so that re-scoring never re-matches.

Detections are stored in *accumulation order* — class, then score descending, then
image (ascending id), then position in the predictions file — the order in which
pycocotools' ``accumulate`` walks them. Re-weighting images (bootstrap resampling,
tag slices) therefore needs no sort and no IoU: only new cumulative sums.
"""

from dataclasses import dataclass, fields

import numpy as np


@dataclass(eq=False)
class MatchRecords:
    """Per-detection outcomes for every size bucket and IoU slot.

    Attributes
    ----------
    tp, ignored : bool arrays of shape (areas, slots, detections)
        A detection that is neither TP nor ignored is a false positive.
    matched_gt : int32 array (slots, detections)
        Index of the matched ground-truth box for the ``all`` size bucket, -1 if none.
    matched_iou : float64 array (detections,)
        IoU with the matched box at the primary slot (0 when unmatched).
    det_rank : int32 array
        Rank of the detection within its (image, class) by descending score; a cap
        of ``m`` detections per image keeps ranks ``< m``.
    gt_ignored : bool array (areas, boxes)
        Ground truth that does not count towards the number of positives.
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
    tp: np.ndarray
    ignored: np.ndarray
    matched_gt: np.ndarray
    matched_iou: np.ndarray
    gt_class: np.ndarray
    gt_image: np.ndarray
    gt_ignored: np.ndarray

    @property
    def n_detections(self):
        return len(self.det_class)

    def class_bounds(self):
        """Start of each class's run of detections, plus the end: shape (K + 1,)."""
        return np.searchsorted(self.det_class, np.arange(len(self.classes) + 1))

    def n_positives(self, area=0, weights=None):
        """Non-ignored ground-truth count per class, weighted per image if asked."""
        counted = ~self.gt_ignored[area]
        w = counted.astype(np.int64)
        if weights is not None:
            w = w * weights[self.gt_image]
        return np.bincount(self.gt_class, weights=w, minlength=len(self.classes))

    def save(self, path):
        """Write as an ``.npz`` file (compressed; flags bit-packed)."""
        arrays = {}
        for f in fields(self):
            value = getattr(self, f.name)
            if f.name in ("tp", "ignored", "gt_ignored"):
                arrays[f.name + "_shape"] = np.array(value.shape)
                arrays[f.name] = np.packbits(value, axis=None)
            elif isinstance(value, np.ndarray):
                arrays[f.name] = value
            else:
                arrays[f.name] = np.array(value)
        np.savez_compressed(path, **arrays)

    @classmethod
    def load(cls, path):
        with np.load(path, allow_pickle=False) as data:
            values = {}
            for f in fields(cls):
                if f.name in ("tp", "ignored", "gt_ignored"):
                    shape = tuple(data[f.name + "_shape"])
                    count = int(np.prod(shape))
                    values[f.name] = (
                        np.unpackbits(data[f.name], count=count).astype(bool).reshape(shape)
                    )
                else:
                    values[f.name] = data[f.name]
            values["protocol"] = str(values["protocol"])
            values["classes"] = tuple(str(c) for c in values["classes"])
            values["area_names"] = tuple(str(a) for a in values["area_names"])
            values["n_images"] = int(values["n_images"])
        return cls(**values)
