"""Re-scoring a detector's stored predictions on a new split revision, and downloading
the stored predictions file of an evaluation. The same service and download helper as
the pages (``releases.rescore``, ``releases.downloads``)."""

from drf_spectacular.types import OpenApiTypes
from drf_spectacular.utils import OpenApiResponse, extend_schema
from rest_framework import exceptions
from rest_framework.response import Response
from rest_framework.views import APIView

from evaluation.models import BenchmarkSplit, Evaluation

from ... import downloads, rescore, selectors
from .. import serializers as s
from ..errors import error_response
from .base import Endpoint, _detector, _valid


class DetectorRescore(Endpoint, APIView):
    @extend_schema(
        responses=OpenApiTypes.OBJECT,
        summary="Re-score choices and the detector's re-scored prediction sets",
        description="``choices``: per split name its newest revision and the versions "
        "with predictions only on earlier ones; ``rescored``: each re-scored set with the "
        "original upload (who, when), who re-scored it and when, and per evaluation the "
        "detections dropped because the revision no longer holds their images.",
    )
    def get(self, request, pk):
        found = _detector(request, pk)
        choices = [
            {
                "split": {
                    "id": c["split"].pk,
                    "name": c["split"].name,
                    "revision": c["split"].revision,
                },
                "behind": c["behind"],
            }
            for c in selectors.rescore_choices(found)
        ]
        return Response({"choices": choices, "rescored": selectors.rescored_sets(found)})

    @extend_schema(
        request=s.RescoreInput,
        responses={200: OpenApiTypes.OBJECT, 404: error_response(404)},
        summary="Re-score stored predictions on a split revision (leads of the team)",
        description="Each chosen version's current predictions on the newest earlier "
        "revision of the split's name are scored on this revision; detections of images "
        "it no longer holds are dropped and counted. Idempotent: a version that already "
        "has predictions on the revision is skipped, with the reason.",
    )
    def post(self, request, pk):
        found = _detector(request, pk)
        data = _valid(s.RescoreInput, request)
        split = BenchmarkSplit.objects.filter(pk=data["split"]).first()
        if split is None:
            raise exceptions.NotFound(f"split: no split {data['split']}")
        result = rescore.rescore(found, request.user, split, data.get("versions"))
        return Response(rescore.as_dict(result))


class EvaluationPredictions(Endpoint, APIView):
    @extend_schema(
        summary="The stored predictions file of an evaluation (its exact bytes)",
        description="Sent after its bytes were checked against the recorded SHA-256, "
        "which ``X-Content-SHA256`` and ``Repr-Digest`` (RFC 9530) carry; a file that no "
        "longer matches is refused (409) and recorded in the audit trail.",
        responses={
            (200, "application/octet-stream"): OpenApiResponse(OpenApiTypes.BINARY),
            409: error_response(409),
        },
    )
    def get(self, request, pk):
        from evaluation.storage import ContentMismatch

        try:
            return downloads.predictions_response(request.user, pk)
        except Evaluation.DoesNotExist:
            raise exceptions.NotFound("no such evaluation") from None
        except ContentMismatch as e:
            raise Mismatch(str(e)) from None


class Mismatch(exceptions.APIException):
    status_code = 409
    default_code = "content_mismatch"
