"""Downloads of an evaluation's outcome records (CSV, JSON Lines), streamed."""

from django.contrib.auth.decorators import login_required
from django.http import Http404, HttpResponse, StreamingHttpResponse

from evaluation import outcomes
from evaluation.engine.export import CONTENT_TYPES
from evaluation.models import Evaluation
from releases import selectors


@login_required
def records_download(request, evaluation_id, fmt):
    """An evaluation's outcome records (every detection and box with its reason),
    streamed as CSV or JSON Lines: written a block at a time, never held whole."""
    if fmt not in CONTENT_TYPES:
        raise Http404("downloads are .csv or .jsonl")
    try:
        evaluation = selectors.evaluation_for(request.user, evaluation_id)
    except Evaluation.DoesNotExist:
        raise Http404("no such evaluation") from None
    try:
        chunks = outcomes.export_chunks(evaluation, fmt)
    except outcomes.PositionsUnknown as e:
        return HttpResponse(str(e), status=409, content_type="text/plain; charset=utf-8")
    if chunks is None:
        raise Http404("this evaluation has no stored records")
    response = StreamingHttpResponse(chunks, content_type=CONTENT_TYPES[fmt])
    response["Content-Disposition"] = (
        f'attachment; filename="evaluation-{evaluation.pk}-records.{fmt}"'
    )
    response["X-Content-Type-Options"] = "nosniff"
    return response
