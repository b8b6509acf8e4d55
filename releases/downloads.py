"""The stored predictions file of an evaluation, for the people who may see it.

``predictions_response(user, evaluation_id)`` is the one way out, for the page and the
API alike: visibility is the records downloads' (``selectors.evaluation_for``: a set of
one of the user's teams asked for the evaluation, else ``Evaluation.DoesNotExist``),
the bytes are hashed against the recorded SHA-256 before anything is sent (a changed
file is refused and audited, never served), and the response carries that hash.
Stored files are never reachable under a public media URL.
"""

import base64
import hashlib
import os

from django.http import FileResponse

from evaluation.storage import check_sha256

from . import selectors


def predictions_response(user, evaluation_id):
    evaluation = selectors.evaluation_for(user, evaluation_id)
    stored = evaluation.predictions
    handle = stored.file.storage.open(stored.file.name, "rb")  # hashed, then sent: one handle
    try:
        digest = hashlib.sha256()
        while block := handle.read(1 << 20):
            digest.update(block)
        check_sha256(
            f"predictions:{stored.pk}",
            "predictions file",
            evaluation.name,
            stored.sha256,
            digest.hexdigest(),
        )
        handle.seek(0)
    except BaseException:
        handle.close()
        raise
    name = os.path.basename(evaluation.name).replace('"', "") or f"predictions-{stored.pk}"
    response = FileResponse(
        handle,
        as_attachment=True,
        filename=name,
        content_type="application/octet-stream",
    )
    response["X-Content-SHA256"] = stored.sha256
    digest = base64.b64encode(bytes.fromhex(stored.sha256)).decode()
    response["Repr-Digest"] = f"sha-256=:{digest}:"  # RFC 9530
    response["X-Content-Type-Options"] = "nosniff"
    return response
