"""Token authentication (``Authorization: Bearer bbk_…``) and its rate limit."""

from django.conf import settings
from drf_spectacular.extensions import OpenApiAuthenticationExtension
from rest_framework import authentication, exceptions, throttling

from .. import tokens
from ..models import ApiToken


class TokenAuthentication(authentication.BaseAuthentication):
    keyword = "Bearer"

    def authenticate(self, request):
        header = authentication.get_authorization_header(request).decode("latin-1").split()
        if header and header[0].lower() == "token":
            # A usual spelling in other token schemes: say which one works.
            raise exceptions.AuthenticationFailed(
                f"Authorization header: write 'Bearer <token>', not '{header[0]} <token>'"
            )
        # The scheme name is case-insensitive (RFC 7235, section 2.1).
        if not header or header[0].lower() != self.keyword.lower():
            return None
        if len(header) != 2:
            raise exceptions.AuthenticationFailed("Authorization header: expected 'Bearer <token>'")
        row = tokens.user_for(header[1])
        if row is None:
            raise exceptions.AuthenticationFailed("Authorization header: unknown or revoked token")
        return row.user, row

    def authenticate_header(self, request):
        return self.keyword


class TokenScheme(OpenApiAuthenticationExtension):
    target_class = TokenAuthentication
    name = "apiToken"

    def get_security_definition(self, auto_schema):
        return {"type": "http", "scheme": "bearer", "description": "A personal API token."}


class TokenRateThrottle(throttling.SimpleRateThrottle):
    """Requests made with a token are limited per token; the browser session is not."""

    scope = "token"

    def get_rate(self):
        return settings.BENCHBOOK_TOKEN_RATE  # read per request, so tests can change it

    def get_cache_key(self, request, view):
        if not isinstance(request.auth, ApiToken):
            return None
        return self.cache_format % {"scope": self.scope, "ident": request.auth.pk}
