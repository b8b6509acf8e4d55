import pytest


@pytest.fixture(autouse=True)
def _media_in_tmp(settings, tmp_path_factory):
    """Stored files of every test go to a temporary MEDIA_ROOT, not var/media."""
    root = tmp_path_factory.mktemp("media")
    settings.MEDIA_ROOT = str(root)
    settings.BENCHBOOK_ENGINE_CACHE = str(root / "engine-cache")


@pytest.fixture(autouse=True)
def _fast_passwords(settings):
    """Test users need no slow key stretching (Django's testing docs recommend this)."""
    settings.PASSWORD_HASHERS = ["django.contrib.auth.hashers.MD5PasswordHasher"]
