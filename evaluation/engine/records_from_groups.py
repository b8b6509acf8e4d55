"""The evaluation's records file of a class-grouped run, written from its saved groups.

The final step of a sharded run scored by class groups (``class_groups``) never holds
the records whole: ``write_records`` streams each field one group's column at a time.
"""

import zipfile

import numpy as np

from .class_groups import _KEY_FIELD, _MATCH_FIELDS, _META, _OPTIONAL_META
from .shards import _BOX_RECORD_FIELDS, _DET_FIELDS


def write_records(path, group_paths, n_boxes):
    """The evaluation's records file from its groups (class order), as
    ``MatchRecords.save`` writes it — every field, loadable by ``MatchRecords.load`` —
    streamed one group's column at a time into its uncompressed ``.npz`` member (as
    ``MatchRecords.save`` writes since records are stored uncompressed: the cause pages
    read and hash-check them, and inflating was most of that time; deflating a
    10,000,000-detection file was most of this final step, on one worker).

    Detections: the groups' runs one after the other (accumulation order is class
    first). Match rows: the groups' rows, detection indices shifted by the group's
    first detection, box indices mapped to the split's. Boxes: scattered to the split's
    box order; ``gt_ref_det`` from the referred detection's file position.

    Raises ValueError when the groups do not cover each of ``n_boxes`` boxes once.
    """
    opened = [np.load(p, allow_pickle=False) for p in group_paths]
    try:
        meta = {name: opened[0][f"meta.{name}"] for name in _META}
        starts = [int(g["class_start"]) for g in opened]
        sizes = [len(g["det_score"]) for g in opened]
        det_offset = np.cumsum([0] + sizes)
        boxes = [g["box_index"] for g in opened]
        covered = np.bincount(np.concatenate(boxes), minlength=n_boxes) if boxes else []
        if n_boxes and (len(covered) != n_boxes or (covered != 1).any()):
            raise ValueError("the class groups do not cover every box exactly once")
        with zipfile.ZipFile(path, "w", zipfile.ZIP_STORED) as z:

            def column(name, dtype, shape, chunks):
                with z.open(f"{name}.npy", "w", force_zip64=True) as f:
                    header = {"descr": np.lib.format.dtype_to_descr(np.dtype(dtype))}
                    header.update(fortran_order=False, shape=tuple(int(n) for n in shape))
                    np.lib.format.write_array_header_2_0(f, header)
                    for chunk in chunks:
                        f.write(np.ascontiguousarray(chunk, dtype).tobytes())

            def small(name, value):
                with z.open(f"{name}.npy", "w", force_zip64=True) as f:
                    np.lib.format.write_array(f, np.asanyarray(value), allow_pickle=False)

            for name in ("protocol", "classes", "area_names"):
                small(name, meta[name])
            small("thresholds", meta["thresholds"])
            small("n_images", meta["n_images"])
            _write_detections(column, opened, starts)
            _write_matches(column, opened, det_offset)
            _write_boxes(small, opened, starts, det_offset, n_boxes)
            small("tie_order", meta["tie_order"])
            for name in _OPTIONAL_META:
                if f"meta.{name}" in opened[0].files:
                    small(name, opened[0][f"meta.{name}"])
    finally:
        for g in opened:
            g.close()


def _write_detections(column, opened, starts):
    n = sum(len(g["det_score"]) for g in opened)
    for name in _DET_FIELDS + tuple(n for n in _KEY_FIELD if n in opened[0].files):
        first = opened[0][name]
        chunks = (
            g[name] + start if name == "det_class" else g[name] for g, start in zip(opened, starts)
        )
        column(name, first.dtype, (n, *first.shape[1:]), chunks)
    outside = opened[0]["det_outside"]
    areas = outside.shape[0]
    rows = (g["det_outside"][a] for a in range(areas) for g in opened)
    column("det_outside", outside.dtype, (areas, n), rows)


def _write_matches(column, opened, det_offset):
    n = sum(len(g["match_det"]) for g in opened)
    for name in _MATCH_FIELDS:
        dtype = opened[0][name].dtype
        if name == "match_det":
            chunks = (g[name].astype(np.int64) + off for g, off in zip(opened, det_offset))
        elif name == "match_box":
            chunks = (g["box_index"][g[name]] for g in opened)
        else:
            chunks = (g[name] for g in opened)
        column(name, dtype, (n,), chunks)


def _write_boxes(small, opened, starts, det_offset, n_boxes):
    first = opened[0]
    box = {name: np.empty(n_boxes, first[name].dtype) for name in _BOX_RECORD_FIELDS}
    ignored = np.empty((first["gt_ignored"].shape[0], n_boxes), bool)
    ref_pos = np.full(n_boxes, -1, np.int64)
    for g, start in zip(opened, starts):
        index = g["box_index"]
        for name in _BOX_RECORD_FIELDS:
            box[name][index] = g[name] + start if name == "gt_class" else g[name]
        ignored[:, index] = g["gt_ignored"]
        ref_pos[index] = g["gt_ref_pos"]
    # the referred detections' merged indices, found group by group by file position
    wanted = np.unique(ref_pos[ref_pos >= 0])
    merged = np.full(len(wanted), -1, np.int64)
    for g, off in zip(opened, det_offset):
        order = g["det_order"]
        hit = np.flatnonzero(np.isin(order, wanted))
        merged[np.searchsorted(wanted, order[hit])] = off + hit
    refers = np.flatnonzero(ref_pos >= 0)
    box["gt_ref_det"][:] = -1
    box["gt_ref_det"][refers] = merged[np.searchsorted(wanted, ref_pos[refers])]
    small("gt_class", box["gt_class"])
    small("gt_image", box["gt_image"])
    small("gt_ignored", ignored)
    for name in ("gt_reason", "gt_ref_det", "gt_ref_iou"):
        small(name, box[name])
