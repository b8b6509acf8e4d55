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


@pytest.fixture(autouse=True)
def _fresh_history_cache():
    """Each test's database starts anew (ids and history stamps may repeat): entries a
    previous test cached in this process are forgotten (every per-process cache)."""
    forget_process_caches()


def forget_process_caches():
    """Forget every per-process cache keyed by database ids: before each test, and
    before a module-scoped fixture commits its rows (``committed_for_module``), which
    runs before the test's own fixtures and may reuse a previous test's ids."""
    from evaluation import image_loo, images, outcomes
    from releases import history_stamps
    from releases.selectors import errors, image_list

    history_stamps.clear()
    # Kept by content hash as well as id, so an entry of a previous test may be found
    # again: correct, but a test counting a page's queries would count fewer.
    outcomes._RECORDS.clear()
    outcomes._truth.cache_clear()
    images._file_names.cache_clear()
    image_loo._MEMBERS = None
    errors._BREAKDOWNS.clear()
    image_list._CLASS_LOO.clear()
    image_list._ROWS.clear()


@pytest.fixture(scope="session", autouse=True)
def _flush_past_triggers():
    """Django empties the tables after a transactional test (``flush``: TRUNCATE on
    PostgreSQL, DELETE on SQLite), which the append-only triggers refuse, as they should.
    The test run, owner of its database, drops them for the flush and puts them back."""
    from django.db import connection

    from evaluation import triggers
    from releases import triggers as release_triggers

    operations = type(connection.ops)
    original = operations.execute_sql_flush

    def execute_sql_flush(self, sql_list):
        release_triggers.remove(self.connection)
        triggers.remove(self.connection)
        try:
            original(self, sql_list)
        finally:
            triggers.install(self.connection)
            release_triggers.install(self.connection)

    operations.execute_sql_flush = execute_sql_flush
    yield
    operations.execute_sql_flush = original
