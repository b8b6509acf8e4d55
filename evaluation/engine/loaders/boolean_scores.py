"""Scores written as JSON booleans, where pycocotools 2.0.11 cannot sort them.

pycocotools reads ``true``/``false`` with Python's ``json`` as ``bool``s and ranks an
image's detections with ``np.argsort([-d['score'] ...])`` (Python's ``-True`` is ``-1``:
no error). ``COCOeval.accumulate`` then runs, for each category (sorted ids), area range
and ``maxDet`` of ``params.maxDets``, ``dtScores = np.concatenate([e['dtScores']
[0:maxDet] for e in E])`` and ``np.argsort(-dtScores, kind='mergesort')``. ``E`` holds
every image with ground truth or a detection of the category (``evaluateImg`` gives None
for an image with neither); each list converts on its own, and an image with ground
truth and no detection gives an empty float64 list. So the joined array is boolean —
and numpy's ``-`` on it raises TypeError — exactly when every image of ``E`` has a
detection of the class and its first ``maxDet`` by score are all booleans (``True``
ties with ``1`` and ``1.0``, ties in file order). A longer prefix holds the shorter
one, so a protocol's smallest cap decides (``coco``: ``maxDet`` 1, the top detection of
each image; ``recall40``: no cap, every detection); the area ranges share the lists.
Checked by running pycocotools 2.0.11 (``tests/engine/test_boolean_scores.py``).

The engine reads a boolean as 1.0/0.0. ``Tops`` finds, from those float64 columns, the
classes where pycocotools could raise (every image of ``E`` has a detection and its top
one scores 0 or 1); only when there is one, and the file's bytes hold ``true`` or
``false``, is the file read again, loosely
(``loose_scores._affected``, which tells a boolean from a number), and ``entries``
gives, per such class, the *depth*: the longest cap under which pycocotools raises
(``None``: all of every image's detections are booleans, no cap helps). ``refusal``
decides, per protocol, at compare time (``data.Predictions.score_conflict``).
"""

import numpy as np

from ..pedestrian_setups import category_one
from . import cityscale_booleans, exact_scores, uncompared

#: The key of these entries in ``Predictions.score_conflicts``.
KEY = "booleans"
_NO_BREAK = np.iinfo(np.int64).max


#: Up to this many (image, class) groups ``Tops`` keeps one float32 per group (16 MB),
#: filled with ``np.fmax.at``; beyond, (group, score) pairs, sorted.
DENSE_GROUPS = 1 << 22


