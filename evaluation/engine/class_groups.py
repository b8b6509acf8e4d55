"""Class groups: score a sharded run a run of classes at a time, in bounded memory.

Accumulation order is class first, and matching, accumulation, every curve and every
TIDE fix but one stay inside a class (the classification fix moves a detection to its
box's class; its box is in the detection's image, so its shard knows it). So after the
image shards are matched (``shards``), each shard stores its records cut into *groups*
of consecutive classes (``save_shard_records``: one set of ``.npz`` members per group,
each group with its own digest), and each group is then, on any worker:

1. read from every shard (``load_group_part``: only that group's members) and merged
   (``merge_group``: ``shards.merge`` of the group, classes and boxes numbered locally);
2. scored per class (``scorecard.class_parts``, ``tide.class_parts``): arrays with the
   class axis last and per-class rows, nothing averaged;
3. saved (``save_group``) with its records, so that the final step
4. joins the groups' parts in class order and takes every mean over classes, slots
   and recall points once (``scorecard.assemble``, ``tide.assemble``) — the same arrays,
   in the same layout, that one whole run builds, so the numbers are bit for bit its
   own — and writes the evaluation's records file column by column
   (``records_from_groups.write_records``), holding one group's column at a time.

Within a group, box indices of the match rows are the group's (``box_index`` maps them
to the split's); ``det_ref_box`` stays the split's and ``gt_ref_det`` is kept as the
referred detection's file position (``gt_ref_pos``), because either may point into
another group.
"""

import dataclasses
import hashlib
import io
import json
import zipfile

import numpy as np

from . import scorecard, tide
from .records import MatchRecords
from .shards import _BOX_RECORD_FIELDS, _DET_FIELDS, merged_with_order, take_referenced

#: Fields stored once per shard records file (the same in every group).
_META = ("protocol", "classes", "area_names", "thresholds", "n_images", "tie_order")
#: Stored with them only where not None (``MatchRecords.class_repeats``).
_OPTIONAL_META = ("class_repeats",)
_MATCH_FIELDS = ("match_config", "match_det", "match_box", "match_iou")
_MOVED = ("class", "score", "image", "order")
#: ``MatchRecords.det_key``, kept only where pycocotools' exact order is
#: (``loaders.exact_scores``), ``det_overflow``, only where a score is beyond
#: float64's range, and ``det_record``, only where the loaders left records out:
#: every shard of such a run has them.
_KEY_FIELD = ("det_key", "det_overflow", "det_record")


def _det_fields(records):
    return _DET_FIELDS + tuple(n for n in _KEY_FIELD if getattr(records, n) is not None)


class PartMismatch(ValueError):
    """A group's members of a shard records file do not match their digest."""

    def __init__(self, message, expected, actual):
        super().__init__(message)
        self.expected, self.actual = expected, actual


def plan(n_classes, n_groups, weights=None):
    """Consecutive ``(start, stop)`` runs of class indices covering ``range(n_classes)``,
    ``n_groups`` at most, each of about the same total ``weights`` (per class, e.g. its
    detections: a group's memory and time follow them), or of as many classes without.
    A class is never split, so a class heavier than a group's share is a group alone."""
    n_groups = max(1, min(int(n_groups), max(n_classes, 1)))
    if weights is None or not np.sum(weights):
        edges = np.linspace(0, n_classes, n_groups + 1).round().astype(int)
        return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:])]
    cumulative = np.cumsum(np.asarray(weights, np.float64))
    shares = cumulative[-1] * np.arange(1, n_groups) / n_groups
    cuts = np.searchsorted(cumulative, shares, side="left") + 1
    edges = np.unique(np.clip(np.r_[0, cuts, n_classes], 0, n_classes))
    return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:])]


