"""The slice a release rule names: an image ``tag`` or a size bucket (``size``: COCO's
small / medium / large, or a bucket of the judging protocol's own area ranges). Every
rule metric is read per slice (``evaluation.slices``); a slice whose metrics cannot be
read gives an explicit *missing* outcome, never a silent *no data*."""

from dataclasses import dataclass

from evaluation import engine
from evaluation.engine.protocols import COCO_AREA_RANGES
from evaluation.protocols import resolve
from evaluation.slices import SliceUnavailable, slice_values

#: COCO's area ranges (pycocotools ``Params.areaRngLbl``), valid under every protocol
#: that keeps them; a custom protocol may name its own.
COCO_SIZES = tuple(name for name, _, _ in COCO_AREA_RANGES[1:])


def size_names(protocol_names):
    """The size buckets a rule may name: COCO's and those of these protocols."""
    names = list(COCO_SIZES)
    for protocol_name in protocol_names:
        try:
            ranges = resolve(protocol_name).area_ranges
        except engine.InputError:
            continue
        names += [name for name, _, _ in ranges[1:] if name not in names]
    return names


def validate(rule, index, clean, protocol_names, fail):
    """Check ``rule``'s ``tag`` and ``size`` into ``clean``; ``fail(index, field, message)``
    raises."""
    tag, size = rule.get("tag"), rule.get("size")
    if tag is not None and (not isinstance(tag, str) or not tag):
        fail(index, "tag", "must be a non-empty image tag")
    if size is not None:
        allowed = size_names(protocol_names)
        if not isinstance(size, str) or size not in allowed:
            fail(index, "size", f"must be a size bucket: one of {', '.join(allowed)}; got {size!r}")
        if tag:
            fail(index, "size", "a rule names an image tag or a size bucket, not both")
        clean["size"] = size
    if tag:
        clean["tag"] = tag


@dataclass
class Slice:
    kind: str  # "tag" or "size"
    name: str

    @property
    def label(self):
        return f" at {self.name}" if self.kind == "tag" else f" on {self.name} boxes"


def of(rule):
    """The rule's slice, or None for the whole split."""
    if rule.get("tag"):
        return Slice("tag", rule["tag"])
    if rule.get("size"):
        return Slice("size", rule["size"])
    return None


def measure(card, rule, class_name, cache):
    """(value, problem) of ``rule``'s metric on its slice of ``card`` for ``class_name``
    ("mean" or a class): ``problem`` is None, or (status, detail) with status
    ``"missing"`` (the slice's metrics cannot be read, or the protocol has no such size
    bucket) or ``"no data"`` (no image of the split carries the tag)."""
    where = of(rule)
    try:
        values = slice_values(card, where.kind, where.name, cache)
    except SliceUnavailable as e:
        return None, ("missing", str(e))
    if values is None:
        if where.kind == "size":
            return None, (
                "missing",
                f"protocol {card.protocol} has no size bucket {where.name!r}: the rule "
                "cannot be judged on this scorecard",
            )
        return None, ("no data", f"no image of {card.evaluation.split} carries tag {where.name!r}")
    from .class_thresholds import of_class  # the slice keeps the split's names

    return (of_class(values, class_name) or {}).get(rule["metric"]), None


def weights_and_area(card, records, rule, truth_of):
    """The bootstrap's image mask (None: all) and size-bucket index of ``rule``'s slice,
    for the significance rules (``delta_intervals._intervals``)."""
    where = of(rule)
    if where is None:
        return None, 0
    if where.kind == "tag":
        return truth_of(card.evaluation.split).tag_mask(where.name), 0
    if where.name not in records.area_names[1:]:
        raise SliceUnavailable(f"protocol {card.protocol} has no size bucket {where.name!r}")
    return None, records.area_names.index(where.name)
