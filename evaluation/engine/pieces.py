"""A predictions file streamed into per-shard pieces, at flat memory.

``shards.pieces`` cuts loaded columns into one piece per run of images; this builds
the same pieces (``shards.save_piece`` files whose every field equals theirs) without
ever holding the file's columns: the file is read a block at a time
(``loaders.stream_predictions``), each block's detections are appended to their
shard's spill file (fixed-size rows, in file order), and once the whole file has been
read — its counts are only known then, and every piece carries them — each shard's
spill file is read back and written as a piece, one shard at a time. Peak memory: one
block of the file plus one shard's detections, whatever the file's size.
"""

import dataclasses
import os

import numpy as np

from .boxes import edges
from .data import Predictions
from .loaders import (
    boolean_scores,
    detection_blocks,
    exact_scores,
    stream_format,
    stream_predictions,
)
from .shards import PredictionCounts, save_piece, truth_slice

#: One detection in a spill file: its columns and its position in the whole file's
#: columns (after dropped records), as ``shards.pieces`` gives them.
SPILL_ROW = np.dtype(
    [
        ("image", "<i4"),
        ("cls", "<i4"),
        ("boxes", "<f8", (4,)),
        ("score", "<f8"),
        ("area", "<f8"),  # the mask's area when the file gives masks, else unused
        ("free", "u1"),  # the detection's id leaves a matched box free (as_given)
        ("unwritable", "<i8"),  # its record if numpy cannot write its id (as_given)
        ("alias", "u1"),  # under a lost category's changed value (Predictions.alias)
        ("corners", "<f8", (4,)),  # as read (Predictions.corners), else x, y, x + w, y + h
        ("position", "<i8"),
        ("record", "<i8"),  # its record's position in the file (Predictions.record)
    ]
)


@dataclasses.dataclass
class StreamedPieces:
    """What ``stream_pieces`` wrote: one piece file per shard of ``ranges`` (paths in
    shard order), each shard's detection count, and the whole file's counts."""

    paths: list
    ranges: list
    detections: list
    counts: PredictionCounts