class Tops:
    """Per (image, class), the top score pycocotools ranks first (the highest, NaN
    last; a group of NaN alone: -inf), gathered a block at a time. Memory: one float32
    per (image, class) of the split up to ``DENSE_GROUPS``, else one (group, score)
    pair per group holding a detection. float32 may round a score to 0 or 1: a
    candidate too many, which ``entries`` reads exactly."""

    def __init__(self, truth):
        self._n = len(truth.classes)
        self._truth = truth
        size = truth.n_images * self._n
        self._dense = np.full(size, np.nan, np.float32) if size <= DENSE_GROUPS else None
        self._groups, self._tops = [], []
        self._held = self._kept = 0
        self.zero_one = np.zeros(self._n, bool)  # per class: some score is 0 or 1

    def add(self, image, cls, score, alias=None):
        # ids np.unique loses: never joined; a changed value's (``alias``) is
        seen = self._truth.looked_up(image, cls, alias)
        if not seen.all():
            image, cls = np.asarray(image)[seen], np.asarray(cls)[seen]
            score = np.asarray(score)[seen]
        group = np.asarray(image, np.int64) * self._n + np.asarray(cls, np.int64)
        score = np.asarray(score, np.float64)
        self.zero_one[np.asarray(cls)[(score == 0.0) | (score == 1.0)]] = True
        top = np.where(np.isnan(score), -np.inf, score)
        if self._dense is not None:
            with np.errstate(over="ignore", under="ignore"):  # huge: inf; subnormal: 0
                np.fmax.at(self._dense, group, top.astype(np.float32))
            return
        group, top = _reduced(group, top)
        self._groups.append(group)
        self._tops.append(top)
        self._held += len(group)
        if self._held > 2 * self._kept:  # fold the blocks' pairs: one per group
            group, top = _reduced(np.concatenate(self._groups), np.concatenate(self._tops))
            self._groups, self._tops = [group], [top]
            self._held = self._kept = len(group)

    def candidates(self):
        """The classes where every image with ground truth or a detection of the class
        has a detection whose top score is 0 or 1 (a boolean read as a number may be
        all pycocotools joins there)."""
        if self._dense is not None:
            group = np.flatnonzero(~np.isnan(self._dense))
            top = self._dense[group]
        else:
            group = np.concatenate(self._groups) if self._groups else np.zeros(0, np.int64)
            top = np.concatenate(self._tops) if self._tops else np.zeros(0)
            group, top = _reduced(group, top)
        cls = group % self._n
        ok = np.zeros(self._n, bool)
        ok[cls] = True
        ok[cls[(top != 0.0) & (top != 1.0)]] = False
        truth_groups, truth_class = self._truth_groups()
        lacking = ~np.isin(truth_groups, group)  # ground truth and no detection
        ok[truth_class[lacking]] = False
        return np.flatnonzero(ok)

    def _truth_groups(self):
        """``(group, class)`` of each box its reference looks up (``looked_up``)."""
        truth = self._truth
        seen = _boxes_looked_up(truth)
        image, cls = truth.box_image[seen].astype(np.int64), truth.box_class[seen]
        return image * self._n + cls, cls

    def cityscale_candidates(self):
        """The classes of category id 1 where the CityPersons script could join booleans
        alone (``cityscale_booleans``): some detection scores 0 or 1, and every image
        with a box of the class has a detection of it."""
        ok = category_one(self._truth) & self.zero_one
        if not ok.any():
            return np.zeros(0, np.int64)
        held = self._groups_held()
        truth_groups, truth_class = self._truth_groups()
        ok[truth_class[~np.isin(truth_groups, held)]] = False
        return np.flatnonzero(ok)

    def _groups_held(self):
        if self._dense is not None:
            return np.flatnonzero(~np.isnan(self._dense))
        group = np.concatenate(self._groups) if self._groups else np.zeros(0, np.int64)
        return np.unique(group)


def _reduced(group, top):
    if not len(group):
        return group, top
    order = np.argsort(group, kind="stable")
    group, top = group[order], top[order]
    starts = np.flatnonzero(np.r_[True, group[1:] != group[:-1]])
    return group[starts], np.maximum.reduceat(top, starts)


def joined(conflicts, path, truth, tops, wide):
    """``conflicts`` (``exact_scores.check``) with the ``entries`` of the file under
    ``KEY`` where there are any, and the CityPersons script's refusal under
    ``cityscale_booleans.KEY`` where it raises (the file read again, once, only for
    ``tops``' candidates)."""
    classes, city = tops.candidates(), tops.cityscale_candidates()
    if not (len(classes) or len(city)) or not _holds_literal(path):
        return conflicts
    rows, big = exact_scores._affected(path, truth, np.union1d(classes, city), wide)
    rows, big = _looked_up_rows(truth, rows, big)
    found = entries(path, truth, classes, wide, rows)
    out = {**conflicts, KEY: found} if found else conflicts
    refused = cityscale_booleans.refusal(path, truth, rows, big, city)
    return {**out, cityscale_booleans.KEY: refused} if refused else out


