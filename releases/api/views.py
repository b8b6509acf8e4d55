"""API endpoints: parse the request, call one selector or service, serialise.

Reads are scoped exactly as the pages are (``selectors.visible_*``: other teams'
objects are 404); writes go through the same services, which check the role.
"""

import datetime

from django.db.models import Exists, OuterRef
from django.template.loader import render_to_string
from django.utils.dateparse import parse_datetime
from drf_spectacular.types import OpenApiTypes
from drf_spectacular.utils import OpenApiParameter, extend_schema, extend_schema_view
from rest_framework import exceptions, generics, renderers
from rest_framework.response import Response
from rest_framework.views import APIView

from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit, Evaluation
from evaluation.storage import oversized

from .. import criteria, selectors, services
from ..models import ModelVersion, Outcome, PredictionSet, SignOff
from . import serializers as s
from .errors import ApiSchema, error_response


class PayloadTooLarge(exceptions.APIException):
    status_code = 413
    default_code = "too_large"


class NotScored(exceptions.APIException):
    status_code = 409
    default_code = "not_scored"


def _refuse_oversized(request):
    """Refuse before parsing (``frontend.middleware`` answers these first; this keeps
    the view safe without it)."""
    if reason := oversized(request):
        raise PayloadTooLarge(reason)


# Query parameters ------------------------------------------------------------------


def _param(name, kind, description):
    return OpenApiParameter(name, kind, OpenApiParameter.QUERY, description=description)


DETECTOR = _param("detector", int, "Only this detector's")
VERSION = _param("version", int, "Only this version's")
SPLIT = _param("split", int, "Only on this benchmark split")
SINCE = _param("since", OpenApiTypes.DATETIME, "At or after this time (ISO 8601)")
UNTIL = _param("until", OpenApiTypes.DATETIME, "Before this time (ISO 8601)")


class Endpoint:
    """Base of every view: its schema documents the error responses (errors.ApiSchema)."""

    schema = ApiSchema()


# Ids are 64-bit signed integers in both databases; SQLite cannot even compare a larger one.
ID_RANGE = range(-(2**63), 2**63)


def _int(request, name):
    raw = request.query_params.get(name)
    if raw in (None, ""):
        return None
    try:
        value = int(raw)
    except ValueError:
        raise exceptions.ValidationError({name: [f"must be an integer, got {raw!r}"]}) from None
    if value not in ID_RANGE:
        raise exceptions.ValidationError({name: [f"must be a 64-bit integer, got {raw}"]})
    return value


def _time(request, name):
    """An ISO 8601 date-time, in UTC (a time without an offset is UTC)."""
    raw = request.query_params.get(name)
    if raw in (None, ""):
        return None
    try:
        value = parse_datetime(raw.replace(" ", "+"))
        if value is not None:
            value = value.replace(tzinfo=value.tzinfo or datetime.UTC).astimezone(datetime.UTC)
    except (ValueError, OverflowError):  # well formed but not a date, or beyond year 9999
        value = None
    if value is None:
        raise exceptions.ValidationError({name: [f"must be an ISO 8601 date-time, got {raw!r}"]})
    return value


def _text(request, name):
    """A free-text parameter; PostgreSQL refuses NUL in text, so it is refused here."""
    raw = request.query_params.get(name)
    if raw and "\x00" in raw:
        raise exceptions.ValidationError({name: ["must not contain NUL characters"]})
    return raw


def _choice(request, name, allowed):
    raw = request.query_params.get(name)
    if raw in (None, ""):
        return None
    if raw not in allowed:
        raise exceptions.ValidationError({name: [f"must be one of {', '.join(allowed)}"]})
    return raw


def _filter(queryset, request, **fields):
    """Apply the common filters; ``fields`` maps a parameter to a lookup."""
    for name, lookup in fields.items():
        if name in ("since", "until"):
            value = _time(request, name)
        else:
            value = _int(request, name)
        if value is not None:
            queryset = queryset.filter(**{lookup: value})
    return queryset


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


