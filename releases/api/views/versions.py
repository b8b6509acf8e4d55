"""Versions: verdict, results, evidence, sign-off; sign-offs; comparisons."""

from django.template.loader import render_to_string
from drf_spectacular.types import OpenApiTypes
from drf_spectacular.utils import OpenApiParameter, extend_schema, extend_schema_view
from rest_framework import exceptions, generics, renderers
from rest_framework.response import Response
from rest_framework.views import APIView

from ... import selectors, services, verdicts
from ...models import ModelVersion, Outcome, SignOff
from .. import serializers as s
from ..errors import error_response
from .base import (
    DETECTOR,
    SINCE,
    UNTIL,
    Endpoint,
    _choice,
    _detector,
    _filter,
    _int,
    _param,
    _text,
    _valid,
    _version,
)

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
        verdict = verdicts.verdict_of(found)
        outcomes = (
            list(verdict.judgement.outcomes.select_related("split", "criteria"))
            if verdict.judgement
            else []
        )
        counts = {status: 0 for status in Outcome.Status.values}
        for o in outcomes:
            counts[o.status] += 1
        body = {
            **vars(verdict),
            "version": found.pk,
            "final": verdict.final,
            "outcome_counts": counts,
            "failing": [o for o in outcomes if o.status in ("fail", "missing")],
        }
        return Response(s.VerdictSerializer(body).data)


class VersionJudgements(Endpoint, APIView):
    @extend_schema(
        responses=s.JudgementSerializer(many=True),
        summary="Every judgement of the version, newest first (kept forever)",
        description="Outcomes of one: ``/outcomes/?judgement=<id>``. The current verdict "
        "is ``/versions/<id>/verdict/``: the newest judgement counts only while it "
        "matches the current criteria, suite, baseline and evaluations.",
    )
    def get(self, request, pk):
        found = _version(request, pk)
        rows = found.judgements.select_related("criteria", "suite", "baseline").order_by("-id")
        return Response(s.JudgementSerializer(rows, many=True).data)


class VersionResults(Endpoint, APIView):
    @extend_schema(
        responses=OpenApiTypes.OBJECT,
        summary="Per split: the primary protocol's summary, per-class rows and slices, "
        "and each level protocol's values per level and class",
        description="Beside each number, how it was computed, as its stored result says: "
        "the primary protocol's ``protocol_record`` (the engine's full record: matching "
        "rule, IoU slots and per-class values, recall sampling, interpolation, detection "
        "cap, tie order, pixel offset, box policy, area source, averaged and absent "
        "classes and why), ``box_policy``, ``engine_version``, ``truth_fingerprint``, "
        "``protocol_sha256``, ``protocol_version``; each other protocol's (those of "
        "``other_protocols`` and ``levels``) in ``other_protocols_provenance``, keyed by "
        "protocol. A result stored by an older engine lacks some: they are null, and "
        "``not_recorded`` says why (``{key: reason}``).",
    )
    def get(self, request, pk):
        return Response(selectors.version_results(_version(request, pk)))


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
        description="Per split, beside the primary protocol's numbers, how they were "
        "computed as the stored result says (``evaluation``, ``protocol_record`` with "
        "its box policy, ``box_policy``, ``engine_version``, ``truth_fingerprint``, "
        "``protocol_sha256``; ``not_recorded``: what an older result lacks, and why), "
        "and the other protocols' numbers (``other_protocols``, ``levels``) with theirs "
        "(``other_protocols_provenance``, keyed by protocol), as ``/results/`` gives them.",
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
        description="Also per image tag (``tags``), per size bucket (``sizes``: the primary "
        "protocol's buckets) and per level or pedestrian setup of the suite's level "
        "protocols (``levels``: ``lower_is_better`` for miss rate; no interval).",
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
                    "sizes": entry["sizes"],
                    "levels": entry["levels"],
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
