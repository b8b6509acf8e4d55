"""A lead creates a detector with its benchmark suite, from the page or the API; its
class list is checked here (``validate_classes``) and changed only by ``set_classes``."""

from django.core.exceptions import PermissionDenied
from django.db import transaction
from django.utils.text import slugify

from evaluation.engine.data import name_key
from evaluation.services import UploadError

from . import class_thresholds, selectors, services, suites
from .judging_queue import rejudge_later
from .models import Detector, Membership


class DetectorError(UploadError):
    """A detector that cannot be created; the message names the field."""


# Rule words, never class names: a rule's "class" is "mean" (the protocol's mean row) or
# "*" (every class), so a class so named would be judged by the mean or read as "all".
RESERVED = ("mean", "*")


def reserved(name):
    """Is ``name`` a rule word (``RESERVED``), compared stripped and in any case
    (``name_key``, as class names are compared everywhere)?"""
    return isinstance(name, str) and name_key(name.strip()) in RESERVED


def validate_classes(classes):
    """The detector's class list, checked and stripped: the one check every way of
    setting it goes through (page, API, admin, commands: ``services.create_detector``
    and ``set_classes``). Errors name the field (``classes[1]``).

    Two classes naming one class in any case (``name_key``: ``Car``, ``car``) are
    refused: every rule, threshold and page reads a class name in any case, so they
    could never be told apart."""
    if isinstance(classes, str):
        classes = [c.strip() for c in classes.replace(",", "\n").splitlines()]
        classes = [c for c in classes if c]
    if not isinstance(classes, (list, tuple)) or not classes:
        raise DetectorError("classes: a detector needs at least one class", path="classes")
    seen = {}
    for i, name in enumerate(classes):
        if not isinstance(name, str) or not name.strip() or len(name) > 64:
            raise DetectorError(
                f"classes[{i}]: a class is a name of 1 to 64 characters, got {name!r}",
                path=f"classes[{i}]",
            )
        if reserved(name):
            raise DetectorError(
                f"classes[{i}]: {name.strip()!r} is reserved (rules use 'mean' for the mean "
                "and '*' for every class); choose another name",
                path=f"classes[{i}]",
            )
        key = name_key(name.strip())
        if key in seen and seen[key] == name.strip():
            raise DetectorError(f"classes[{i}]: {name!r} is listed twice", path=f"classes[{i}]")
        if key in seen:
            raise DetectorError(
                f"classes[{i}]: {name.strip()!r} is {seen[key]!r} in another case; class "
                "names match in any case (rules, thresholds, pages), so list it once",
                path=f"classes[{i}]",
            )
        seen[key] = name.strip()
    return [c.strip() for c in classes]


def create_detector(user, team, name, classes, suite, *, description=""):
    """A new detector of ``team`` (leads of that team only) and its first suite, all or
    nothing; the suite is validated and audited as ``suites.set_suite`` does."""
    if selectors.role_in(user, team) != Membership.Role.LEAD:
        raise PermissionDenied(f"{user} may not create detectors of {team}: only its leads can")
    name = (name or "").strip()
    if not name or len(name) > 100 or not slugify(name):
        raise DetectorError("name: 1 to 100 characters, with a letter or digit", path="name")
    classes = validate_classes(classes)
    with transaction.atomic():
        if Detector.objects.filter(team=team, slug=slugify(name)).exists():
            raise DetectorError(f"name: {team} already has a detector called {name!r}", path="name")
        probe = Detector(team=team, name=name, classes=classes)
        clean = suites.validate_suite(probe, suite)
        return services.create_detector(
            team, name, classes, description=description, suite=clean, user=user
        )


def check_removal(detector, classes):
    """Refuse a class list that drops a class the current criteria or suite name (they
    would name a class the detector no longer has): change those first. Names match in
    any case, so a case-only rename (``Pedestrian`` to ``pedestrian``) drops nothing."""
    from .criteria import current_criteria

    named = class_thresholds.names_a_class  # in any case, as rules and thresholds are read
    rules = getattr(current_criteria(detector), "rules", [])
    for i, rule in enumerate(rules):
        name = rule.get("class")
        if reserved(name) or not isinstance(name, str):  # 'mean': the mean, '*': every class
            continue
        if named(name, detector.classes) and not named(name, classes):
            raise DetectorError(
                f"classes: {rule['class']!r} is named by rule {i + 1} of the criteria; "
                "change the criteria first",
                path="classes",
            )
    suite = suites.current_suite(detector)
    for name in getattr(suite, "class_thresholds", None) or {}:
        if named(name, detector.classes) and not named(name, classes):
            raise DetectorError(
                f"classes: {name!r} has a threshold in the suite (class_thresholds); "
                "change the suite first",
                path="classes",
            )


def set_classes(user, detector, classes):
    """Change a detector's class list (leads of its team, or a superuser in the admin).

    A ``*`` rule covers every class, so the class list is part of what a judgement was
    made on: as a suite change does, the change is a new suite version (same content,
    audited with the classes before and after) and every undecided candidate is judged
    again once it commits; the standing verdicts no longer match (they name the older
    suite). One transaction, under the detector's row lock. Returns the new suite.
    """
    if not getattr(user, "is_superuser", False) and (
        selectors.role_in(user, detector.team) != Membership.Role.LEAD
    ):
        raise PermissionDenied(f"{user} may not change the classes of {detector}: leads only")
    classes = validate_classes(classes)
    with transaction.atomic():
        locked = Detector.objects.select_for_update().get(pk=detector.pk)
        before = list(locked.classes)
        if classes == before:
            return suites.current_suite(locked)
        check_removal(locked, classes)
        Detector.objects.filter(pk=locked.pk).update(classes=classes)
        locked.classes = classes
        suite = suites.reissue(locked, user, {"classes": classes, "classes_before": before})
        rejudge_later(locked.pk)
    detector.classes = classes
    return suite