class DetectorDetail(DetectorMixin, generics.RetrieveAPIView):
    pass


def _detector(request, pk):
    return selectors.detector_for(request.user, pk)


def _version(request, pk):
    return selectors.version_for(request.user, pk)


class DetectorHistory(Endpoint, APIView):
    @extend_schema(
        responses=OpenApiTypes.OBJECT,
        summary="Every version's numbers on every split",
        description="``values[split id][metric][class]`` is aligned with ``versions``; "
        "null where not scored; class ``mean`` is the protocol's mean.",
    )
    def get(self, request, pk):
        return Response(selectors.history_chart(_detector(request, pk)))


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


def _valid(serializer_class, request):
    serializer = serializer_class(data=request.data)
    serializer.is_valid(raise_exception=True)
    return serializer.validated_data


# Versions ----------------------------------------------------------------------------


class VersionMixin(Endpoint):
    serializer_class = s.VersionSerializer

    def get_queryset(self):
        return ModelVersion.objects.filter(
            detector__in=selectors.visible_detectors(self.request.user)
        ).select_related("created_by", "sign_off__decided_by")

    def get_serializer(self, *args, **kwargs):
        if args:
            rows = args[0] if isinstance(args[0], list) else [args[0]]
            kwargs.setdefault("context", self.get_serializer_context())
            kwargs["context"]["states"] = selectors.version_states(rows)
        return super().get_serializer(*args, **kwargs)


@extend_schema_view(
    get=extend_schema(
        parameters=[DETECTOR, _param("label", str, "Exact version label"), SINCE, UNTIL]
    )
)
class VersionList(VersionMixin, generics.ListCreateAPIView):
    def get_queryset(self):
        queryset = _filter(
            super().get_queryset(),
            self.request,
            detector="detector_id",
            since="created_at__gte",
            until="created_at__lt",
        )
        if label := _text(self.request, "label"):
            queryset = queryset.filter(label=label)
        return queryset.order_by("detector_id", "created_at", "id")

    def paginate_queryset(self, queryset):
        page = super().paginate_queryset(queryset)
        return list(page) if page is not None else None

    @extend_schema(
        request=s.VersionInput, responses={201: s.VersionSerializer, 404: error_response(404)}
    )
    def post(self, request):
        data = _valid(s.VersionInput, request)
        found = _detector(request, data.pop("detector"))
        created = services.create_version(found, data.pop("label"), request.user, **data)
        return Response(self.get_serializer(created).data, status=201)


class VersionDetail(VersionMixin, generics.RetrieveAPIView):
    pass


class VersionVerdict(Endpoint, APIView):
    @extend_schema(
        responses=s.VerdictSerializer,
        summary="Whether scoring and judging are over, and the verdict",
    )
    def get(self, request, pk):
        found = _version(request, pk)
        verdict = selectors.verdict_of(found)
        failing = Outcome.objects.filter(version=found, status="fail").select_related(
            "split", "criteria"
        )
        return Response(
            s.VerdictSerializer({"version": found.pk, **verdict, "failing": failing}).data
        )


class VersionResults(Endpoint, APIView):
    @extend_schema(
        responses=OpenApiTypes.OBJECT,
        summary="Per split: the primary protocol's summary, per-class rows and slices",
    )
    def get(self, request, pk):
        found = _version(request, pk)
        out = []
        for entry in selectors.version_scorecards(found):
            card = entry["card"]
            row = {
                "split": entry["split"].pk,
                "split_name": str(entry["split"]),
                "prediction_set": entry["prediction_set"].pk,
                "scored": card is not None,
            }
            if card is not None:
                row.update(
                    {
                        "evaluation": card.evaluation_id,
                        "protocol": card.protocol,
                        "summary": dict(entry["summary"]),
                        "classes": [
                            selectors.class_numbers(c) for c in entry["classes"] if c is not None
                        ],
                        "tags": dict(entry["tags"]),
                        "sizes": dict(entry["sizes"]),
                        "other_protocols": {p: ap for p, ap in entry["others"]},
                    }
                )
            out.append(row)
        return Response({"version": found.pk, "label": found.label, "splits": out})