def partition(records, box_index, groups):
    """A matched shard's arrays, cut by class group: ``{member name: array}`` with
    ``meta.*`` once and ``g{j}.*`` per group (``records`` from ``shards.match_shard``:
    detection and box indices the split's, ``match_det``/``gt_ref_det`` the shard's)."""
    records.require_reasons()
    fixable = tide._fixable(records)
    moved = tide.moved_detections(records, fixable)
    bounds = records.class_bounds()
    ref = records.gt_ref_det.astype(np.int64)
    gt_ref_pos = take_referenced(records.det_order, ref)
    members = {f"meta.{name}": np.asarray(getattr(records, name)) for name in _META}
    members.update(_optional_meta({name: getattr(records, name) for name in _OPTIONAL_META}))
    for j, (lo, hi) in enumerate(groups):
        dets = slice(int(bounds[lo]), int(bounds[hi]))
        out = {name: getattr(records, name)[dets] for name in _det_fields(records)}
        out["det_outside"] = records.det_outside[:, dets]
        out["det_fixable"] = fixable[dets] >= 0
        rows = (records.match_det >= dets.start) & (records.match_det < dets.stop)
        for name in _MATCH_FIELDS:
            out[name] = getattr(records, name)[rows]
        out["match_det"] = (out["match_det"] - dets.start).astype(records.match_det.dtype)
        boxes = np.flatnonzero((records.gt_class >= lo) & (records.gt_class < hi))
        for name in _BOX_RECORD_FIELDS:
            out[name] = getattr(records, name)[boxes]
        out["gt_ignored"] = records.gt_ignored[:, boxes]
        out["gt_ref_pos"] = gt_ref_pos[boxes]
        out["box_index"] = box_index[boxes]
        into = (moved["class"] >= lo) & (moved["class"] < hi)
        for name in _MOVED:
            out[f"moved_{name}"] = moved[name][into]
        out["det_class"] = (out["det_class"] - lo).astype(records.det_class.dtype)
        out["gt_class"] = (out["gt_class"] - lo).astype(records.gt_class.dtype)
        out["moved_class"] = out["moved_class"] - lo
        members.update({f"g{j}.{name}": value for name, value in out.items()})
    return members


def _optional_meta(values):
    """``{"meta.<name>": array}`` of the ``_OPTIONAL_META`` that ``values`` holds."""
    return {
        f"meta.{name}": np.asarray(values[name])
        for name in _OPTIONAL_META
        if values.get(name) is not None
    }


def save_shard_records(path, records, box_index, groups):
    """Write a shard's records cut by class group (uncompressed ``.npz``: they live only
    until the groups are scored); returns each group's digest (``group_digest``)."""
    members = partition(records, box_index, groups)
    digests = {}
    with zipfile.ZipFile(path, "w", zipfile.ZIP_STORED) as z:
        for name, value in members.items():
            buffer = io.BytesIO()
            np.lib.format.write_array(buffer, np.asanyarray(value), allow_pickle=False)
            data = buffer.getvalue()
            z.writestr(f"{name}.npy", data)
            group = name.partition(".")[0]
            digests.setdefault(group, hashlib.sha256()).update(name.encode() + data)
    return {group: h.hexdigest() for group, h in digests.items()}


def _read_members(path, prefixes, digests):
    """``{name: array}`` of the members under ``prefixes``, each prefix's bytes checked
    against ``digests[prefix]`` (when given) before any is decoded."""
    out = {}
    with zipfile.ZipFile(path) as z:
        for prefix in prefixes:
            h = hashlib.sha256()
            raw = {}
            for info in z.infolist():
                name = info.filename[: -len(".npy")]
                if name.partition(".")[0] == prefix:
                    raw[name] = z.read(info)
                    h.update(name.encode() + raw[name])
            expected = (digests or {}).get(prefix)
            if digests is not None and h.hexdigest() != expected:
                raise PartMismatch(
                    f"{path}: the {prefix} members do not match their digest",
                    expected,
                    h.hexdigest(),
                )
            for name, data in raw.items():
                out[name.partition(".")[2]] = np.lib.format.read_array(
                    io.BytesIO(data), allow_pickle=False
                )
    return out


@dataclasses.dataclass(eq=False)
class GroupPart:
    """One shard's records of one class group (classes and box fields local)."""

    records: MatchRecords
    box_index: np.ndarray  # the split's index of each of its boxes
    gt_ref_pos: np.ndarray
    det_fixable: np.ndarray
    moved: dict


def load_group_part(path, j, digests=None):
    """``(group j's arrays, the shared meta arrays)`` of a shard records file
    (``save_shard_records``), both checked against ``digests`` (``{"meta": …, "g<j>":
    …}``) when given, before anything is decoded."""
    return _read_members(path, [f"g{j}"], digests), _read_members(path, ["meta"], digests)


