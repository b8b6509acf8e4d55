"""A suite's per-class score thresholds (``class_thresholds``): the one place that
decides which class a key names, when a suite is set and wherever a threshold is read.

Class names match in any case: a key and a class name are compared as the engine's
``name_key`` (``str.casefold``), the rule the engine applies to a protocol's per-class
IoU thresholds (``Protocol.threshold_table``), so ``Pedestrian`` and ``pedestrian`` are
one class to a score threshold as they are to an IoU threshold. A key is stored in the
detector's spelling of its class; two keys naming one class are refused.

On a split whose categories share a name (the loader shows them as ``car (id 1)``,
``car (id 2)``), a key applies to every category of its own name, and a key naming one
such category as shown, and no own name, wins for that one (as ``threshold_table``).
"""

from evaluation.engine.data import name_key

DEFAULT_THRESHOLD = 0.5  # a detector without a suite (none are created so)


def same_class(a, b):
    """Do two class names name one class (``name_key``, in any case)?"""
    return name_key(a) == name_key(b)


def names_a_class(name, classes):
    """Does ``name`` name one of ``classes`` (in any case)?"""
    return any(same_class(name, c) for c in classes)


def spelled(classes, name):
    """The one of ``classes`` (a detector's) that ``name`` names in any case, in its
    spelling there: the exact spelling first (a detector stored with two spellings of
    one class before they were refused), else the first that ``same_class`` finds;
    None when it names none. A rule's class and a history's ``class`` read so."""
    if not isinstance(name, str):
        return None
    if name in classes:
        return name
    return next((c for c in classes if same_class(c, name)), None)


def validate(detector, thresholds, check_value, fail):
    """``{class: threshold}`` checked against the detector's classes: each key names a
    class in any case (stored in the detector's spelling), no two keys name one class,
    each value passes ``check_value(value, path)``. ``fail(path, message)`` raises."""
    if not isinstance(thresholds, dict):
        fail("class_thresholds", "must be an object {class: threshold}")
    spelling = {}
    for c in detector.classes:
        spelling.setdefault(name_key(c), c)
    clean, given = {}, {}
    for name, value in thresholds.items():
        path = f"class_thresholds.{name}"
        key = name_key(name)
        if key not in spelling:
            fail(
                path,
                f"{name!r} is not a class of {detector} (classes: "
                f"{', '.join(detector.classes)}; names match in any case)",
            )
        if key in given:
            fail(
                path,
                f"{given[key]!r} and {name!r} name one class ({spelling[key]}): class "
                "names match in any case; give its threshold once",
            )
        given[key] = name
        clean[spelling[key]] = check_value(value, path)
    return clean


def _entries(suite, classes, names=None):
    """[(threshold, overridden)] of ``classes`` (names as shown) under ``suite``;
    ``names`` their own names (``GroundTruth.category_names``; default: as shown)."""
    if suite is None:
        return [(DEFAULT_THRESHOLD, False) for _ in classes]
    names = classes if names is None else names
    by_key = {name_key(k): float(v) for k, v in (suite.class_thresholds or {}).items()}
    own_keys = {name_key(n) for n in names}
    out = []
    for shown, own in zip(classes, names):
        if name_key(shown) in by_key and name_key(shown) not in own_keys:
            out.append((by_key[name_key(shown)], True))  # one renamed category, as shown
        elif name_key(own) in by_key:
            out.append((by_key[name_key(own)], True))
        else:
            out.append((float(suite.score_threshold), False))
    return out


def thresholds_of(suite, classes, names=None):
    """The deployed score threshold of each of ``classes`` under ``suite``: its entry in
    ``class_thresholds`` (matched in any case), else ``score_threshold``."""
    return [value for value, _ in _entries(suite, classes, names)]


def threshold_of(suite, class_name=None):
    """The deployed score threshold of ``class_name`` under ``suite`` (``thresholds_of``);
    ``class_name`` None: ``score_threshold``."""
    if suite is None:
        return DEFAULT_THRESHOLD
    if class_name is None:
        return suite.score_threshold
    return thresholds_of(suite, [class_name])[0]


def listed(suite, classes):
    """[(class, threshold, overridden)] of ``classes`` under ``suite``, for the pages."""
    return [(c, *entry) for c, entry in zip(classes, _entries(suite, classes))]


def own_names(card, records):
    """The own names of a scorecard's classes (``records.classes`` as shown): read from
    the split's ground truth only when the loader renamed categories sharing a name."""
    split = card.evaluation.split
    if not (split.annotations_left_out or {}).get("categories_renamed"):
        return list(records.classes)
    from evaluation import outcomes

    names = list(outcomes.truth_of(card.evaluation).category_names)
    return names if len(names) == len(records.classes) else list(records.classes)


def rows_naming(rows, class_name):
    """The keys of ``rows`` (a scorecard's per-class rows or results, keyed by the
    split's own names) that ``class_name`` (a detector's class or a rule's) names, in
    any case (``same_class``), in their order."""
    return [k for k in rows if same_class(k, class_name)]


def row_of(rows, class_name):
    """The one key of ``rows`` that ``class_name`` names in any case (``rows_naming``);
    None if none, and None where two or more do (``Car`` and ``car`` as distinct
    categories): no one of them is picked (``shared_note`` says why). Every reading of
    a scorecard's rows by class name goes through here (rules, pages, API)."""
    found = rows_naming(rows, class_name)
    return found[0] if len(found) == 1 else None


def shared_note(rows, class_name):
    """Why ``row_of`` gives no key though ``rows`` name the class: ``"two categories
    of this split name class X in any case (Car, car)"``; None when fewer than two do."""
    found = rows_naming(rows, class_name)
    if len(found) < 2:
        return None
    return (
        f"{len(found)} categories of this split name class {class_name!r} in any case "
        f"({', '.join(found)}): no one of them is read as the class"
    )


def of_class(mapping, class_name):
    """``mapping``'s value (keyed by the split's class names, ``"mean"`` for the mean)
    for ``class_name``: ``"mean"`` as itself, a class through ``row_of``; None if none."""
    if class_name == "mean":
        return mapping.get("mean")
    return mapping.get(row_of(mapping, class_name))
