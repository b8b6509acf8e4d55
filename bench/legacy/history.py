"""The history reads as they were before one-series-per-request (commit a2d718b), kept
for ``bench/pages.py`` only, to time the old design beside the new in one run: the
selector that builds every metric x class x split x version number, the page that
embeds all of them, and the API view that returns all of them. Not production code.
"""

import pathlib

import numpy as np
from django.contrib.auth.decorators import login_required
from django.template import engines
from django.urls import include, path, reverse
from rest_framework.response import Response
from rest_framework.views import APIView

from frontend.views.lookup import detector_or_404
from releases import selectors
from releases.api.views.base import _detector
from releases.models import PredictionSet
from releases.selectors.decisions import version_badges
from releases.selectors.scores import METRICS, _splits

TEMPLATE = pathlib.Path(__file__).with_name("detector.html")


def history_chart(detector):
    """Every version's numbers on every split, for the history chart and table.

    ``values[split][metric][class]`` is a list aligned with ``versions`` (None where
    not scored); class ``"mean"`` is the protocol's mean. A few queries, numbers as
    tuples.
    """
    from evaluation.models import ClassScore

    versions = list(detector.versions.select_related("sign_off").order_by("created_at"))
    badges = version_badges(versions)
    sets = list(
        PredictionSet.objects.current()
        .filter(version__detector=detector)
        .values_list("version_id", "split_id", "predictions_id")
    )
    version_of = {(file_id, split_id): version_id for version_id, split_id, file_id in sets}
    split_objects = {s.pk: s for s in _splits({split_id for _, split_id, _ in sets})}
    splits = sorted(split_objects.values(), key=lambda s: (s.name, s.revision))
    position = {v.pk: i for i, v in enumerate(versions)}
    classes = ["mean", *detector.classes]
    fields = [field for field, _ in METRICS.values()]
    scores = ClassScore.objects.filter(
        scorecard__evaluation__state="done",
        scorecard__evaluation__protocol=detector.primary_protocol,
        scorecard__evaluation__predictions_id__in={file_id for _, _, file_id in sets},
        scorecard__evaluation__prediction_sets__in=PredictionSet.objects.current().filter(
            version__detector=detector
        ),  # the sets' own evaluations: never another team's scorecard of the same bytes
    ).values_list(
        "scorecard__evaluation__predictions_id",
        "scorecard__evaluation__split_id",
        "class_name",
        *fields,
    )
    # One array (split, metric, class, version) filled in a single vectorised step:
    # the Python loop would round 45,000 numbers one by one for 200 versions x 5 splits.
    split_index = {split.pk: k for k, split in enumerate(splits)}
    class_index = {name: k for k, name in enumerate(classes)}
    where, numbers = [], []
    for file_id, split_id, name, *row in scores:
        version_id = version_of.get((file_id, split_id))
        k = class_index.get(name or "mean")
        if version_id is not None and k is not None:
            where.append((split_index[split_id], k, position[version_id]))
            numbers.append(row)
    cube = np.full((len(splits), len(METRICS), len(classes), len(versions)), np.nan)
    if where:
        s_, c_, v_ = np.array(where).T
        # None (not measured) becomes NaN here and None again below.
        cube[s_, :, c_, v_] = np.array(numbers, dtype=float)
    # Four decimals: the page shows three, and shorter JSON renders faster. np.round
    # scales by 10^4 and can differ from Python's correctly rounded round() at halfway
    # cases; those few are rounded by round(), so the numbers equal the scorecard's.
    rounded = np.round(cube, 4)
    scaled = cube * 1e4
    for at in zip(*np.nonzero(np.abs(scaled - np.floor(scaled) - 0.5) < 1e-6)):
        rounded[at] = round(float(cube[at]), 4)
    shown = rounded.astype(object)
    shown[np.isnan(cube)] = None
    values = {
        split.pk: {
            metric: dict(zip(classes, shown[k, m].tolist())) for m, metric in enumerate(METRICS)
        }
        for k, split in enumerate(splits)
    }
    return {
        "protocol": detector.primary_protocol,
        "versions": [
            {
                "id": v.pk,
                "label": v.label,
                "date": v.created_at.date().isoformat(),
                "state": badges[v.pk],
            }
            for v in versions
        ],
        "splits": [{"id": s.pk, "name": str(s)} for s in splits],
        "metrics": list(METRICS),
        "classes": classes,
        "values": {str(k): v for k, v in values.items()},
    }


@login_required
def page(request, detector_id):
    found = detector_or_404(request.user, detector_id)
    chart = history_chart(found)
    for entry in chart["versions"]:
        entry["url"] = reverse("version", args=[entry["id"]])
    table = [
        {
            "version": v,
            "values": [chart["values"][str(s["id"])]["AP"]["mean"][i] for s in chart["splits"]],
        }
        for i, v in enumerate(chart["versions"])
    ]
    template = engines["django"].from_string(TEMPLATE.read_text())
    context = {
        "detector": found,
        "chart": chart,
        "table": list(reversed(table)),
        "can_upload": selectors.role_in(request.user, found.team) in selectors.UPLOAD_ROLES,
    }
    from django.http import HttpResponse

    return HttpResponse(template.render(context, request))


class Api(APIView):
    def get(self, request, pk):
        return Response(history_chart(_detector(request, pk)))


urlpatterns = [
    path("legacy/detectors/<int:detector_id>/", page),
    path("legacy/api/detectors/<int:pk>/history/", Api.as_view()),
    path("", include("benchbook.urls")),
]
