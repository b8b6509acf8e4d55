"""Look-ups shared by the pages: a detector or version the user may see, else 404."""

from django.http import Http404

from releases import selectors
from releases.models import Detector, ModelVersion


def detector_or_404(user, detector_id):
    try:
        return selectors.detector_for(user, detector_id)
    except Detector.DoesNotExist:
        raise Http404("no such detector") from None


def version_or_404(user, version_id):
    try:
        return selectors.version_for(user, version_id)
    except ModelVersion.DoesNotExist:
        raise Http404("no such version") from None