def entries(path, truth, classes, wide, rows=None):
    """``[{"class", "depth", "path", "record", "field", "message"}]`` for the
    ``classes`` (``Tops.candidates``) where pycocotools raises under some cap: ``depth``
    the largest cap it raises under (None: any). The record named is the first in file
    order of the class's top detections per image (all booleans; what pycocotools joins
    under every cap). ``rows``: ``exact_scores._affected`` of (at least) ``classes``,
    else the file is read for them."""
    if not len(classes):
        return []
    if rows is None:
        if not _holds_literal(path):
            return []
        rows, _ = _looked_up_rows(truth, *exact_scores._affected(path, truth, classes, wide))
    n = len(truth.classes)
    group = rows["image"].astype(np.int64) * n + rows["cls"]
    rank = uncompared.ranks(group, rows["score"])
    is_bool = rows["kind"] == exact_scores._BOOL
    out = []
    seen = _boxes_looked_up(truth)
    for k in np.asarray(classes).tolist():
        mine = rows["cls"] == k
        g, r, b, record = group[mine], rank[mine], is_bool[mine], rows["record"][mine]
        images = np.unique(truth.box_image[(truth.box_class == k) & seen])
        if not len(g) or not np.isin(images.astype(np.int64) * n + k, g).all():
            continue  # an image with ground truth and no detection: a float64 list
        order = np.lexsort((r, g))
        g, r, b, record = g[order], r[order], b[order], record[order]
        starts = np.flatnonzero(np.r_[True, g[1:] != g[:-1]])
        first_number = np.minimum.reduceat(np.where(b, _NO_BREAK, r), starts)
        if (first_number == 0).any():
            continue  # some image's top detection is a number
        finite = first_number[first_number != _NO_BREAK]
        depth = int(finite.min()) if len(finite) else None
        first = starts[np.argmin(record[starts])]
        value = bool(rows["score"][mine][order][first])
        out.append(_entry(path, truth, k, depth, int(record[first]), value))
    return out


def _looked_up_rows(truth, rows, big):
    """``rows`` (``exact_scores._affected``) less the detections on an image or of a
    class whose id ``np.unique`` loses (``GroundTruth.looked_up``): pycocotools and the
    CityPersons script never fetch them, so never join their scores. ``big`` (keyed by
    record) is passed on as it is."""
    seen = truth.looked_up(rows["image"], rows["cls"], rows.get("alias"))
    if seen.all():
        return rows, big
    return {name: column[seen] for name, column in rows.items()}, big


def _boxes_looked_up(truth):
    """Per box, whether pycocotools' ``evaluate`` finds it (``GroundTruth.
    left_out_boxes``: not of an id its ``np.unique`` loses, or written with the value
    it changed one into)."""
    left_out = truth.left_out_boxes(True)
    return np.ones(truth.n_boxes, bool) if left_out is None else ~left_out


def _holds_literal(path, size=1 << 22):
    """Whether the file's bytes hold ``true`` or ``false`` anywhere (a JSON boolean is
    exactly those UTF-8 bytes; in a string too, which only costs the loose read): a
    file of numbers scoring 1.0 or 0.0 on top of every image is not read loosely."""
    tail = b""
    with open(path, "rb") as f:
        while block := f.read(size):
            block = tail + block
            if b"true" in block or b"false" in block:
                return True
            tail = block[-4:]
    return False


def _entry(path, truth, k, depth, record, value):
    if depth is None:
        joined = "every detection is one"
    elif depth == 1:
        joined = "the top-scored detection is one"
    else:
        joined = f"the first {depth} by score are"
    return {
        "class": k,
        "depth": depth,
        "path": str(path),
        "record": f"record {record}",
        "field": "score",
        "message": (
            f"score {'true' if value else 'false'} is a boolean, and pycocotools 2.0.11 "
            f"meets booleans alone in class {truth.classes[k]!r}: on every image with "
            f"ground truth or a detection of the class, {joined} (this record is the "
            "first of those in file order). Its accumulate joins each image's first "
            "maxDet scores (np.concatenate; maxDet: this protocol's smallest per-image "
            "cap) into a boolean array and negates it (-dtScores), where numpy raises "
            "TypeError. Write the scores as numbers (1.0, 0.0) to have them scored"
        ),
    }


def refusal(found, protocol):
    """The entry of ``found`` (``entries``) pycocotools raises on under ``protocol`` (its
    smallest per-image cap, ``accumulate`` walking ``maxDets`` upwards), or None: only
    under the COCO order (``tie_order="image"``, pycocotools' family)."""
    if not found or protocol.tie_order != "image":
        return None
    caps = [c for c in protocol.max_detections if c is not None]
    cap = min(caps) if caps else None
    for entry in found:
        depth = entry["depth"]
        if depth is None or (cap is not None and cap <= depth):
            return entry
    return None