def stream_pieces(path, truth, ranges, directory, *, name="piece-{k}.npz", **options):
    """Write one ``shards.save_piece`` file per shard of ``ranges`` (contiguous
    ``(start, stop)`` runs of image indices covering the split, ``shards.plan``) into
    ``directory``, streaming the predictions file at ``path`` once.

    Each piece equals, field for field and bit for bit, the piece ``shards.pieces``
    makes of ``load_predictions(path, truth, **options)``: the truth slice of its
    images, its detections in file order with their positions in the whole file, and
    the whole file's counts (``dropped``, ``dropped_images``, ``box_counts``).
    ``options``: ``fmt``, ``boxes``, ``unknown_classes``, ``unknown_images``, ``ids``
    as for ``load_predictions`` (JSON and CSV files only).

    Raises ``InputError`` as ``load_predictions`` would; then no piece is written (spill
    files already written stay in ``directory``, which the caller owns and discards).
    """
    starts = np.array([start for start, _ in ranges], np.int64)
    spills = [os.path.join(directory, f"spill-{k}.bin") for k in range(len(ranges))]
    detections = [0] * len(ranges)
    totals = {"n": 0, "dropped": 0, "dropped_images": 0, "box_counts": None, "classes": ()}
    masks = False  # the file is read as masks (every block alike)
    frees = False  # some detection's id leaves a box free (a file read as given)
    bad_ids = False  # some detection's id cannot be written as a float (as given)
    aliases = False  # some detection is under a changed value (Predictions.alias)
    corners = False  # some detection's corners say more than its xywh (Predictions.corners)
    moved = False  # some detection's record is not its position (Predictions.record)
    policy = options.get("boxes") or truth.box_policy
    suspects = np.zeros(len(truth.classes), bool)  # classes holding a score >= 2**53
    infinite = False  # some loaded box is infinite
    tops = boolean_scores.Tops(truth)  # booleans pycocotools cannot sort
    for block in stream_predictions(path, truth, **options):
        tops.add(block.image, block.cls, block.score, block.alias)
        suspects[block.cls[exact_scores.suspect(block.score)]] = True
        infinite = infinite or block.infinite_box  # an integer beyond float64?
        rows = np.empty(len(block.score), SPILL_ROW)
        rows["image"], rows["cls"] = block.image, block.cls
        rows["boxes"], rows["score"] = block.boxes, block.score
        masks = block.area is not None
        rows["area"] = block.area if masks else 0.0
        frees = frees or block.free is not None
        rows["free"] = 0 if block.free is None else block.free
        bad_ids = bad_ids or block.unwritable is not None
        rows["unwritable"] = -1 if block.unwritable is None else block.unwritable
        aliases = aliases or block.alias is not None
        rows["alias"] = 0 if block.alias is None else block.alias
        corners = corners or block.corners is not None
        rows["corners"] = edges(block.boxes, block.corners)
        rows["position"] = np.arange(totals["n"], totals["n"] + len(rows), dtype=np.int64)
        rows["record"] = block.record
        moved = moved or not np.array_equal(block.record, rows["position"])
        shard = np.searchsorted(starts, block.image, side="right") - 1
        by_shard = np.argsort(shard, kind="stable")  # file order within each shard
        bounds = np.searchsorted(shard[by_shard], np.arange(len(ranges) + 1))
        for k in np.flatnonzero(np.diff(bounds)):
            with open(spills[k], "ab") as f:
                f.write(rows[by_shard[bounds[k] : bounds[k + 1]]].tobytes())
            detections[k] += int(bounds[k + 1] - bounds[k])
        totals["n"] += len(rows)
        totals["dropped"] += block.dropped
        totals["classes"] = detection_blocks.distinct_keys(block.dropped_classes, totals["classes"])
        totals["dropped_images"] += block.dropped_images
        totals["box_counts"] = detection_blocks.add_counts(totals["box_counts"], block.box_counts)
        del rows, shard, by_shard
    conflicts = {}
    if stream_format(path, options.get("fmt")) == "json":
        wide = options.get("ids", "any") == "any"
        conflicts = exact_scores.check(path, truth, np.flatnonzero(suspects), wide, infinite)
        conflicts = boolean_scores.joined(conflicts, path, truth, tops, wide)
    whole = Predictions(
        image=np.zeros(0, np.int32),
        cls=np.zeros(0, np.int32),
        boxes=np.zeros((0, 4)),
        score=np.zeros(0),
        dropped=totals["dropped"],
        dropped_images=totals["dropped_images"],
        unknown_images=options.get("unknown_images", "reject"),
        source=str(path),
        box_policy=policy,
        box_counts=totals["box_counts"],
        dropped_classes=totals["classes"],
        score_conflicts=conflicts,
    )
    paths = []
    for k, (start, stop) in enumerate(ranges):
        rows = _read_spill(spills[k])
        sliced = dataclasses.replace(
            whole,
            image=np.ascontiguousarray(rows["image"]),
            cls=np.ascontiguousarray(rows["cls"]),
            boxes=np.ascontiguousarray(rows["boxes"]),
            score=np.ascontiguousarray(rows["score"]),
            area=np.ascontiguousarray(rows["area"]) if masks else None,
            free=rows["free"].astype(bool) if frees else None,
            unwritable=np.ascontiguousarray(rows["unwritable"]) if bad_ids else None,
            alias=rows["alias"].astype(bool) if aliases else None,
            corners=np.ascontiguousarray(rows["corners"]) if corners else None,
            record=np.ascontiguousarray(rows["record"]) if moved else None,
        )
        positions = np.ascontiguousarray(rows["position"])
        sliced = dataclasses.replace(
            sliced, score_conflicts=exact_scores.restrict(conflicts, positions)
        )
        del rows
        sliced_truth, box_index = truth_slice(truth, start, stop)
        paths.append(os.path.join(directory, name.format(k=k)))
        save_piece(paths[-1], sliced_truth, box_index, sliced, positions)
        if os.path.exists(spills[k]):
            os.remove(spills[k])
    counts = PredictionCounts(
        totals["n"],
        whole.dropped,
        whole.box_policy,
        {key: int(value) for key, value in whole.box_counts.items()},
        whole.dropped_images,
        whole.unknown_images,
        whole.dropped_classes,
        True,
    )
    return StreamedPieces(paths, list(ranges), detections, counts)


def _read_spill(path):
    if not os.path.exists(path):
        return np.zeros(0, SPILL_ROW)
    return np.fromfile(path, SPILL_ROW)