class EvidenceRenderer(renderers.StaticHTMLRenderer):
    format = "html"


class VersionEvidence(Endpoint, APIView):
    renderer_classes = [renderers.JSONRenderer, EvidenceRenderer]

    def handle_exception(self, exc):
        """Errors keep the one JSON error body, even when the report was asked as HTML."""
        response = super().handle_exception(exc)
        self.request.accepted_renderer = renderers.JSONRenderer()
        self.request.accepted_media_type = "application/json"
        return response

    @extend_schema(
        parameters=[
            OpenApiParameter(
                "format",
                str,
                OpenApiParameter.QUERY,
                enum=["json", "html"],
                description="json (default) or html",
            )
        ],
        responses={(200, "application/json"): OpenApiTypes.OBJECT, (200, "text/html"): str},
        summary="The evidence report: scores, intervals, outcomes, hashes, decision",
    )
    def get(self, request, pk):
        found = _version(request, pk)
        report = selectors.evidence_for(found)
        if request.accepted_renderer.format == "html":
            html = render_to_string("releases/evidence_report.html", {"report": report})
            return Response(html)
        return Response(report)


class VersionSignOff(Endpoint, APIView):
    @extend_schema(
        request=s.SignOffInput,
        responses={201: s.SignOffSerializer, 409: error_response(409)},
        summary="A lead's decision; approval makes the version the baseline",
    )
    def post(self, request, pk):
        found = _version(request, pk)
        data = _valid(s.SignOffInput, request)
        record, _ = services.sign_off(
            found,
            request.user,
            data["decision"],
            data["comment"],
            justification=data["justification"],
        )
        return Response(s.SignOffSerializer(record).data, status=201)


@extend_schema(
    parameters=[
        DETECTOR,
        _param("decision", str, "approved or rejected"),
        SINCE,
        UNTIL,
    ]
)
class SignOffList(Endpoint, generics.ListAPIView):
    serializer_class = s.SignOffSerializer

    def get_queryset(self):
        queryset = SignOff.objects.filter(
            version__detector__in=selectors.visible_detectors(self.request.user)
        ).select_related("decided_by")
        if decision := _choice(self.request, "decision", SignOff.Decision.values):
            queryset = queryset.filter(decision=decision)
        queryset = _filter(
            queryset,
            self.request,
            detector="version__detector_id",
            since="decided_at__gte",
            until="decided_at__lt",
        )
        return queryset.order_by("decided_at", "id")


class Comparison(Endpoint, APIView):
    @extend_schema(
        parameters=[
            _param("reference", int, "The reference version (e.g. the baseline)"),
            _param("candidate", int, "The candidate version"),
        ],
        responses={200: OpenApiTypes.OBJECT, 404: error_response(404)},
        summary="Per shared split: per-class AP deltas (candidate - reference), worst first",
    )
    def get(self, request):
        ids = {}
        for name in ("reference", "candidate"):
            ids[name] = _int(request, name)
            if ids[name] is None:
                raise exceptions.ValidationError({name: ["a version id is required"]})
        reference, candidate = (
            _version(request, ids["reference"]),
            _version(request, ids["candidate"]),
        )
        if reference.detector_id != candidate.detector_id:
            raise exceptions.ValidationError(
                {"candidate": ["must be a version of the reference's detector"]}
            )
        splits = []
        for entry in selectors.compare_versions(reference, candidate):
            deltas = []
            for d in entry["deltas"]:
                interval = d.pop("interval")
                deltas.append({**d, "interval": None if interval is None else list(interval[:2])})
            splits.append(
                {
                    "split": entry["split"].pk,
                    "split_name": str(entry["split"]),
                    "deltas": deltas,
                    "tags": entry["tags"],
                }
            )
        return Response(
            {
                "reference": {"id": reference.pk, "label": reference.label},
                "candidate": {"id": candidate.pk, "label": candidate.label},
                "metric": "AP",
                "protocol": reference.detector.primary_protocol,
                "splits": splits,
            }
        )


