"""Level protocols in the platform: a protocol whose result is per level (or setup) ×
per class, such as the KITTI 2D difficulty levels (``engine.difficulty``).

One interface; the pedestrian miss-rate presets (``miss-rate``, ``miss-rate-cityscale``,
``miss-rate-caltech``: setups as levels, ``engine.evaluate_setups``) plug in the same
way, as ``LevelProtocol`` entries of ``LEVEL_PROTOCOLS``:

* ``evaluate(truth, predictions)`` returns ``(output, samples)``: ``output`` is
  ``{"protocol": {"name", "version"}, "levels": {level: {"classes": {class:
  {<value_key>: v|None, "n_gt": n, ...}}, <value_key>: mean|None}}, "headline":
  v|None}`` — ``engine.evaluate_levels``' shape; ``samples`` the per-image arrays
  (``engine.level_samples``) that recompute every value under image weights;
* ``value_key`` names the number read from it (``AP_R40``; the setups ``miss_rate``),
  ``metric`` the rule metric it answers (``AP``, ``miss_rate``), ``lower_is_better`` its
  direction, ``headline_level`` the level shown first, ``record`` the full definition.

A level protocol is never a suite's primary protocol: the primary one gives the match
records every cause page, deployed threshold and bootstrap interval reads.
Stored (``scoring`` dispatches here): a ``Scorecard`` whose ``result`` keeps the whole
protocol output and its definition (``protocol_record``), ``summary`` the headline
(``AP`` = moderate AP over 40 recall positions for ``kitti2d``), and one ``SliceScore``
of kind ``level`` per level × class ('' = the level's mean) with its AP (a miss-rate
setup's value in the row's ``miss_rate`` column). The "records" file is one ``.npz``
(``engine.level_samples.LevelSamples.save``): the protocol output as JSON and the
per-image samples a paired image bootstrap and a tag rule read (``load_samples``), its
SHA-256 kept on the scorecard and checked on every read like match records. Level
scorecards stored before the samples hold the output as JSON only (``NoSamples``).
"""

from dataclasses import asdict, dataclass

import numpy as np

from . import engine
from .engine.data import name_key
from .engine.difficulty import evaluate_levels_with_samples, get_difficulty_protocol
from .engine.level_samples import LevelSamples, NoSamples, level_statistic
from .engine.pedestrian import evaluate_setups_with_samples
from .engine.shards import keep_boxes
from .storage import ContentMismatch, verified_path


@dataclass(frozen=True)
class LevelProtocol:
    name: str
    metric: str  # the rule metric it answers
    value_key: str  # the key of that number in the protocol's output
    lower_is_better: bool
    evaluate: object  # (truth, predictions) -> (output, engine LevelSamples)
    counts: object  # truth -> level_counts-shaped dict
    definition: object  # () -> the full protocol record (JSON)

    @property
    def version(self):
        return self.definition()["version"]

    @property
    def levels(self):
        return [level["name"] for level in self.definition()["levels"]]

    @property
    def headline_level(self):
        return self.definition()["headline_level"]

    @property
    def classes(self):
        """The class names it evaluates (compared case-insensitively); empty: every
        class of the split (the miss-rate setups)."""
        return list(self.definition().get("class_overlap", {}))


def _kitti_definition(name="kitti2d"):
    p = get_difficulty_protocol(name)
    record = asdict(p)
    record["levels"] = [asdict(level) for level in p.levels]
    record["neighbours"] = {k: list(v) for k, v in p.neighbours.items()}
    record["matching"] = (
        "per ground-truth box, overlap strictly above the class's threshold; don't-care "
        "regions by intersection over the detection's area (KITTI devkit computeStatistics)"
    )
    record["recall_sampling"] = (
        "score thresholds from the true positives' scores, 41 slots; AP_R40 = mean of "
        "slots 1-40, AP_R11 = mean of slots 0, 4, ..., 40 (devkit getThresholds, eval_class)"
    )
    record["value"] = "AP_R40"
    return record


