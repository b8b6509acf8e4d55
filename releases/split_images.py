"""Giving a benchmark split its image files: the one entry point for the page, the API
and the command, with the role check (``evaluation.images`` checks the files)."""

from django.core.exceptions import PermissionDenied

from evaluation import images

from . import audit, selectors
from .models import AuditEvent


def attach_split_images(user, split, *, archive=None, files=(), url_template=""):
    """Attach images to ``split``: a zip ``archive``, uploaded ``files`` or a
    ``url_template``. Leads of any team may (``selectors.can_attach_split_images``: a
    split's one image source is shared evidence, fixed for good). Bad files raise
    ``UploadError`` naming the file;
    nothing is half-stored. The "split images attached" audit event is written in the
    row's transaction."""
    if not selectors.can_attach_split_images(user):
        raise PermissionDenied("only leads give splits their images")
    given = sum(bool(x) for x in (archive, list(files), url_template))
    if given != 1:
        from evaluation.services import UploadError

        raise UploadError(
            "give one of: a zip archive, image files, or a URL template", path="images"
        )

    def recorded(row):
        audit.record_event(
            AuditEvent.Kind.IMAGES_ATTACHED,
            user,
            f"split:{split.pk}",
            {
                "split": str(split),
                "source": row.source,
                "file_count": row.file_count,
                "url_template": row.url_template,
            },
        )

    return images.attach_images(
        split,
        archive=archive,
        files=files,
        url_template=url_template,
        created_by=user.get_username(),
        on_attached=recorded,
    )
