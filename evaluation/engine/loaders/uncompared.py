"""Detections pycocotools 2.0.11 never compares, and the records it would fail on only
if it did.

``COCOeval.computeIoU`` and ``evaluateImg`` read a detection's ``bbox`` and ``area``
only for the first ``maxDets[-1] = 100`` of its (image, category) by score (``np.argsort
([-d['score'] ...], kind='mergesort')``: descending, ties in file order, NaN last), and
only for categories the split lists (``catIds``). So a record whose bbox or area cannot
be read (``result_readings.Decoded.unfit``) makes pycocotools raise only when it is among
those; else the file scores as if the record were absent. ``ranks`` gives each
detection's place within its (image, class); ``resolve`` (``detection_blocks``) refuses
an unfit record ranked below ``CAP`` naming its field, and leaves out and counts one
ranked at or beyond it (``box_counts[COUNT]``). A file read a block at a time cannot
rank a record from its own block: ``FileRanks`` reads the file again (only when a block
holds an unfit record of a listed class) for the groups that hold one. An unfit entry
with a third element, a kind (``mask_results.ONE_MASK``, ``truthless_boxes.kind``), is
loaded as any record and refused only where it is compared beside a record of another
kind, or, a box read only where no truth is, in a group holding truth (``mixed``).

Ranks are float64's unless a group holds a score of magnitude >= 2**53: pycocotools
keeps JSON integers as Python ints, and numpy ranks such a list exactly (int64, uint64
or objects), where float64 ties or rounds them (``exact_scores``). Those groups are
ranked by pycocotools' own call on the exact values (``exact``, given by
``exact_scores.cap_values``: the file read again, loosely, only then).
"""

import numpy as np

#: pycocotools' per-image cap on compared detections (``maxDets[-1]``).
CAP = 100
#: The ``box_counts`` key of the unfit detections left out beyond the cap.
COUNT = "uncompared_unfit"


def ranks(group, score, records=None, exact=None):
    """Each detection's 0-based place within its ``group`` (image and class as one
    integer): descending score, ties in row order, NaN last, as ``np.argsort(-score,
    kind='mergesort')`` ranks an image's detections of a class. ``exact(records, group,
    score)`` (``records``: the file's record numbers, ascending) gives None, or the rows
    of the groups pycocotools ranks by exact integers and their Python scores: those
    groups are ranked as ``evaluateImg`` does, ``np.argsort([-d['score'] for d in dt],
    kind='mergesort')``."""
    n = len(score)
    by_score = np.argsort(-np.asarray(score, np.float64), kind="stable")
    order = by_score[np.argsort(group[by_score], kind="stable")]
    sorted_group = group[order]
    starts = np.flatnonzero(np.r_[True, sorted_group[1:] != sorted_group[:-1]])
    sizes = np.diff(np.r_[starts, n])
    rank = np.empty(n, np.int64)
    rank[order] = np.arange(n) - np.repeat(starts, sizes)
    held = None if exact is None else exact(records, group, score)
    if held is not None:
        rows, values = held
        by_group = np.argsort(group[rows], kind="stable")  # row (file) order in a group
        bounds = np.flatnonzero(np.diff(group[rows][by_group])) + 1
        for members in np.split(by_group, bounds):
            theirs = np.argsort([-values[i] for i in members.tolist()], kind="mergesort")
            rank[rows[members[theirs]]] = np.arange(len(members))
    return rank


def fields(unfit):
    """Where ``unfit`` (an object column: None, ``(field, message)`` or ``(field,
    message, kind)``) holds a record pycocotools fails on whenever it compares it."""
    return np.fromiter((u is not None and len(u) == 2 for u in unfit), bool, len(unfit))


def kinds(unfit):
    """Per record the ``kind`` of a ``(field, message, kind)`` entry of ``unfit``, else
    None: a record pycocotools compares only beside others of its kind (``uniform``);
    it is loaded as any other."""
    out = np.full(len(unfit), None, object)  # set one by one: a kind may be a tuple
    for i, u in enumerate(unfit):
        if u is not None and len(u) == 3:
            out[i] = u[2]
    return out


def mixed(group, rank, kind, truthful=None):
    """Per row: whether it has a kind and is compared (ranked below ``CAP``) in a group
    whose compared rows do not all have that kind: there pycocotools raises (a list of
    one mask beside a single mask: ``evaluateImg``'s ``np.array`` of a one-entry array
    area beside a number, ValueError; ``maskUtils.iou`` on boxes of two kinds,
    ``truthless_boxes``) — or whose kind is a box read only where no truth is
    (``truthless_boxes.truthless``) and whose group holds truth (``truthful(groups)``:
    per group, whether it does)."""
    from . import truthless_boxes

    out = np.zeros(len(group), bool)
    keyed = np.flatnonzero((kind != None) & (rank < CAP))  # noqa: E711 - elementwise
    if not len(keyed):
        return out
    if truthful is not None:
        needs = np.fromiter((truthless_boxes.truthless(k) for k in kind[keyed]), bool, len(keyed))
        out[keyed[needs]] = truthful(group[keyed[needs]])
    watched = np.isin(group, np.unique(group[keyed]))
    seen = {}
    for g, k in zip(group[watched & (rank < CAP)].tolist(), kind[watched & (rank < CAP)]):
        seen.setdefault(g, set()).add(k)
    for i in keyed.tolist():
        out[i] |= seen[int(group[i])] != {kind[i]}
    return out


class FileRanks:
    """Ranks of unfit records of a file read a block at a time: on first call, two
    passes over the file's blocks (``blocks()``: ``(records, group, score, unfit)``
    per block, ``records`` the file's record numbers, ``group`` -1 where the record is
    not compared at all) find the groups holding an unfit record, then rank those
    groups' detections (``ranks``, with ``exact``; ``mixed`` with ``truthful``).
    Calling it with record numbers gives their ranks."""

    def __init__(self, blocks, exact=None, truthful=None):
        self._blocks = blocks
        self._exact = exact
        self._truthful = truthful
        self._rank = None
        self._mixed = None

    def __call__(self, records):
        if self._rank is None:
            self._read()
        return np.array([self._rank[r] for r in np.asarray(records).tolist()], np.int64)

    def mixed(self, records):
        """``mixed`` of these records (each with a kind) within the whole file."""
        if self._rank is None:
            self._read()
        return np.array([r in self._mixed for r in np.asarray(records).tolist()], bool)

    def _read(self):
        wanted = set()
        for _, group, _, unfit in self._blocks():
            marked = np.fromiter((u is not None for u in unfit), bool, len(unfit))
            wanted.update(group[marked & (group >= 0)].tolist())
        wanted = np.array(sorted(wanted), np.int64)
        records, groups, scores, kind = [], [], [], []
        for rec, group, score, unfit in self._blocks():
            keep = np.isin(group, wanted)
            records.append(rec[keep])
            groups.append(group[keep])
            scores.append(score[keep])
            kind.append(kinds(unfit[keep]))
        records = np.concatenate(records) if records else np.zeros(0, np.int64)
        groups = np.concatenate(groups) if groups else np.zeros(0, np.int64)
        rank = ranks(
            groups,
            np.concatenate(scores) if scores else np.zeros(0),
            records,
            self._exact,
        )
        kind = np.concatenate(kind) if kind else np.zeros(0, object)
        self._mixed = set(records[mixed(groups, rank, kind, self._truthful)].tolist())
        self._rank = dict(zip(records.tolist(), rank.tolist()))