KITTI2D = LevelProtocol(
    name="kitti2d",
    metric="AP",
    value_key="AP_R40",
    lower_is_better=False,
    evaluate=lambda truth, predictions: evaluate_levels_with_samples(truth, predictions, "kitti2d"),
    counts=lambda truth: engine.level_counts(truth, "kitti2d"),
    definition=_kitti_definition,
)


def _miss_rate(name):
    """A pedestrian miss-rate preset (``engine.pedestrian``): setups as levels, the
    log-average miss rate per setup and class, lower is better; headline reasonable."""
    return LevelProtocol(
        name=name,
        metric="miss_rate",
        value_key="miss_rate",
        lower_is_better=True,
        evaluate=lambda truth, predictions: evaluate_setups_with_samples(truth, predictions, name),
        counts=lambda truth: {"levels": engine.setup_counts(truth, name)},
        definition=lambda: engine.MISS_RATE_PRESETS[name].record(),
    )


LEVEL_PROTOCOLS = {
    KITTI2D.name: KITTI2D,
    **{name: _miss_rate(name) for name in engine.MISS_RATE_PRESETS},
}


def get(name):
    """The level protocol of this name, or None."""
    return LEVEL_PROTOCOLS.get(name)


def protocols_with_level(names, level):
    """Those of ``names`` that are level protocols holding ``level``."""
    return [n for n in names if n in LEVEL_PROTOCOLS and level in LEVEL_PROTOCOLS[n].levels]


def score(evaluation, truth, predictions):
    """The stored result of a level protocol: ``(result, records, record_count)``
    where ``records`` writes the protocol output as the scorecard's file."""
    protocol = LEVEL_PROTOCOLS[evaluation.protocol]
    output, samples = protocol.evaluate(truth, predictions)
    record = protocol.definition()
    headline_level = record["headline_level"]
    headline = output["levels"].get(headline_level, {})
    summary = {
        protocol.metric: output["headline"],
        "level": headline_level,
    }
    if "AP_R11" in headline:
        summary["AP_R11"] = headline["AP_R11"]
    result = {
        "protocol": protocol.name,
        "protocol_version": record["version"],
        "engine_version": engine.ENGINE_VERSION,
        "kind": "levels",
        "metric": protocol.metric,
        "value_key": protocol.value_key,
        "lower_is_better": protocol.lower_is_better,
        "summary": summary,
        "levels": output["levels"],
        "ground_truth_sha256": evaluation.split.sha256,
    }
    # counts, the full protocol record, engine version, truth fingerprint: the keys the
    # CLI's JSON of this protocol gives (engine.annotate_levels)
    annotated = engine.annotate_levels(dict(output), protocol.name, truth, predictions)
    result.update({key: annotated[key] for key in engine.PROVENANCE_KEYS})
    return result, _SampleRecords(output, samples), len(predictions)


class _SampleRecords:
    """The scorecard's file: the protocol output and its samples (SHA-256 kept, audited)."""

    def __init__(self, output, samples):
        self.output, self.samples = output, samples

    def save(self, path):
        self.samples.save(path, self.output)


class SamplesUnavailable(Exception):
    """A level scorecard's samples cannot be read; the message says why and what to do."""


def load_samples(card):
    """The ``engine.level_samples.LevelSamples`` of a level scorecard, its file checked
    against the recorded SHA-256 (a changed file is signalled for the audit trail and
    refused). ``SamplesUnavailable`` for a scorecard stored before samples were kept
    (re-score it), a changed or unreadable file."""
    what = f"the {card.protocol} result of {card.evaluation.name}"
    try:
        with verified_path(
            card.records, card.records_sha256, f"scorecard:{card.pk}", "records file"
        ) as path:
            return LevelSamples.load(path)[1]
    except NoSamples as e:
        raise SamplesUnavailable(f"{what}: {e}") from e
    except (ContentMismatch, OSError, ValueError, KeyError) as e:
        raise SamplesUnavailable(f"{what} cannot be read ({e}); re-score the predictions") from e