# Splits ------------------------------------------------------------------------------


@extend_schema_view(
    get=extend_schema(parameters=[_param("name", str, "Split name (every revision)")])
)
class SplitList(Endpoint, generics.ListCreateAPIView):
    serializer_class = s.SplitSerializer

    def get_queryset(self):
        queryset = BenchmarkSplit.objects.order_by("name", "revision")
        if name := _text(self.request, "name"):
            queryset = queryset.filter(name=name)
        return queryset

    @extend_schema(
        request={"multipart/form-data": s.SplitInput},
        responses={201: s.SplitSerializer, 413: error_response(413)},
    )
    def post(self, request):
        if not selectors.can_load_splits(request.user):
            raise exceptions.PermissionDenied("only engineers and leads load benchmark splits")
        _refuse_oversized(request)
        data = _valid(s.SplitInput, request)
        split = evaluation_services.load_split(
            name=data["name"],
            revision=data["revision"],
            truth=data["truth"],
            images=data.get("images"),
            description=data["description"],
            created_by=request.user.get_username(),
        )
        return Response(s.SplitSerializer(split).data, status=201)


class SplitDetail(Endpoint, generics.RetrieveAPIView):
    serializer_class = s.SplitSerializer
    queryset = BenchmarkSplit.objects.all()


# Prediction sets ---------------------------------------------------------------------


class PredictionSetMixin(Endpoint):
    serializer_class = s.PredictionSetSerializer

    def get_queryset(self):
        return PredictionSet.objects.filter(
            version__detector__in=selectors.visible_detectors(self.request.user)
        ).select_related("version", "split", "predictions", "uploaded_by")


@extend_schema_view(get=extend_schema(parameters=[DETECTOR, VERSION, SPLIT, SINCE, UNTIL]))
class PredictionSetList(PredictionSetMixin, generics.ListCreateAPIView):
    def get_queryset(self):
        return _filter(
            super().get_queryset(),
            self.request,
            detector="version__detector_id",
            version="version_id",
            split="split_id",
            since="uploaded_at__gte",
            until="uploaded_at__lt",
        ).order_by("uploaded_at", "id")

    @extend_schema(
        request={"multipart/form-data": s.PredictionSetInput},
        responses={
            201: s.PredictionSetSerializer,
            404: error_response(404),
            409: error_response(409),
            413: error_response(413),
        },
        summary="Upload a version's predictions on a split; scoring is queued",
        description="The version is created if the label is new. The same file again "
        "returns the same prediction set (201 as well). Files up to "
        "BENCHBOOK_INLINE_VALIDATION_BYTES are checked against the split first (400 with "
        "file, record and field). A different file replaces the split's predictions only "
        "if their evaluations failed (the old set stays in the history); otherwise 409.",
    )
    def post(self, request):
        _refuse_oversized(request)
        data = _valid(s.PredictionSetInput, request)
        found = _detector(request, data["detector"])
        split = BenchmarkSplit.objects.filter(pk=data["split"]).first()
        if split is None:
            raise exceptions.ValidationError({"split": [f"no benchmark split {data['split']}"]})
        prediction_set = services.submit_for_label(
            found,
            data["version"],
            split,
            data["predictions"],
            request.user,
            source_commit=data["source_commit"],
            notes=data["notes"],
        )
        return Response(self.get_serializer(prediction_set).data, status=201)


class PredictionSetDetail(PredictionSetMixin, generics.RetrieveAPIView):
    pass


# Evaluations -------------------------------------------------------------------------


class EvaluationMixin(Endpoint):
    serializer_class = s.EvaluationSerializer

    def get_queryset(self):
        return selectors.visible_evaluations(self.request.user).select_related(
            "split", "predictions"
        )


