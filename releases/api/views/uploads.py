"""Benchmark splits and prediction sets (uploads)."""

from drf_spectacular.utils import extend_schema, extend_schema_view
from rest_framework import exceptions, generics
from rest_framework.response import Response

from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit

from ... import selectors, services
from ...models import PredictionSet
from .. import serializers as s
from ..errors import error_response
from .base import (
    DETECTOR,
    SINCE,
    SPLIT,
    UNTIL,
    VERSION,
    Endpoint,
    _detector,
    _filter,
    _param,
    _refuse_oversized,
    _text,
    _valid,
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
            annotations=data.get("annotations"),
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
        ).select_related("version", "split", "predictions", "uploaded_by", "rescored_by")


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