def class_position(samples, name):
    """Index of ``name`` ("mean" or a class, in any case: ``name_key``, as every class
    name is compared) in ``level_statistic``'s row, or None when the protocol does not
    evaluate it, or when two of its classes name it in any case (none is picked)."""
    if name == "mean":
        return 0
    found = [k for k, c in enumerate(samples.classes) if name_key(c) == name_key(name)]
    return found[0] + 1 if len(found) == 1 else None


def level_values(samples, level, weights=None, only=None):
    """``engine.level_samples.level_statistic``: [mean, each class] under image weights
    (``only``: that class's value alone, the rest NaN)."""
    return level_statistic(samples, level, weights, only)


def is_levels(result):
    return result.get("kind") == "levels"


def level_rows(scorecard, result):
    """One ``SliceScore`` (kind ``level``) per level × class, '' for the level's mean:
    the value in ``ap`` for an AP protocol, in ``miss_rate`` for a miss-rate setup (so
    both are plain SQL rows for history, rules and compare)."""
    from .models import SliceScore

    for level, entry in result["levels"].items():
        yield _level_row(SliceScore, scorecard, result, level, "", entry)
        for class_name, row in entry["classes"].items():
            yield _level_row(SliceScore, scorecard, result, level, class_name, row)


def _level_row(model, scorecard, result, level, class_name, entry):
    column = METRIC_COLUMNS[result["metric"]]
    value = entry.get(result["value_key"])
    return model(
        scorecard=scorecard, kind="level", name=level, class_name=class_name, **{column: value}
    )


#: The ``SliceScore`` column holding a level protocol's rule metric.
METRIC_COLUMNS = {"AP": "ap", "miss_rate": "miss_rate"}


def level_table(card):
    """A level scorecard for a page: ``{"protocol", "metric", "headline_level",
    "levels": [...], "rows": [{"class", "values": [...], "n_gt"}]}`` (``n_gt``: boxes
    counted at the headline level), the mean row first."""
    result = card.result
    key = result["value_key"]
    # the definition's order (the database's JSON does not keep key order)
    record = result.get("protocol_record") or {}
    order = [lv["name"] for lv in record.get("levels", [])]
    levels = sorted(result["levels"], key=lambda lv: order.index(lv) if lv in order else 99)
    rank = [name_key(c) for c in record.get("class_overlap", {})]
    classes = []
    for entry in result["levels"].values():
        classes += [c for c in entry["classes"] if c not in classes]
    classes.sort(key=lambda c: (rank.index(name_key(c)) if name_key(c) in rank else 99, c))
    headline = (card.summary or {}).get("level") or record.get("headline_level")
    at_headline = result["levels"].get(headline, {}).get("classes", {})
    rows = [
        {
            "class": "mean",
            "values": [result["levels"][lv][key] for lv in levels],
            "n_gt": sum(c.get("n_gt") or 0 for c in at_headline.values()),
        }
    ]
    for name in classes:
        rows.append(
            {
                "class": name,
                "values": [result["levels"][lv]["classes"].get(name, {}).get(key) for lv in levels],
                "n_gt": at_headline.get(name, {}).get("n_gt"),
            }
        )
    return {
        "protocol": card.protocol,
        "metric": result["metric"],
        "value_key": key,
        "lower_is_better": result["lower_is_better"],
        "headline_level": headline,
        "levels": levels,
        "rows": rows,
    }


# Split page: what a split holds for the level protocols -------------------------------

OCCLUSION = (
    ("0 fully visible", 0, 0),
    ("1 partly", 1, 1),
    ("2 largely", 2, 2),
    ("3 unknown", 3, 3),
)
TRUNCATION = (("≤ 0.15", -np.inf, 0.15), ("0.15–0.30", 0.15, 0.30), ("0.30–0.50", 0.30, 0.50))
VISIBILITY = (("≥ 0.65", 0.65, np.inf), ("0.20–0.65", 0.20, 0.65), ("< 0.20", -np.inf, 0.20))


