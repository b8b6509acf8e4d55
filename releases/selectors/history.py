"""The detector page: one metric and class of every version on every split."""

from .. import history_stamps
from ..class_thresholds import row_of, rows_naming, spelled
from ..models import PredictionSet
from .decisions import baselines_of
from .history_levels import (
    LevelSourceError,
    level_of,
    level_source,
    level_sources,
)
from .scores import METRICS, _splits

MEAN = "mean"
REVISION_VIEWS = ("joined", "separate")


class HistoryError(ValueError):
    """A history request named a metric, class or revision view that does not exist."""


def history_chart(
    detector, metric="AP", class_name=MEAN, revisions="joined", level=None, setup=None
):
    """One metric of one class (``mean`` = the protocol's mean) for every version, as
    one series per split name (``revisions="joined"``) or per split revision
    (``"separate"``), values aligned with ``versions`` (None where not scored).

    Joined: a version's point on a split name is its number on the newest revision of
    that name it was scored on; ``changes`` lists where the revision changes along the
    line (the chart marks them). Each point carries the box policy and the engine
    version its number was computed under (``box_policies``, ``engine_versions``,
    aligned with ``values``), and ``policy_changes`` lists where the box policy changes
    along a line (a suite switched from ``keep`` to ``clip``: the numbers on either
    side are computed differently; the chart marks them too). Numbers carry four
    decimals, rounded by Python's correctly rounded ``round`` (a halfway case such as
    0.00625 goes to 0.0063, where scaling by 10^4 would give 0.0062; the page shows
    three). Each version carries its decision (approved, rejected or None) and
    ``baseline`` names the baseline; the current verdict of every version is not
    computed here (it reads every set and evaluation of every version: seconds at
    1,000 versions) — the page's table computes it for the rows it shows.
    A few queries and about 5,000 numbers at 1,000 versions x 5 splits, read as tuples.

    ``level`` (a level or pedestrian setup of the suite's level protocols, e.g.
    ``moderate`` or ``reasonable``; ``history_levels``) reads that level's rows of the
    level protocol instead of the primary protocol's class rows; ``sources`` lists the
    levels offered and ``lower_is_better`` the metric's direction (miss rate); a class
    the level protocol does not evaluate (``kitti2d``: car, pedestrian, cyclist) reads
    as not scored. ``class_name`` names a class in any case (``MEAN``, ``Pedestrian``).
    ``setup`` is another name for ``level`` (a pedestrian setup is a level of its
    miss-rate protocol).
    """
    if metric not in METRICS:
        raise HistoryError(f"metric: {metric!r} is not one of {', '.join(METRICS)}")
    if revisions not in REVISION_VIEWS:
        raise HistoryError(f"revisions: {revisions!r} is not one of {', '.join(REVISION_VIEWS)}")
    from evaluation.models import ClassScore, SliceScore

    classes = [MEAN, *detector.classes]
    rows = ClassScore.objects.all()
    protocol, field = detector.primary_protocol, METRICS[metric][0]
    try:
        level = level_of(level, setup)
    except LevelSourceError as e:
        raise HistoryError(str(e)) from None
    if level:
        try:
            level_protocol, field = level_source(detector, metric, level)
        except LevelSourceError as e:
            raise HistoryError(str(e)) from None
        protocol = level_protocol.name
        rows = SliceScore.objects.filter(kind="level", name=level)
    # in any case, read as the detector spells it (``class_thresholds.spelled``)
    asked, class_name = class_name, spelled(classes, class_name)
    if class_name is None:
        raise HistoryError(f"class: {asked!r} is not one of {', '.join(classes)}")
    versions = list(
        detector.versions.order_by("created_at")
        .annotate(day=_utc_day("created_at"))
        .values_list("pk", "label", "day", "sign_off__decision")
    )
    position = {pk: i for i, (pk, *_) in enumerate(versions)}
    baseline = baselines_of({detector.pk}).get(detector.pk)
    selection = (protocol, field, "" if class_name == MEAN else class_name, level)

    def compute():
        numbers, splits = _numbers(detector, rows, selection)
        series = (_joined if revisions == "joined" else _separate)(splits, numbers, position)
        changes = [change for line in series for change in _changes(line, "revisions")]
        policy = [change for line in series for change in _changes(line, "box_policies")]
        return series, changes, policy

    # The versions in their order are part of the key: a new version is a new entry.
    key = (*selection, revisions, tuple(position))
    series, changes, policy_changes = history_stamps.cached(detector.pk, key, compute)
    return {
        "protocol": protocol,
        "metric": metric,
        "level": level or None,
        "lower_is_better": metric == "miss_rate",
        "sources": level_sources(detector),
        "class": class_name,
        "view": revisions,
        "metrics": list(METRICS),
        "classes": classes,
        "baseline": baseline.pk if baseline else None,
        "versions": [
            {"id": pk, "label": label, "date": day, "decision": decision}
            for pk, label, day, decision in versions
        ],
        "series": series,
        "changes": changes,
        "policy_changes": policy_changes,
    }


