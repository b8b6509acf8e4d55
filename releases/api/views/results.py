"""Evaluations, outcomes and flags, the audit trail."""

from django.db.models import Exists, OuterRef
from drf_spectacular.types import OpenApiTypes
from drf_spectacular.utils import extend_schema
from rest_framework import generics
from rest_framework.response import Response

from evaluation import left_out
from evaluation.models import Evaluation

from ... import selectors
from ...models import Outcome
from .. import serializers as s
from ..errors import error_response
from .base import (
    DETECTOR,
    SINCE,
    SPLIT,
    UNTIL,
    VERSION,
    Endpoint,
    NotScored,
    _choice,
    _filter,
    _int,
    _param,
    _text,
)

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
            "detector": "predictionset__version__detector_id",
            "version": "predictionset__version_id",
        }
        for name, lookup in owners.items():
            value = _int(self.request, name)
            if value is not None:  # only the user's visible sets: another team's id is unknown
                links = selectors.visible_set_links(self.request.user).filter(
                    evaluation_id=OuterRef("pk"), **{lookup: value}
                )
                queryset = queryset.filter(Exists(links))
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
                # what the reference reading left out of the split and of this file
                "left_out": left_out.of_split(evaluation.split) + left_out.of_result(card.result),
                "result": card.result,
            }
        )


# Outcomes and flags ------------------------------------------------------------------


@extend_schema(
    parameters=[
        DETECTOR,
        VERSION,
        SPLIT,
        _param("judgement", int, "This judgement's outcomes (default: each version's newest)"),
        _param("status", str, "pass, fail, missing, not significant or no data"),
        SINCE,
        UNTIL,
    ]
)
class OutcomeList(Endpoint, generics.ListAPIView):
    """Judged rules of each version's current judgement (the one its verdict reads,
    ``verdicts.verdicts_of``: none while a version is judging, so a judgement made
    before the criteria, suite or baseline changed is not listed as current), or of
    ``judgement``. ``/flags/`` lists only the failing ones: the regressions."""

    serializer_class = s.OutcomeSerializer
    only_status = None

    def get_queryset(self):
        queryset = Outcome.objects.filter(
            version__detector__in=selectors.visible_detectors(self.request.user)
        ).select_related("split", "criteria")
        judgement = _int(self.request, "judgement")
        if judgement is not None:
            queryset = queryset.filter(judgement_id=judgement)
        else:
            queryset = queryset.filter(judgement_id__in=self._current_judgements())
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

    def _current_judgements(self):
        from ... import verdicts
        from ...models import ModelVersion

        versions = ModelVersion.objects.filter(
            detector__in=selectors.visible_detectors(self.request.user)
        )
        if (detector := _int(self.request, "detector")) is not None:
            versions = versions.filter(detector_id=detector)
        if (version := _int(self.request, "version")) is not None:
            versions = versions.filter(pk=version)
        found = verdicts.verdicts_of(versions).values()
        return [v.judgement.pk for v in found if v.judgement is not None]


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
        from ...models import AuditEvent

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