def split_counts(truth):
    """Counted at freeze time and stored on the split (``BenchmarkSplit.road_counts``):
    per level protocol its ``counts`` (boxes per level and class, don't-care regions,
    attributes given), and boxes per occlusion level, truncation and visibility bucket
    (the buckets follow the KITTI levels' limits and the pedestrian setups' visibility
    limits, PROTOCOLS.md §8/§9), and for a COCO JSON split read with its ``vis_ratio``
    key how many visibilities came from that key (``visibility_from_vis_ratio``,
    ``vis_ratio_beside_visibility``; absent when the split was read without it; read
    ``as-given`` they count what ``miss-rate-cityscale`` takes from the key). None when
    the split gives no attribute, no region and no ``vis_ratio``. The attribute counts
    read the boxes as the KITTI devkit and the toolbox read them: a repeated
    annotation id's annotations each as given (``GroundTruth.repeated``)."""
    protocols = {name: p.counts(truth) for name, p in LEVEL_PROTOCOLS.items()}
    if truth.repeated is not None:
        truth = keep_boxes(truth, np.flatnonzero(~truth.repeated_left_out(False)))
    given = {
        name: int((~np.isnan(getattr(truth, name))).sum())
        for name in ("occlusion", "truncation", "visibility")
    }
    from_key = truth.box_counts.get("visibility_from_vis_ratio", 0)
    if not any(given.values()) and not len(truth.region_image) and not from_key:
        return None

    def buckets(values, table, closed_low):
        out = []
        for label, low, high in table:
            inside = (values > low) & (values <= high)
            if closed_low:
                inside = (values >= low) & (values < high)
            out.append([label, int(inside.sum())])
        rest = int((~np.isnan(values)).sum()) - sum(n for _, n in out)
        return out, rest

    occlusion = [[label, int((truth.occlusion == low).sum())] for label, low, _ in OCCLUSION]
    truncation, over = buckets(truth.truncation, TRUNCATION, closed_low=False)
    truncation.append(["> 0.50", over])
    visibility, _ = buckets(truth.visibility, VISIBILITY, closed_low=True)
    sources = {
        key: int(truth.box_counts[key])
        for key in ("visibility_from_vis_ratio", "vis_ratio_beside_visibility")
        if key in truth.box_counts
    }
    return {
        **sources,
        "protocols": protocols,
        "attributes_given": given,
        "boxes": int(truth.n_boxes),
        "dont_care_regions": int(len(truth.region_image)),
        "occlusion": occlusion,
        "truncation": truncation,
        "visibility": visibility,
    }


def split_page(road_counts):
    """``split_counts``' stored dict pivoted for the split page: per level protocol
    ``{"protocol", "levels": [...], "rows": [(class, [n per level])]}``, and the
    attribute buckets as they are. None when the split has none."""
    if not road_counts:
        return None
    tables = []
    known = [n for n in LEVEL_PROTOCOLS if n in road_counts["protocols"]]
    for name in known + sorted(set(road_counts["protocols"]) - set(known)):
        counts = road_counts["protocols"][name]
        order = LEVEL_PROTOCOLS[name].levels if name in LEVEL_PROTOCOLS else []
        # the definition's order (the database's JSON does not keep key order)
        level_names = sorted(
            counts["levels"],
            key=lambda lv: (lv not in order, order.index(lv) if lv in order else 0, lv),
        )
        classes = []
        for per_class in counts["levels"].values():
            classes += [c for c in per_class if c not in classes]
        rows = [(c, [counts["levels"][lv].get(c, 0) for lv in level_names]) for c in classes]
        tables.append({"protocol": name, "levels": level_names, "rows": rows})
    return {**road_counts, "tables": tables}
