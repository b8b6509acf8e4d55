"""Production settings: no start without a secret key, HTTPS settings from the
environment, ``check --deploy`` clean with the README's production environment, and
persistent connections checked before reuse.

Each case starts a fresh Python, because settings are read once, at import."""

import json
import os
import pathlib
import re
import secrets
import subprocess
import sys

import pytest

ROOT = pathlib.Path(__file__).resolve().parents[2]
KEEP = ("PATH", "HOME", "LANG", "LC_ALL", "PYTHONPATH", "VIRTUAL_ENV")


def _env(tmp_path, **values):
    """A clean environment: only what the case sets (no SECRET_KEY from the test run)."""
    env = {k: v for k, v in os.environ.items() if k in KEEP}
    env.update(BENCHBOOK_VAR=str(tmp_path), DJANGO_SETTINGS_MODULE="benchbook.settings")
    env.update(values)
    return env


def _run(env, *args):
    return subprocess.run(
        [sys.executable, *args], cwd=ROOT, env=env, capture_output=True, text=True, timeout=120
    )


def _settings(env, *names):
    code = (
        "import json, django; django.setup(); from django.conf import settings; "
        f"print(json.dumps({{n: getattr(settings, n, None) for n in {names!r}}}, default=str))"
    )
    done = _run(env, "-c", code)
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout.strip().splitlines()[-1])


def readme_production_environment():
    """The ``NAME=value`` lines of the README's production block; placeholders filled."""
    readme = (ROOT / "README.md").read_text()
    section = readme.split("## Production", 1)[1].split("\n## ", 1)[0]
    block = re.search(r"```sh\n(.*?)```", section, re.S).group(1)
    env = dict(re.findall(r"^([A-Z_]+)=(.*)$", block, re.M))
    env["SECRET_KEY"] = secrets.token_urlsafe(50)
    env["DATABASE_URL"] = env["DATABASE_URL"].replace("<password>", "pw")
    assert not [k for k, v in env.items() if "<" in v], "a placeholder left unfilled"
    return env


def test_no_secret_key_and_no_debug_refuses_to_start(tmp_path):
    """Django's deployment checklist: the secret key must be kept secret; a built-in
    one is public (common practice: fail closed)."""
    done = _run(_env(tmp_path, DEBUG="false"), "manage.py", "check")
    assert done.returncode != 0
    assert "ImproperlyConfigured: SECRET_KEY is not set" in done.stderr
    assert "DEBUG=true" in done.stderr  # says how to run without one, on a development machine


def test_an_empty_secret_key_is_refused_too(tmp_path):
    done = _run(_env(tmp_path, SECRET_KEY=""), "manage.py", "check")
    assert "ImproperlyConfigured: SECRET_KEY is not set" in done.stderr


def test_debug_runs_without_a_secret_key(tmp_path):
    assert _settings(_env(tmp_path, DEBUG="true"), "DEBUG")["DEBUG"] is True


def test_the_readme_production_environment_passes_check_deploy(tmp_path):
    """``manage.py check --deploy`` (Django's deployment checks: W004 HSTS, W008 SSL
    redirect, W012/W016 secure cookies, W009 key strength, …) reports nothing."""
    env = _env(tmp_path, **readme_production_environment())
    env["DATABASE_URL"] = f"sqlite:///{tmp_path / 'db.sqlite3'}"  # the check reads no rows
    done = _run(env, "manage.py", "check", "--deploy", "--fail-level", "WARNING")
    assert done.returncode == 0, done.stdout + done.stderr
    assert "System check identified no issues" in done.stdout


def test_https_settings_come_from_the_environment(tmp_path):
    env = _env(tmp_path, **readme_production_environment())
    env["DATABASE_URL"] = f"sqlite:///{tmp_path / 'db.sqlite3'}"
    got = _settings(
        env,
        "SECURE_SSL_REDIRECT",
        "SESSION_COOKIE_SECURE",
        "CSRF_COOKIE_SECURE",
        "SECURE_HSTS_SECONDS",
        "SECURE_HSTS_INCLUDE_SUBDOMAINS",
        "SECURE_HSTS_PRELOAD",
        "SECURE_PROXY_SSL_HEADER",
        "CSRF_TRUSTED_ORIGINS",
        "DEBUG",
    )
    assert got == {
        "SECURE_SSL_REDIRECT": True,
        "SESSION_COOKIE_SECURE": True,
        "CSRF_COOKIE_SECURE": True,
        "SECURE_HSTS_SECONDS": 31536000,
        "SECURE_HSTS_INCLUDE_SUBDOMAINS": True,
        "SECURE_HSTS_PRELOAD": True,
        "SECURE_PROXY_SSL_HEADER": ["HTTP_X_FORWARDED_PROTO", "https"],
        "CSRF_TRUSTED_ORIGINS": ["https://benchbook.larkspur.example"],
        "DEBUG": False,
    }


def test_https_settings_are_off_by_default(tmp_path):
    got = _settings(
        _env(tmp_path, SECRET_KEY=secrets.token_urlsafe(50)),
        "SECURE_SSL_REDIRECT",
        "SESSION_COOKIE_SECURE",
        "SECURE_HSTS_SECONDS",
        "SECURE_PROXY_SSL_HEADER",
    )
    assert got == {
        "SECURE_SSL_REDIRECT": False,
        "SESSION_COOKIE_SECURE": False,
        "SECURE_HSTS_SECONDS": 0,
        "SECURE_PROXY_SSL_HEADER": None,
    }


def test_a_malformed_proxy_header_setting_is_refused(tmp_path):
    env = _env(tmp_path, SECRET_KEY="k" * 50, SECURE_PROXY_SSL_HEADER="X-Forwarded-Proto")
    done = _run(env, "manage.py", "check")
    assert "SECURE_PROXY_SSL_HEADER must read HEADER=value" in done.stderr


@pytest.mark.parametrize(
    "url", ["postgres://benchbook_app:pw@db/benchbook", "sqlite:///{tmp}/db.sqlite3"]
)
def test_persistent_connections_are_health_checked(tmp_path, url):
    """Django's docs ("Persistent connections"): with CONN_MAX_AGE > 0, CONN_HEALTH_CHECKS
    re-checks a kept connection before a request reuses it, so a restarted database is
    not one failed request per process."""
    env = _env(tmp_path, SECRET_KEY="k" * 50, DATABASE_URL=url.format(tmp=tmp_path))
    db = _settings(env, "DATABASES")["DATABASES"]["default"]
    if "postgresql" in db["ENGINE"]:
        assert db["CONN_MAX_AGE"] > 0 and db["CONN_HEALTH_CHECKS"] is True
    else:  # SQLite: a file opened per request; nothing to go stale
        assert db["CONN_MAX_AGE"] == 0
