"""From a flag to its cause: outcome records as downloads, the per-image comparison of
two versions, one image's boxes. The same selectors as the pages
(``releases.selectors.cause``); another team's object is a 404."""

from django.http import StreamingHttpResponse
from drf_spectacular.types import OpenApiTypes
from drf_spectacular.utils import OpenApiResponse, extend_schema
from rest_framework import exceptions, generics
from rest_framework.response import Response

from evaluation import outcomes
from evaluation.models import BenchmarkSplit, Evaluation

from ...selectors import cause, image_list
from ...split_images import attach_split_images
from .. import serializers as s
from ..errors import error_response
from .base import Endpoint, NotScored, _int, _param, _refuse_oversized, _text, _valid
from .results import EvaluationMixin


class _Records(EvaluationMixin, generics.GenericAPIView):
    fmt = "csv"

    def get(self, request, pk):
        evaluation = self.get_object()
        if evaluation.state != Evaluation.State.DONE:
            raise NotScored(f"evaluation {pk} is {evaluation.state}")
        try:
            chunks = outcomes.export_chunks(evaluation, self.fmt)
        except outcomes.PositionsUnknown as e:
            raise NotScored(str(e)) from None
        if chunks is None:
            raise NotScored(f"evaluation {pk} has no stored records")
        from evaluation.engine.export import CONTENT_TYPES

        response = StreamingHttpResponse(chunks, content_type=CONTENT_TYPES[self.fmt])
        response["Content-Disposition"] = (
            f'attachment; filename="evaluation-{evaluation.pk}-records.{self.fmt}"'
        )
        return response


_RECORDS_DOC = (
    "Every detection (then every ground-truth box) of the evaluation with its outcome, "
    "reason, related box or detection and IoU at the primary IoU threshold, streamed. "
    "Columns: evaluation.engine.export.COLUMNS."
)


class EvaluationRecordsCsv(_Records):
    fmt = "csv"

    @extend_schema(
        summary="Outcome records as CSV (streamed)",
        description=_RECORDS_DOC,
        responses={
            (200, "text/csv"): OpenApiResponse(OpenApiTypes.STR),
            409: error_response(409),
        },
    )
    def get(self, request, pk):
        return super().get(request, pk)


class EvaluationRecordsJsonl(_Records):
    fmt = "jsonl"

    @extend_schema(
        summary="Outcome records as JSON Lines (streamed)",
        description=_RECORDS_DOC,
        responses={
            (200, "application/x-ndjson"): OpenApiResponse(OpenApiTypes.STR),
            409: error_response(409),
        },
    )
    def get(self, request, pk):
        return super().get(request, pk)


def _pair(request, pk, split_id):
    try:
        return cause.pair_for(request.user, pk, split_id, against=_int(request, "against"))
    except cause.NotScored as e:
        raise NotScored(str(e)) from None


def _listing(request):
    for name in ("class", "tag", "size"):
        _text(request, name)
    return image_list.listing_filters(request.query_params)


AGAINST = _param("against", int, "The reference version (default: the judged baseline)")


class VersionImages(Endpoint, generics.GenericAPIView):
    @extend_schema(
        operation_id="versions_images_list",
        summary="Per-image comparison of the version with a reference on one split",
        description=(
            "Every image of the split carrying ``tag``, the largest loss first: each "
            "version's TP, FP by reason and missed counts at the deployed threshold(s), "
            "and the image's contribution to the change in AP of ``class`` (the mean "
            "when absent): the change with every listed image minus the change without "
            "it. Computed from the stored match records."
        ),
        parameters=[
            _param("split", int, "The benchmark split (required)"),
            _param("class", str, "A class of the split (default: mean AP)"),
            _param("tag", str, "Only images carrying this tag"),
            _param("size", str, "A size bucket of the protocol (small, medium, large)"),
            AGAINST,
        ],
        responses={200: OpenApiTypes.OBJECT, 409: error_response(409)},
    )
    def get(self, request, pk):
        split_id = _int(request, "split")
        if split_id is None:
            raise exceptions.ValidationError({"split": ["required"]})
        pair = _pair(request, pk, split_id)
        listing = _listing(request)
        try:
            table = image_list.image_table(pair, listing, limit=None)
        except ValueError as e:
            name = str(e).split(":", 1)[0]
            raise exceptions.ValidationError({name: [str(e)]}) from None
        return Response(image_list.image_table_json(pair, listing, table))


class VersionImage(Endpoint, generics.GenericAPIView):
    @extend_schema(
        operation_id="versions_image_retrieve",
        summary="One image's ground truth and both versions' detections with outcomes",
        parameters=[AGAINST],
        responses={200: OpenApiTypes.OBJECT, 409: error_response(409)},
    )
    def get(self, request, pk, split_id, image):
        pair = _pair(request, pk, split_id)
        try:
            return Response(cause.image_drilldown(pair, image))
        except IndexError:
            raise exceptions.NotFound(f"no image {image} in {pair.split}") from None


class SplitImages(Endpoint, generics.GenericAPIView):
    queryset = BenchmarkSplit.objects.all()
    serializer_class = s.SplitImagesInput

    @extend_schema(
        request={"multipart/form-data": s.SplitImagesInput},
        responses={201: OpenApiTypes.OBJECT, 413: error_response(413)},
        summary="Give a split its images: a zip archive or a URL template",
        description="Each file of the archive must be a JPEG, PNG or WebP (by its first "
        "bytes) of at most BENCHBOOK_MAX_IMAGE_BYTES, named by a COCO file_name of the "
        "split (an extra top folder is allowed); the first bad one refuses the upload "
        "(400 naming it), nothing is stored. Leads of any team (403 otherwise).",
    )
    def post(self, request, pk):
        _refuse_oversized(request)
        split = self.get_object()
        data = _valid(s.SplitImagesInput, request)
        row = attach_split_images(
            request.user,
            split,
            archive=data.get("archive"),
            url_template=data["url_template"].strip(),
        )
        return Response(
            {
                "split": split.pk,
                "source": row.source,
                "file_count": row.file_count,
                "url_template": row.url_template or None,
            },
            status=201,
        )


__all__ = [
    "EvaluationRecordsCsv",
    "EvaluationRecordsJsonl",
    "SplitImages",
    "VersionImage",
    "VersionImages",
]
