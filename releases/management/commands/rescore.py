"""Re-score a detector's stored predictions on a split revision from the shell: the same
``releases.rescore.rescore`` as the page and the API (leads only; idempotent)."""

from django.contrib.auth import get_user_model
from django.core.exceptions import PermissionDenied
from django.core.management.base import BaseCommand, CommandError

from evaluation.models import BenchmarkSplit
from evaluation.services import UploadError
from releases import rescore
from releases.models import Detector


class Command(BaseCommand):
    help = (
        "Re-score stored predictions: DETECTOR_ID --split NAME [--revision N] --user LEAD "
        "[--label LABEL ...] (default: the newest revision, every version)"
    )

    def add_arguments(self, parser):
        parser.add_argument("detector", type=int, help="the detector's id")
        parser.add_argument("--split", required=True, help="the split's name")
        parser.add_argument("--revision", type=int, help="default: the newest revision")
        parser.add_argument("--user", required=True, help="username of a lead of the team")
        parser.add_argument(
            "--label", action="append", default=None, help="a version label (repeatable)"
        )

    def handle(self, *args, **options):
        user = get_user_model().objects.filter(username=options["user"]).first()
        if user is None:
            raise CommandError(f"--user: no user {options['user']!r}")
        detector = Detector.objects.select_related("team").filter(pk=options["detector"]).first()
        if detector is None:
            raise CommandError(f"detector: no detector {options['detector']}")
        splits = BenchmarkSplit.objects.filter(name=options["split"]).order_by("-revision")
        if options["revision"] is not None:
            splits = splits.filter(revision=options["revision"])
        split = splits.first()
        if split is None:
            revision = f" rev {options['revision']}" if options["revision"] is not None else ""
            raise CommandError(f"--split: no split {options['split']}{revision}")
        versions = None
        if options["label"]:
            found = dict(
                detector.versions.filter(label__in=options["label"]).values_list("label", "pk")
            )
            unknown = [label for label in options["label"] if label not in found]
            if unknown:
                raise CommandError(f"--label: {detector} has no version {', '.join(unknown)}")
            versions = list(found.values())
        try:
            result = rescore.rescore(detector, user, split, versions)
        except (UploadError, PermissionDenied) as e:
            raise CommandError(str(e)) from None
        for o in result.outcomes:
            if o.status == "rescored":
                self.stdout.write(
                    f"{o.version.label}: re-scored on {split} from {o.source.split} "
                    f"(prediction set {o.prediction_set.pk})"
                )
            else:
                self.stdout.write(f"{o.version.label}: skipped, {o.reason}")
        self.stdout.write(f"{len(result.rescored)} re-scored, {len(result.skipped)} skipped")