@extend_schema(
    parameters=[
        DETECTOR,
        VERSION,
        SPLIT,
        _param("state", str, "queued, running, done or failed"),
        _param("protocol", str, "Protocol name, e.g. coco"),
        SINCE,
        UNTIL,
    ]
)
class EvaluationList(EvaluationMixin, generics.ListAPIView):
    def get_queryset(self):
        queryset = _filter(
            super().get_queryset(),
            self.request,
            split="split_id",
            since="created_at__gte",
            until="created_at__lt",
        )
        owners = {
            "detector": "version__detector_id",
            "version": "version_id",
        }
        for name, lookup in owners.items():
            value = _int(self.request, name)
            if value is not None:
                sets = PredictionSet.objects.filter(
                    predictions_id=OuterRef("predictions_id"),
                    split_id=OuterRef("split_id"),
                    **{lookup: value},
                )
                queryset = queryset.filter(Exists(sets))
        if state := _choice(self.request, "state", Evaluation.State.values):
            queryset = queryset.filter(state=state)
        if protocol := _text(self.request, "protocol"):
            queryset = queryset.filter(protocol=protocol)
        return queryset.order_by("created_at", "id")


class EvaluationDetail(EvaluationMixin, generics.RetrieveAPIView):
    pass


class EvaluationResult(EvaluationMixin, generics.GenericAPIView):
    @extend_schema(
        responses={200: OpenApiTypes.OBJECT, 409: error_response(409)},
        summary="The full scorecard: summary, per class with curves, slices, provenance",
    )
    def get(self, request, pk):
        evaluation = self.get_object()
        if evaluation.state != Evaluation.State.DONE:
            raise NotScored(f"evaluation {pk} is {evaluation.state}")
        card = evaluation.scorecard
        return Response(
            {
                "evaluation": evaluation.pk,
                "protocol": card.protocol,
                "protocol_version": card.protocol_version,
                "engine_version": card.engine_version,
                "split_sha256": card.split_sha256,
                "predictions_sha256": card.predictions_sha256,
                "summary": dict(selectors.summary_items(card.summary)),
                "result": card.result,
            }
        )


# Outcomes and flags ------------------------------------------------------------------


@extend_schema(
    parameters=[
        DETECTOR,
        VERSION,
        SPLIT,
        _param("status", str, "pass, fail, not significant or no data"),
        SINCE,
        UNTIL,
    ]
)
class OutcomeList(Endpoint, generics.ListAPIView):
    """Judged rules. ``/flags/`` lists only the failing ones: the regressions."""

    serializer_class = s.OutcomeSerializer
    only_status = None

    def get_queryset(self):
        queryset = Outcome.objects.filter(
            version__detector__in=selectors.visible_detectors(self.request.user)
        ).select_related("split", "criteria")
        if self.only_status:
            queryset = queryset.filter(status=self.only_status)
        elif status := _choice(self.request, "status", Outcome.Status.values):
            queryset = queryset.filter(status=status)
        return _filter(
            queryset,
            self.request,
            detector="version__detector_id",
            version="version_id",
            split="split_id",
            since="judged_at__gte",
            until="judged_at__lt",
        ).order_by("version_id", "rule_index", "split_id", "class_name")


class FlagList(OutcomeList):
    only_status = Outcome.Status.FAIL


# Audit trail -------------------------------------------------------------------------


@extend_schema(
    parameters=[
        _param("kind", str, "Event kind, e.g. signed off"),
        _param("subject", str, "Subject, e.g. version:12"),
        SINCE,
        UNTIL,
    ]
)
class AuditEventList(Endpoint, generics.ListAPIView):
    serializer_class = s.AuditEventSerializer

    def get_queryset(self):
        from ..models import AuditEvent

        queryset = selectors.visible_audit_events(self.request.user)
        if kind := _choice(self.request, "kind", AuditEvent.Kind.values):
            queryset = queryset.filter(kind=kind)
        if subject := _text(self.request, "subject"):
            queryset = queryset.filter(subject=subject)
        return _filter(
            queryset, self.request, since="created_at__gte", until="created_at__lt"
        ).order_by("id")


class AuditEventDetail(Endpoint, generics.RetrieveAPIView):
    serializer_class = s.AuditEventSerializer

    def get_queryset(self):
        return selectors.visible_audit_events(self.request.user)
