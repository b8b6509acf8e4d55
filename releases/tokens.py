"""Personal API tokens: created once (shown once), stored hashed, revoked by their owner."""

import hashlib
import secrets

from django.core.exceptions import PermissionDenied
from django.utils import timezone

from evaluation.services import UploadError

from .models import ApiToken

TOKEN_PREFIX = "bbk_"


def digest(token):
    return hashlib.sha256(token.encode()).hexdigest()


def create_token(user, name):
    """A new token for ``user``: returns (row, the token itself, which is not stored)."""
    name = name.strip()
    if not name:
        raise UploadError("name: a token needs a name saying what it is for")
    token = TOKEN_PREFIX + secrets.token_urlsafe(32)
    row = ApiToken.objects.create(
        user=user, name=name[:100], prefix=token[: len(TOKEN_PREFIX) + 6], digest=digest(token)
    )
    return row, token


def revoke_token(user, token_id):
    """Revoke one of the user's own tokens (a superuser may revoke anyone's)."""
    row = ApiToken.objects.filter(pk=token_id).first()
    if row is None or (row.user_id != user.pk and not user.is_superuser):
        raise PermissionDenied(f"no token {token_id} of {user}")
    if row.revoked_at is None:
        row.revoked_at = timezone.now()
        row.save(update_fields=["revoked_at"])
    return row


def user_for(token):
    """The active token row matching ``token``, with its user, or None."""
    if not token.startswith(TOKEN_PREFIX):
        return None
    row = (
        ApiToken.objects.select_related("user")
        .filter(digest=digest(token), revoked_at__isnull=True)
        .first()
    )
    if row is None or not row.user.is_active:
        return None
    now = timezone.now()
    if row.last_used_at is None or (now - row.last_used_at).total_seconds() > 60:
        # At most one write a minute per token: the pipeline polls often.
        ApiToken.objects.filter(pk=row.pk).update(last_used_at=now)
    return row
