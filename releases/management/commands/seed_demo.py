"""Seed the invented Kestrel Bay scenario by replaying about three months of its history."""

import datetime
import json
import secrets
from contextlib import contextmanager
from unittest import mock

from django.contrib.auth import get_user_model
from django.core.files.base import ContentFile
from django.core.management.base import BaseCommand, CommandError
from django.test.utils import override_settings
from django.utils import timezone

from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit
from releases import criteria, demo, services, suites
from releases.models import Membership, Team

TEAM = "Shuttle Perception"
PROTOCOLS = ("coco", "recall40")
REQUIRED = ["bay-day", "bay-night", "ring-road"]  # bay-night follows its newest revision


class SimulatedClock:
    """``timezone.now`` for a replayed history: moved to a past moment, it runs on from
    there with the real clock, and never goes backwards (so every ordering the code
    relies on, e.g. judged after the last evaluation, holds as it would have)."""

    def __init__(self):
        self.offset = None
        self.real_now = timezone.now

    def at(self, moment):
        offset = moment - self.real_now()
        if self.offset is None or offset > self.offset:
            self.offset = offset

    def now(self):
        return self.real_now() + (self.offset or datetime.timedelta(0))


@contextmanager
def replayed(clock):
    """Every ``timezone.now()`` reads the simulated clock and every task runs here, at
    once (Celery's eager mode), so each step happens at its moment in the story."""
    from benchbook.celery import app

    eager = app.conf.task_always_eager
    app.conf.task_always_eager = True
    try:
        with mock.patch.object(timezone, "now", clock.now):
            yield
    finally:
        app.conf.task_always_eager = eager


