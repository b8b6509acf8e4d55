"""History series from a level protocol: one level (or pedestrian setup) of the
detector's suite, e.g. AP at ``moderate`` (``kitti2d``) or the log-average miss rate
of the ``reasonable`` setup, read from the scorecards' level rows (``SliceScore`` of
kind ``level``: ``ap``, or ``miss_rate`` for a lower-is-better setup)."""

from evaluation import levels


class LevelSourceError(ValueError):
    """A level the suite does not offer, or a metric it is not measured in."""


def level_of(level, setup):
    """The level a history request names: ``level`` or its alias ``setup`` (a
    pedestrian setup is a level of its miss-rate protocol); None for neither."""
    if level and setup and level != setup:
        raise LevelSourceError(f"setup: {setup!r} contradicts level {level!r}; name one")
    return level or setup or None


def level_protocol_names(detector):
    """The level protocols the detector's current suite names, in its order."""
    from ..suites import current_suite

    suite = current_suite(detector)
    names = list(suite.protocols) if suite else list(detector.protocols)
    return [n for n in names if levels.get(n) is not None]


def level_sources(detector):
    """Every level the suite's level protocols offer, as the history's metric choices:
    ``{"metric", "level", "protocol", "lower_is_better", "label"}``; a level name
    held by two protocols is offered once, from the first (as rules read it)."""
    out, seen = [], set()
    for name in level_protocol_names(detector):
        protocol = levels.get(name)
        for level in protocol.levels:
            if level in seen:
                continue
            seen.add(level)
            out.append(
                {
                    "metric": protocol.metric,
                    "level": level,
                    "protocol": name,
                    "lower_is_better": protocol.lower_is_better,
                    "label": f"{protocol.metric} · {level} ({name})",
                }
            )
    return out


def level_source(detector, metric, level):
    """The level protocol a history request reads: ``(protocol, row column)``."""
    names = level_protocol_names(detector)
    found = levels.protocols_with_level(names, level)
    if not found:
        offered = "; ".join(f"{n}: {', '.join(levels.get(n).levels)}" for n in names)
        raise LevelSourceError(
            f"level: {level!r} is not a level of a protocol in the suite"
            + (f" ({offered})" if offered else " (it names no level protocol)")
        )
    protocol = levels.get(found[0])
    if metric != protocol.metric:
        raise LevelSourceError(
            f"metric: level {level!r} of {protocol.name} is measured as {protocol.metric}"
        )
    return protocol, levels.METRIC_COLUMNS[metric]