def _numbers(detector, rows, selection):
    """{(version id, split id): (value, box policy, engine version)} of the selection's
    rows through each version's
    own current sets, and the splits the detector's current sets are on (by name, then
    revision): the part of a history read that joins six tables (the series built
    from it are kept by ``history_stamps.cached`` until the detector's next change)."""
    protocol, field, class_filter, _ = selection
    # All conditions on the set in one filter(): the same set row, so a version reads
    # its own sets' evaluations only (never another team's scorecard of the same
    # bytes), and two versions sharing identical bytes each get their point.
    rows = rows.filter(
        scorecard__evaluation__state="done",
        scorecard__evaluation__protocol=protocol,
        scorecard__evaluation__prediction_sets__replaced_at__isnull=True,
        scorecard__evaluation__prediction_sets__version__detector=detector,
    )
    # A row keeps its split's spelling: the class matches it in any case (row_of); the
    # split's names are read first so the numbers are read for those names only.
    names = [class_filter]
    if class_filter:
        spelled = set(rows.values_list("class_name", flat=True).distinct())
        names = rows_naming(sorted(spelled - {""}), class_filter)
    rows = (
        rows.filter(class_name__in=names)
        .order_by("scorecard__evaluation_id")  # several evaluations of a set: the newest wins
        .values_list(
            "scorecard__evaluation__prediction_sets__version_id",
            "scorecard__evaluation__split_id",
            "scorecard__evaluation_id",
            "class_name",
            field,
            "scorecard__evaluation__box_policy",
            "scorecard__evaluation__engine_version",
        )
    )
    found = {}  # (version id, split id) -> (evaluation id, {class name: point})
    for version_id, split_id, evaluation_id, name, *point in rows:
        latest = found.get((version_id, split_id))
        if latest is None or latest[0] != evaluation_id:
            latest = found[version_id, split_id] = (evaluation_id, {})
        latest[1][name] = point
    numbers = {}  # (version id, split id) -> (value, box policy, engine version)
    for at, (_, points) in found.items():
        key = class_filter if not class_filter else row_of(points, class_filter)
        if key is not None:  # two categories of the split naming the class: not scored
            numbers[at] = points[key]
    split_ids = set(
        PredictionSet.objects.current()
        .filter(version__detector=detector)
        .values_list("split_id", flat=True)
        .distinct()
    ) | {split_id for _, split_id in numbers}
    splits = sorted(_splits(split_ids), key=lambda s: (s.name, s.revision))
    return numbers, splits


def _utc_day(field):
    """The date (YYYY-MM-DD, UTC) of a datetime column, as text from the database: both
    backends store or cast timestamps in UTC (Django's connection time zone with
    USE_TZ), and building 1,000 aware datetimes only to take their date was a tenth of
    the history read."""
    from django.db.models import CharField
    from django.db.models.functions import Cast, Substr

    return Substr(Cast(field, CharField()), 1, 10)


def _joined(splits, numbers, position):
    """One series per split name: each version's number on the newest revision of that
    name that has one."""
    lines, line_of = {}, {}
    for split in splits:  # sorted by name, then revision
        line = lines.setdefault(split.name, _line(split.name, len(position)))
        line["splits"].append({"id": split.pk, "revision": split.revision})
        line_of[split.pk] = (line, split.revision)
    for (version_id, split_id), point in numbers.items():
        line, revision = line_of[split_id]
        at = position.get(version_id)  # None: created after the versions were read
        if at is not None and point[0] is not None and (line["revisions"][at] or 0) < revision:
            _put(line, at, point, revision)
    return list(lines.values())


def _line(name, n):
    return {
        "name": name,
        "splits": [],
        "values": [None] * n,
        "revisions": [None] * n,
        "box_policies": [None] * n,
        "engine_versions": [None] * n,
    }


def _put(line, at, point, revision):
    """A point of a line: its number (four decimals), revision, box policy and engine."""
    value, box_policy, engine_version = point
    line["values"][at], line["revisions"][at] = round(value, 4), revision
    line["box_policies"][at], line["engine_versions"][at] = box_policy, engine_version


def _separate(splits, numbers, position):
    """One series per split revision."""
    line_of = {}
    for split in splits:
        line_of[split.pk] = _line(str(split), len(position))
        line_of[split.pk]["splits"].append({"id": split.pk, "revision": split.revision})
    revision_of = {split.pk: split.revision for split in splits}
    for (version_id, split_id), point in numbers.items():
        at = position.get(version_id)  # None: created after the versions were read
        if at is not None and point[0] is not None:
            _put(line_of[split_id], at, point, revision_of[split_id])
    return list(line_of.values())


def _changes(line, key):
    """Where ``line[key]`` (the revision, or the box policy) changes along a line: the
    index of the first point with the new one, skipping versions without a number."""
    out, before = [], None
    for at, now in enumerate(line[key]):
        if now is None:
            continue
        if before is not None and now != before:
            out.append({"series": line["name"], "index": at, "from": before, "to": now})
        before = now
    return out
