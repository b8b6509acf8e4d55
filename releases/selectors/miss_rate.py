"""Miss-rate-versus-FPPI charts (pedestrian setups, ``engine.pedestrian``) for the
version and compare pages, read from stored scorecards only: a scorecard of a miss-rate
protocol keeps the engine's per-setup output in ``result["levels"]`` (each class with
its ``curve``, ``miss_rate`` and ``n_gt``). Nothing is computed on a request."""

from evaluation.engine.data import name_key

from .scores import _scorecards


def miss_rate_protocols(detector):
    """The detector's protocols that are pedestrian miss-rate presets, in its order."""
    from evaluation.engine import MISS_RATE_PRESETS

    return [p for p in detector.protocols if p in MISS_RATE_PRESETS]


def has_curves(result):
    """Whether a stored result holds per-setup miss-rate curves."""
    levels = (result or {}).get("levels")
    if not isinstance(levels, dict):
        return False
    return any(
        isinstance(row, dict) and "curve" in row
        for entry in levels.values()
        for row in (entry.get("classes") or {}).values()
    )


def chart_data(protocol, series, classes):
    """One chart's JSON: ``series`` is ``[(label, result)]`` (a result may be None:
    that series has no curve). ``classes`` orders the classes (the detector's; JSON
    columns may reorder keys). Returns ``{"protocol", "series", "setups", "classes",
    "headline_level", "default_class" (pedestrian or person if present), "curves":
    {setup: {class: {label: {"fppi", "miss_rate", "lamr", "n_gt"}}}}, "means": {setup:
    {label: lamr}}}``, or None without curves."""
    from evaluation.engine import MISS_RATE_PRESETS

    preset = MISS_RATE_PRESETS[protocol]
    setups = [s.name for s in preset.setups]
    shown = [(label, result) for label, result in series if has_curves(result)]
    if not shown:
        return None
    present = {c for _, r in shown for e in r["levels"].values() for c in e.get("classes", {})}
    ordered = [c for c in classes if c in present] + sorted(present - set(classes))
    curves, means = {}, {}
    for setup in setups:
        curves[setup], means[setup] = {}, {}
        for label, result in shown:
            entry = result["levels"].get(setup, {})
            means[setup][label] = entry.get("miss_rate")
            for name, row in entry.get("classes", {}).items():
                curves[setup].setdefault(name, {})[label] = {
                    **row.get("curve", {"fppi": [], "miss_rate": []}),
                    "lamr": row.get("miss_rate"),
                    "n_gt": row.get("n_gt"),
                }
    return {
        "protocol": protocol,
        "series": [label for label, _ in shown],
        "setups": setups,
        "classes": ordered,
        "default_class": next(
            (c for c in ordered if name_key(c) in ("pedestrian", "person")),
            ordered[0] if ordered else None,
        ),
        "headline_level": preset.headline_level,
        "curves": curves,
        "means": means,
    }


def version_charts(version, cards, prediction_set):
    """The version page's charts for one prediction set: one per miss-rate protocol
    with a stored result (``cards`` as ``version_scorecards`` reads them)."""
    detector = version.detector
    out = []
    for protocol in miss_rate_protocols(detector):
        card = cards.get((prediction_set.pk, protocol))
        data = chart_data(protocol, [(version.label, card and card.result)], detector.classes)
        if data:
            out.append(data)
    return out


def compare_charts(reference, candidate, sets):
    """The compare page's charts: per split id, one per miss-rate protocol where at
    least one of the two versions has a stored result, both overlaid (reference
    first). One query for the scorecards."""
    detector = reference.detector
    protocols = miss_rate_protocols(detector)
    if not protocols:
        return {}
    cards = _scorecards(sets, protocols, with_result=True)
    by_split = {}
    for ps in sets:
        by_split.setdefault(ps.split_id, {})[ps.version_id] = ps
    out = {}
    for split_id, pair in by_split.items():
        for protocol in protocols:
            series = []
            for version, role in ((reference, "reference"), (candidate, "candidate")):
                ps = pair.get(version.pk)
                card = cards.get((ps.pk, protocol)) if ps else None
                series.append((f"{version.label} ({role})", card and card.result))
            data = chart_data(protocol, series, detector.classes)
            if data:
                out.setdefault(split_id, []).append(data)
    return out