class Command(BaseCommand):
    help = (
        "Seed the invented Kestrel Bay scenario: a team, two detectors, frozen splits, "
        "release criteria and about three months of versions, scored, judged and signed "
        "off at their dates (replayed on a simulated clock, tasks run in this process)."
    )

    def add_arguments(self, parser):
        parser.add_argument("--password", help="password for the demo users (default: random)")

    def handle(self, *args, password, **options):
        if Team.objects.filter(name=TEAM).exists():
            self.stdout.write(
                "demo already seeded; the users keep the password printed then "
                "(`manage.py changepassword lead` sets a new one)"
            )
            return
        password = password or secrets.token_urlsafe(9)
        clock = SimulatedClock()
        story = demo.story(timezone.now())
        with replayed(clock):
            self._replay(story, clock, password)
        from releases import tokens

        engineer = get_user_model().objects.get(username="engineer")
        _, token = tokens.create_token(engineer, "demo pipeline")
        self.stdout.write(
            f"demo users lead, engineer, reviewer — password: {password}\n"
            f"API token of engineer (for python -m releases.client): {token}"
        )

    def _replay(self, story, clock, password):
        clock.at(story["start"])
        users = self._users(password)
        team = services.create_team(TEAM, [(users[r], r) for r in Membership.Role.values])
        splits = self._splits()
        detectors = {}
        for key, name, description in demo.DETECTORS:
            protocols = [*PROTOCOLS, *demo.LEVEL_PROTOCOLS.get(key, ())]
            detector = services.create_detector(
                team, name, demo.CLASSES, protocols=protocols, description=description
            )
            suites.set_suite(
                detector,
                users["lead"],
                {
                    "splits": [{"name": n, "revision": None} for n in REQUIRED],
                    "protocols": protocols,
                    "box_policy": "keep",
                    "score_threshold": 0.5,
                    "class_thresholds": {"traffic_light": 0.4},
                },
            )
            detectors[key] = detector
        versions = {}
        for moment, action, key, label, detail in story["events"]:
            clock.at(moment)
            detector = detectors[key] if key else None
            if action == "criteria":
                for k, d in detectors.items():
                    rules = [*demo.RULES, *demo.LEVEL_RULES.get(k, [])]
                    criteria.set_criteria(d, users["lead"], rules)
                self.stdout.write(f"  {moment:%Y-%m-%d} release criteria set")
            elif action == "register":
                versions[(key, label)] = self._register(detector, key, label, splits, users, detail)
            elif action == "decide":
                decision, comment = detail
                version = versions[(key, label)]
                services.sign_off(version, users["lead"], decision, comment)
                self.stdout.write(f"  {moment:%Y-%m-%d} {version}: {decision}")
            elif action == "replace":
                self._upload(versions[(key, label)], key, label, splits, users, detail, good=True)
                self.stdout.write(f"  {moment:%Y-%m-%d} {detector.name} {label}: upload replaced")

    def _users(self, password):
        users = {}
        for username, first, last in (
            ("lead", "Maren", "Quist"),
            ("engineer", "Tobi", "Achterberg"),
            ("reviewer", "Idun", "Solberg"),
        ):
            users[username] = get_user_model().objects.create_user(
                username, f"{username}@larkspur.invalid", password, first_name=first, last_name=last
            )
        return users

    def _register(self, detector, key, label, splits, users, detail):
        version = services.create_version(
            detector,
            label,
            users["engineer"],
            source_commit=secrets.token_hex(20)[:12],
            training_ref=f"runs/{key}/{label}",
            notes=f"{detector.name} {label}, trained on the Kestrel Bay fleet logs.",
        )
        only, broken = detail.get("only"), detail.get("broken")
        for split, truth in splits:
            if only and f"{split.name}:{split.revision}" != only:
                continue
            self._upload(version, key, label, [(split, truth)], users, broken, good=False)
        shown = f"on {only} only" if only else f"on {len(splits)} splits"
        self.stdout.write(f"  {version.created_at:%Y-%m-%d} {version}: predictions {shown}")
        return version

    def _upload(self, version, key, label, splits, users, broken, *, good):
        """Upload (and so score and judge) predictions; ``broken`` names the split whose
        first file is bad in a way only the worker sees: checked by the worker, as a file
        over the inline-check limit would be, it fails and is replaced later."""
        index = demo.index_of(key, label)
        day, night, jitter = demo.version_quality(key, index, label)
        for split, truth in splits:
            name = f"{split.name}:{split.revision}"
            if good and name != broken:
                continue
            # The split's place in the story, not its primary key: a database that held
            # rows before (its sequences run on) must replay the same story.
            place = self.split_places[name]
            seed = (index + 1) * 1000 + place * 17 + (0 if key == "forward" else 7)
            detections = demo.predictions(truth, day, night, jitter, seed)
            bad = not good and name == broken
            if bad:
                detections = demo.spoiled(detections)
            upload = ContentFile(
                json.dumps(detections).encode(),
                name=f"{key}-{label}-{split.name}-r{split.revision}.json",
            )
            limit = {"BENCHBOOK_INLINE_VALIDATION_BYTES": 0} if bad else {}
            with override_settings(**limit):
                services.submit_predictions(version, split, upload, users["engineer"])

    def _splits(self):
        out = []
        for name, revision, seed, n, frame, night, tags in demo.SPLITS:
            truth = demo.split_truth(name, revision, seed, n, frame, night, tags)
            out.append((self._load(name, revision, truth), truth))
            if name == demo.RELABELLED[0]:
                fixed = demo.relabelled(truth, demo.RELABELLED[2])
                out.append((self._load(name, demo.RELABELLED[1], fixed), fixed))
        self.split_places = {
            f"{split.name}:{split.revision}": place for place, (split, _) in enumerate(out, 1)
        }
        return out

    def _load(self, name, revision, truth):
        if BenchmarkSplit.objects.filter(name=name, revision=revision).exists():
            raise CommandError(f"{name} rev {revision} exists already; use a fresh database")
        split = evaluation_services.load_split(
            name=name,
            revision=revision,
            truth=ContentFile(json.dumps(truth).encode(), name=f"{name}-rev{revision}.json"),
            description=truth["info"]["description"],
            created_by="seed_demo",
        )
        self.stdout.write(f"  frozen {split} ({split.image_count} images, {split.box_count} boxes)")
        return split
