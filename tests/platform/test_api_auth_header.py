"""The API's token goes in ``Authorization: Bearer <token>`` (RFC 6750, section 2.1; the
scheme name is case-insensitive, RFC 7235, section 2.1); ``Token <token>`` is answered
with a 401 that says which one works."""

import pytest
from django.core.cache import cache
from rest_framework.test import APIClient

from releases import tokens

pytestmark = pytest.mark.django_db


@pytest.mark.parametrize("scheme", ["Token", "token"])
def test_another_scheme_is_401_naming_bearer(users, scheme):
    cache.clear()
    _, token = tokens.create_token(users["engineer"], "ci")
    client = APIClient()
    client.credentials(HTTP_AUTHORIZATION=f"{scheme} {token}")
    response = client.get("/api/v1/me/")
    assert response.status_code == 401
    assert response["WWW-Authenticate"] == "Bearer"
    assert response.json()["message"] == (
        f"Authorization header: write 'Bearer <token>', not '{scheme} <token>'"
    )
    client.credentials(HTTP_AUTHORIZATION=f"Bearer {token}")
    assert client.get("/api/v1/me/").json()["username"] == "engineer"


@pytest.mark.parametrize("scheme", ["Bearer", "bearer", "BEARER"])
def test_bearer_in_any_case_is_accepted(users, scheme):
    cache.clear()
    _, token = tokens.create_token(users["engineer"], "ci")
    client = APIClient()
    client.credentials(HTTP_AUTHORIZATION=f"{scheme} {token}")
    assert client.get("/api/v1/me/").json()["username"] == "engineer"
