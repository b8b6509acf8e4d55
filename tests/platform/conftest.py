"""Shared fixtures of the platform tests: users by role, a team, a detector, a split."""

import contextlib
import json
import os
import uuid

import numpy as np
import pytest
from django.contrib.auth import get_user_model
from django.core.cache import cache
from django.core.files.base import ContentFile
from django.core.management import call_command
from django.db import connection
from django.test import override_settings

from evaluation import services as evaluation_services
from evaluation import tasks, triggers
from releases import services
from releases import tasks as release_tasks
from releases import triggers as audit_triggers

from ..conftest import forget_process_caches
from ..engine.synthetic import make_detections, make_split

CLASSES = ["car", "pedestrian", "cyclist"]


def upload(name, content):
    if not isinstance(content, (bytes, str)):
        content = json.dumps(content)
    return ContentFile(content.encode() if isinstance(content, str) else content, name=name)


def split_dict(seed=5, n_images=12):
    rng = np.random.default_rng(seed)
    split = make_split(rng, n_images=n_images, n_classes=3, boxes_per_image=4, crowd_rate=0.05)
    for category, name in zip(split["categories"], CLASSES):
        category["name"] = name
    return split


def detections_for(split, seed=6):
    return make_detections(np.random.default_rng(seed), split)


@pytest.fixture
def users(db):
    User = get_user_model()
    return {
        name: User.objects.create_user(name, password="pw-" + name)
        for name in ("lead", "engineer", "reviewer", "outsider", "rival")
    }


@pytest.fixture
def team(users):
    return services.create_team(
        "Shuttle Perception",
        [
            (users["lead"], "lead"),
            (users["engineer"], "engineer"),
            (users["reviewer"], "reviewer"),
        ],
    )


@pytest.fixture
def rival_detector(users, django_capture_on_commit_callbacks):
    rival = services.create_team("Tram Vision", [(users["rival"], "lead")])
    with django_capture_on_commit_callbacks(execute=True):  # as committed (audit head)
        return services.create_detector(rival, "Tram front", CLASSES)


@pytest.fixture
def detector(team, django_capture_on_commit_callbacks):
    with django_capture_on_commit_callbacks(execute=True):  # as committed (audit head)
        return services.create_detector(team, "Forward camera", CLASSES, protocols=("coco", "voc"))


@pytest.fixture
def split_truth():
    return split_dict()


@pytest.fixture
def split(split_truth):
    triggers.install(connection)  # idempotent; a transactional test's flush drops them on SQLite
    audit_triggers.install(connection)
    return evaluation_services.load_split(
        name="bay-night", revision=1, truth=upload("bay-night.json", split_truth)
    )


def set_suite_policy(detector, lead, **changes):
    """A new suite version of ``detector`` (set by ``lead``) with ``changes``, e.g.
    ``unknown_classes="reject"``: the strict option, as a lead picks it. A suite without
    splits gets every split's name (a suite needs at least one)."""
    from evaluation.models import BenchmarkSplit
    from releases import suites

    spec = suites.as_dict(suites.current_suite(detector))
    if not spec["splits"]:
        names = sorted({s.name for s in BenchmarkSplit.objects.all()})
        spec["splits"] = [{"name": n, "revision": None} for n in names]
    return suites.set_suite(detector, lead, {**spec, **changes})


@pytest.fixture
def version(detector, users):
    return services.create_version(detector, "1.4.0", users["engineer"])


@pytest.fixture
def run_tasks(monkeypatch, django_capture_on_commit_callbacks):
    """Run dispatched tasks in this process, their arguments through JSON (as a
    broker would carry them), when the surrounding transaction commits."""

    def delay(*args):
        args = json.loads(json.dumps(args))
        tasks.score.apply(args=args, task_id=str(uuid.uuid4()), throw=True)

    def judge(*args):
        args = json.loads(json.dumps(args))
        release_tasks.judge.apply(args=args, task_id=str(uuid.uuid4()), throw=True)

    def rejudge(*args):
        args = json.loads(json.dumps(args))
        release_tasks.rejudge.apply(args=args, task_id=str(uuid.uuid4()), throw=True)

    monkeypatch.setattr(tasks.score, "delay", delay)
    monkeypatch.setattr(release_tasks.judge, "delay", judge)
    monkeypatch.setattr(release_tasks.rejudge, "delay", rejudge)
    monkeypatch.setattr(release_tasks.notify, "apply_async", in_process_async(release_tasks.notify))

    class Runner:
        def __call__(self, fn, *args, **kwargs):
            with django_capture_on_commit_callbacks(execute=True):
                return fn(*args, **kwargs)

    return Runner()


@pytest.fixture
def flushable(transactional_db):
    """For tests that commit. Django empties the tables after them; the session fixture
    ``_flush_past_triggers`` (tests/conftest.py) lets that flush past the triggers."""
    yield


@contextlib.contextmanager
def triggers_off():
    """The owner of the tables (the test run) switches the append-only triggers off, to
    plant rows no service would write, then switches them on again."""
    audit_triggers.remove(connection)
    triggers.remove(connection)
    try:
        yield
    finally:
        triggers.install(connection)
        audit_triggers.install(connection)


def in_process(task):
    """A ``delay`` that runs the task here, its arguments through JSON (as run_tasks)."""

    def delay(*args):
        task.apply(args=json.loads(json.dumps(args)), task_id=str(uuid.uuid4()), throw=True)

    return delay


def in_process_async(task):
    """An ``apply_async`` that runs the task here at once (the countdown is not waited)."""

    def apply_async(args=(), kwargs=None, countdown=None, **options):
        args = json.loads(json.dumps(list(args)))
        task.apply(args=args, kwargs=kwargs, task_id=str(uuid.uuid4()), throw=True)

    return apply_async


def committed_for_module(django_db_blocker, tmp_path_factory, build):
    """For a module-scoped fixture: ``build()``'s rows committed once for the module
    (set up per test they would cost more than the tests), tasks run in-process, then
    emptied as a transactional test's database is. Yields (built, media root)."""
    name = os.path.basename(str(connection.settings_dict["NAME"]))
    assert name.startswith("test"), f"not a test database: {name}"  # it is flushed below
    media = tmp_path_factory.mktemp("module-media")
    with (
        django_db_blocker.unblock(),
        override_settings(
            BENCHBOOK_TOKEN_RATE="100000/minute",
            MEDIA_ROOT=str(media),
            BENCHBOOK_ENGINE_CACHE=str(media / "engine-cache"),
        ),
        pytest.MonkeyPatch.context() as patch,
    ):
        patch.setattr(tasks.score, "delay", in_process(tasks.score))
        patch.setattr(release_tasks.judge, "delay", in_process(release_tasks.judge))
        patch.setattr(release_tasks.notify, "apply_async", in_process_async(release_tasks.notify))
        cache.clear()  # throttle counters
        forget_process_caches()  # ids a previous test cached by may be reused here
        triggers.install(connection)
        audit_triggers.install(connection)
        try:
            yield build(), str(media)
        finally:
            call_command("flush", interactive=False, verbosity=0)  # past the triggers
            cache.clear()  # throttle counters of tokens whose ids later tests reuse
