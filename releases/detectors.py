"""A lead creates a detector with its benchmark suite, from the page or the API."""

from django.core.exceptions import PermissionDenied
from django.db import transaction
from django.utils.text import slugify

from evaluation.services import UploadError

from . import selectors, services, suites
from .models import Detector, Membership


class DetectorError(UploadError):
    """A detector that cannot be created; the message names the field."""


def _classes(classes):
    if isinstance(classes, str):
        classes = [c.strip() for c in classes.replace(",", "\n").splitlines()]
        classes = [c for c in classes if c]
    if not isinstance(classes, list) or not classes:
        raise DetectorError("classes: a detector needs at least one class", path="classes")
    for i, name in enumerate(classes):
        if not isinstance(name, str) or not name.strip() or len(name) > 64:
            raise DetectorError(
                f"classes[{i}]: a class is a name of 1 to 64 characters, got {name!r}",
                path=f"classes[{i}]",
            )
    seen = set()
    for i, name in enumerate(classes):
        if name in seen:
            raise DetectorError(f"classes[{i}]: {name!r} is listed twice", path=f"classes[{i}]")
        seen.add(name)
    return [c.strip() for c in classes]


def create_detector(user, team, name, classes, suite, *, description=""):
    """A new detector of ``team`` (leads of that team only) and its first suite, all or
    nothing; the suite is validated and audited as ``suites.set_suite`` does."""
    if selectors.role_in(user, team) != Membership.Role.LEAD:
        raise PermissionDenied(f"{user} may not create detectors of {team}: only its leads can")
    name = (name or "").strip()
    if not name or len(name) > 100 or not slugify(name):
        raise DetectorError("name: 1 to 100 characters, with a letter or digit", path="name")
    classes = _classes(classes)
    with transaction.atomic():
        if Detector.objects.filter(team=team, slug=slugify(name)).exists():
            raise DetectorError(f"name: {team} already has a detector called {name!r}", path="name")
        probe = Detector(team=team, name=name, classes=classes)
        clean = suites.validate_suite(probe, suite)
        return services.create_detector(
            team, name, classes, description=description, suite=clean, user=user
        )