def merge_group(parts, meta, lo, hi):
    """The records of classes ``[lo, hi)`` from every shard's ``load_group_part`` (in
    shard order): a ``GroupPart`` whose records equal the whole run's records of those
    classes (classes from 0, boxes in split order numbered from 0)."""
    box_index = np.sort(np.concatenate([p["box_index"] for p in parts]).astype(np.int64))
    local = []
    for p in parts:
        names = _DET_FIELDS + _BOX_RECORD_FIELDS + _MATCH_FIELDS + _KEY_FIELD
        fields = {name: p[name] for name in names if name in p}
        fields["match_box"] = np.searchsorted(box_index, p["match_box"]).astype(np.int32)
        fields["gt_ref_det"] = np.full(len(p["box_index"]), -1, np.int32)
        records = MatchRecords(
            protocol=str(meta["protocol"]),
            classes=tuple(str(c) for c in meta["classes"][lo:hi]),
            area_names=tuple(str(a) for a in meta["area_names"]),
            thresholds=meta["thresholds"][:, lo:hi],
            n_images=int(meta["n_images"]),
            det_outside=p["det_outside"],
            gt_ignored=p["gt_ignored"],
            tie_order=str(meta["tie_order"]),
            class_repeats=meta["class_repeats"][lo:hi] if "class_repeats" in meta else None,
            **fields,
        )
        local.append((records, np.searchsorted(box_index, p["box_index"])))
    records, order = merged_with_order(local, len(box_index))
    gt_ref_pos = np.full(len(box_index), -1, np.int64)
    for (_, boxes), p in zip(local, parts):
        gt_ref_pos[boxes] = p["gt_ref_pos"]
    return GroupPart(
        records=records,
        box_index=box_index,
        gt_ref_pos=gt_ref_pos,
        det_fixable=np.concatenate([p["det_fixable"] for p in parts])[order],
        moved={name: np.concatenate([p[f"moved_{name}"] for p in parts]) for name in _MOVED},
    )


def group_parts(group, protocol, *, tag_masks=None, score_threshold=0.5):
    """``{"scoring": …, "tide": …}``: the per-class parts of one merged group."""
    return {
        "scoring": scorecard.class_parts(
            group.records, protocol, tag_masks=tag_masks, score_threshold=score_threshold
        ),
        "tide": tide.class_parts(group.records, protocol, group.det_fixable, group.moved),
    }


def save_group(path, group, parts, class_start, meta, extra=None):
    """One scored group as one uncompressed ``.npz``: its records (local numbering, the
    maps back to the split's), the shards' ``meta``, its parts (arrays, and rows as
    JSON) and ``extra`` arrays under their own names (names without ``:``)."""
    records = group.records
    arrays = {
        name: getattr(records, name)
        for name in _det_fields(records)
        + _BOX_RECORD_FIELDS
        + _MATCH_FIELDS
        + ("det_outside", "gt_ignored", "thresholds")
    }
    arrays.update(box_index=group.box_index, gt_ref_pos=group.gt_ref_pos)
    arrays["class_start"] = np.array(class_start)
    arrays.update({f"meta.{name}": meta[name] for name in _META})
    arrays.update(_optional_meta(meta))
    for kind in ("scoring", "tide"):
        for name, value in parts[kind]["arrays"].items():
            arrays[f"{kind}:{name}"] = value
    rest = {
        "rows": parts["scoring"]["rows"],
        "classes": parts["scoring"]["classes"],
        "area_names": parts["scoring"]["area_names"],
        "tag_images": parts["scoring"]["tag_images"],
    }
    arrays["parts_json"] = np.array(json.dumps(rest))
    for name, value in (extra or {}).items():
        if ":" in name or name in arrays:
            raise ValueError(f"extra member {name!r} would be read as a part or replace one")
        arrays[name] = value
    np.savez(path, **arrays)


def load_group_parts(path):
    """The parts ``save_group`` stored (not the records): ``{"scoring", "tide"}``."""
    with np.load(path, allow_pickle=False) as data:
        rest = json.loads(str(data["parts_json"]))
        arrays = {"scoring": {}, "tide": {}}
        for name in data.files:
            kind, sep, field = name.partition(":")
            if sep:
                arrays[kind][field] = data[name]
    return {
        "scoring": {**rest, "arrays": arrays["scoring"]},
        "tide": {"arrays": arrays["tide"], "classes": rest["classes"]},
    }


def assemble(group_parts_in_order, protocol, *, score_threshold=0.5):
    """``(scorecard, TIDE breakdown)`` from every group's parts, in class order."""
    result = scorecard.assemble(
        [p["scoring"] for p in group_parts_in_order], protocol, score_threshold=score_threshold
    )
    return result, tide.assemble([p["tide"] for p in group_parts_in_order])


class Totals:
    """What ``provenance.annotate`` reads of the records, for a run whose records are
    never held whole: the IoU table, positives per class and the detection count."""

    def __init__(self, thresholds, n_pos, n_detections):
        self.thresholds, self._n_pos, self.n_detections = thresholds, n_pos, n_detections

    def n_positives(self, area=0, weights=None):
        if area != 0 or weights is not None:
            raise ValueError("only the unweighted positives of all sizes are kept")
        return self._n_pos


def totals(group_paths):
    """``Totals`` of the groups saved at ``group_paths`` (in class order)."""
    thresholds, n_pos, n = [], [], 0
    for path in group_paths:
        with np.load(path, allow_pickle=False) as data:
            thresholds.append(data["thresholds"])
            n_pos.append(data["scoring:n_pos"])
            n += len(data["det_score"])
    return Totals(np.concatenate(thresholds, axis=1), np.concatenate(n_pos), n)
