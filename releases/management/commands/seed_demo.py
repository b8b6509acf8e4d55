import json
import secrets
import time

from django.contrib.auth import get_user_model
from django.core.files.base import ContentFile
from django.core.management.base import BaseCommand, CommandError
from django.db import transaction

from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit, Evaluation
from releases import demo, services, verdicts
from releases.models import Detector, Membership, ModelVersion, SignOff, Team

TEAM = "Shuttle Perception"
PROTOCOLS = ("coco", "recall40")


class Command(BaseCommand):
    help = (
        "Seed the invented Kestrel Bay scenario: a team, two detectors, frozen splits and "
        "about three months of versions, all queued for the real worker to score."
    )

    def add_arguments(self, parser):
        parser.add_argument("--password", help="password for the demo users (default: random)")
        parser.add_argument(
            "--wait",
            type=float,
            default=0,
            help="wait up to this many seconds for the worker to finish",
        )

    def handle(self, *args, password, wait, **options):
        if Team.objects.filter(name=TEAM).exists():
            self.stdout.write(
                "demo already seeded; the users keep the password printed then "
                "(`manage.py changepassword lead` sets a new one)"
            )
        else:
            password = password or secrets.token_urlsafe(9)
            self._seed(password)
            from releases import tokens

            engineer = get_user_model().objects.get(username="engineer")
            _, token = tokens.create_token(engineer, "demo pipeline")
            self.stdout.write(
                f"demo users lead, engineer, reviewer — password: {password}\n"
                f"API token of engineer (for python -m releases.client): {token}\n"
                "evaluations are queued; the worker scores them"
                + ("" if wait else "; rerun with --wait once a worker runs, for the sign-offs")
            )
        if wait:
            self._wait(wait)
            self._sign_offs()
            self._criteria()

    def _seed(self, password):
        users = {}
        User = get_user_model()
        for username, first, last in (
            ("lead", "Maren", "Quist"),
            ("engineer", "Tobi", "Achterberg"),
            ("reviewer", "Idun", "Solberg"),
        ):
            user = User.objects.create_user(
                username, f"{username}@larkspur.invalid", password, first_name=first, last_name=last
            )
            users[username] = user
        team = services.create_team(TEAM, [(users[r], r) for r in Membership.Role.values])
        splits = self._splits()
        detectors = {
            "forward": (
                services.create_detector(
                    team,
                    "Forward camera",
                    demo.CLASSES,
                    protocols=PROTOCOLS,
                    description="Front-facing 1280x720 camera of the harbour shuttles.",
                ),
                demo.FORWARD_VERSIONS,
            ),
            "kerbside": (
                services.create_detector(
                    team,
                    "Kerbside camera",
                    demo.CLASSES,
                    protocols=PROTOCOLS,
                    description="Side camera watching the kerb at stops.",
                ),
                demo.KERBSIDE_VERSIONS,
            ),
        }
        for key, (detector, labels) in detectors.items():
            for index, (label, when) in enumerate(zip(labels, demo.release_dates(len(labels)))):
                with transaction.atomic():
                    version = services.create_version(
                        detector,
                        label,
                        users["engineer"],
                        created_at=when,
                        source_commit=secrets.token_hex(20)[:12],
                        training_ref=f"runs/{key}/{label}",
                        notes=f"{detector.name} {label}, trained on the Kestrel Bay fleet logs.",
                    )
                    day, night, jitter = demo.version_quality(key, index, label)
                    for split, truth in splits:
                        seed = (index + 1) * 1000 + split.pk * 17 + (0 if key == "forward" else 7)
                        dets = demo.predictions(truth, day, night, jitter, seed)
                        upload = ContentFile(
                            json.dumps(dets).encode(),
                            name=f"{key}-{label}-{split.name}-r{split.revision}.json",
                        )
                        services.submit_predictions(version, split, upload, users["engineer"])
                self.stdout.write(f"  {detector.name} {label}: predictions on {len(splits)} splits")

    def _splits(self):
        out = []
        for name, revision, seed, n, frame, night, tags in demo.SPLITS:
            truth = demo.split_truth(name, revision, seed, n, frame, night, tags)
            out.append((self._load(name, revision, truth), truth))
            if name == demo.RELABELLED[0]:
                fixed = demo.relabelled(truth, demo.RELABELLED[2])
                out.append((self._load(name, demo.RELABELLED[1], fixed), fixed))
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

    def _sign_offs(self):
        """The lead's past decisions: approvals make the baselines (forward 1.4)."""
        lead = get_user_model().objects.get(username="lead")
        decisions = [
            ("forward-camera", "1.0", "approved", "First release for the harbour loop."),
            ("forward-camera", "1.2", "approved", "Better on every split."),
            ("forward-camera", "1.3", "rejected", "No gain over 1.2; not worth a fleet update."),
            ("forward-camera", "1.4", "approved", "Clear gain, night included."),
            ("kerbside-camera", "1.1", "approved", "Kerbside stops covered."),
        ]
        for slug, label, decision, comment in decisions:
            version = ModelVersion.objects.get(detector__slug=slug, label=label)
            if SignOff.objects.filter(version=version).exists():
                continue
            # The previous approval changed the baseline: judge against it first (what
            # the worker's re-judging does), since a decision needs a final verdict.
            verdicts.judge(version.pk)
            services.sign_off(version, lead, decision, comment)
            self.stdout.write(f"  {version}: {decision}")

    def _criteria(self):
        """The example rules, then the worker judges every version newer than the baseline."""
        from releases import criteria, selectors
        from releases.services import _send
        from releases.tasks import judge

        lead = get_user_model().objects.get(username="lead")
        rules = [
            {
                "kind": "min_value",
                "metric": "AP50",
                "class": "pedestrian",
                "split": "*",
                "threshold": 0.8,
            },
            {"kind": "max_drop", "metric": "AP", "class": "mean", "split": "*", "tolerance": 0.5},
            {
                "kind": "no_significant_drop",
                "metric": "AP",
                "class": "*",
                "split": "*",
                "confidence": 0.95,
            },
        ]
        for detector in Detector.objects.all():
            if criteria.current_criteria(detector) is None:
                criteria.set_criteria(detector, lead, rules)
            baseline = selectors.baseline_of(detector)
            for version in detector.versions.filter(
                created_at__gt=baseline.created_at, sign_off=None
            ):
                _send(judge, version.pk)
                self.stdout.write(f"  {version}: queued for judging against {baseline.label}")

    def _wait(self, seconds):
        deadline = time.monotonic() + seconds
        while True:
            pending = Evaluation.objects.exclude(state__in=["done", "failed"]).count()
            if not pending:
                self.stdout.write("all evaluations finished")
                return
            if time.monotonic() > deadline:
                raise CommandError(f"{pending} evaluations still pending after {seconds:g} s")
            time.sleep(1)
