"""Who am I, detectors, their history, criteria and benchmark suite."""

from drf_spectacular.types import OpenApiTypes
from drf_spectacular.utils import extend_schema
from rest_framework import exceptions, generics
from rest_framework.response import Response
from rest_framework.views import APIView

from ... import criteria, selectors, suites
from .. import serializers as s
from ..errors import error_response
from ..history_schema import History
from .base import (
    Endpoint,
    _detector,
    _param,
    _text,
    _valid,
)

# Who am I ----------------------------------------------------------------------------


class Me(Endpoint, APIView):
    @extend_schema(responses=OpenApiTypes.OBJECT, summary="The user and their roles")
    def get(self, request):
        memberships = request.user.memberships.select_related("team").order_by("team__name")
        return Response(
            {
                "username": request.user.get_username(),
                "teams": [
                    {"id": m.team_id, "name": m.team.name, "role": m.role} for m in memberships
                ],
                "reads_all_teams": selectors.reads_all_teams(request.user),
            }
        )


# Detectors ---------------------------------------------------------------------------


class DetectorMixin(Endpoint):
    serializer_class = s.DetectorSerializer

    def get_queryset(self):
        return selectors.visible_detectors(self.request.user).order_by("team__name", "name")

    def get_serializer_context(self):
        context = super().get_serializer_context()
        baselines = selectors.baselines_of(self.get_queryset())
        context["baselines"] = {detector_id: v.pk for detector_id, v in baselines.items()}
        return context


@extend_schema(
    parameters=[
        _param("team", str, "Team slug"),
        _param("name", str, "Exact detector name (case-insensitive)"),
    ]
)
class DetectorList(DetectorMixin, generics.ListAPIView):
    def get_queryset(self):
        queryset = super().get_queryset()
        if team := _text(self.request, "team"):
            queryset = queryset.filter(team__slug=team)
        if name := _text(self.request, "name"):
            queryset = queryset.filter(name__iexact=name)
        return queryset

    @extend_schema(
        request=s.DetectorInput,
        responses={201: s.DetectorSerializer, 404: error_response(404)},
        summary="Create a detector with its benchmark suite (leads of the team)",
    )
    def post(self, request):
        from ... import detectors

        data = _valid(s.DetectorInput, request)
        team = selectors.visible_teams(request.user).filter(pk=data["team"]).first()
        if team is None:
            raise exceptions.NotFound("team: no such team")
        created = detectors.create_detector(
            request.user,
            team,
            data["name"],
            data["classes"],
            data["suite"],
            description=data["description"],
        )
        return Response(
            s.DetectorSerializer(created, context=self.get_serializer_context()).data, status=201
        )


class DetectorDetail(DetectorMixin, generics.RetrieveAPIView):
    pass


class DetectorHistory(Endpoint, APIView):
    @extend_schema(
        parameters=[
            _param("metric", str, f"One of {', '.join(selectors.METRICS)} (default AP)"),
            _param("class", str, "A class of the detector, or mean (default)"),
            _param(
                "revisions",
                str,
                "joined (default): one line per split name, its newest scored revision "
                "per version; separate: one line per split revision",
            ),
            _param(
                "level",
                str,
                "A level of the suite's level protocols (e.g. moderate of kitti2d, with "
                "metric=AP): that level's numbers instead of the primary protocol's",
            ),
            _param(
                "setup",
                str,
                "A pedestrian setup (e.g. reasonable, with metric=miss_rate; lower is "
                "better): the same as level",
            ),
        ],
        responses=History,
        summary="One metric and class of every version on every split",
        description="``series[].values`` is aligned with ``versions``; null where not "
        "scored; class ``mean`` is the protocol's mean. ``changes`` lists where a joined "
        "line moves to another split revision. One metric and class per request. "
        "``sources`` lists the levels and setups offered (``?metric=&level=``). "
        "Each version's current verdict: ``GET /api/v1/versions/?detector=<id>``.",
    )
    def get(self, request, pk):
        found = _detector(request, pk)
        try:
            chart = selectors.history_chart(
                found,
                metric=_text(request, "metric") or "AP",
                class_name=_text(request, "class") or "mean",
                revisions=_text(request, "revisions") or "joined",
                level=_text(request, "level"),
                setup=_text(request, "setup"),
            )
        except selectors.HistoryError as e:
            name, _, message = str(e).partition(": ")
            raise exceptions.ValidationError({name: [message]}) from None
        return Response(chart)


class DetectorCriteria(Endpoint, APIView):
    @extend_schema(responses=s.CriteriaSerializer(many=True), summary="Criteria, newest first")
    def get(self, request, pk):
        found = _detector(request, pk)
        rows = found.criteria.select_related("created_by").order_by("-number")
        return Response(s.CriteriaSerializer(rows, many=True).data)

    @extend_schema(request=s.CriteriaInput, responses={201: s.CriteriaSerializer})
    def post(self, request, pk):
        found = _detector(request, pk)
        data = _valid(s.CriteriaInput, request)
        saved = criteria.set_criteria(found, request.user, data["rules"])
        return Response(s.CriteriaSerializer(saved).data, status=201)


class DetectorSuite(Endpoint, APIView):
    @extend_schema(
        responses=s.SuiteSerializer(many=True),
        summary="Benchmark suite versions, newest (current) first",
    )
    def get(self, request, pk):
        found = _detector(request, pk)
        rows = found.suites.select_related("created_by").order_by("-number")
        return Response(s.SuiteSerializer(rows, many=True).data)

    @extend_schema(
        request=s.SuiteInput,
        responses={201: s.SuiteSerializer},
        summary="A new suite version (leads); undecided candidates are judged again",
    )
    def post(self, request, pk):
        found = _detector(request, pk)
        data = _valid(s.SuiteInput, request)
        saved = suites.set_suite(found, request.user, dict(data))
        return Response(s.SuiteSerializer(saved).data, status=201)
