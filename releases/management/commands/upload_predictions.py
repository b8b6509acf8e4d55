from django.contrib.auth import get_user_model
from django.core.exceptions import PermissionDenied
from django.core.files import File
from django.core.management.base import BaseCommand, CommandError

from evaluation.engine import InputError
from evaluation.models import BenchmarkSplit
from evaluation.services import UploadError
from releases import services
from releases.models import Detector, ModelVersion


class Command(BaseCommand):
    help = "Upload a version's predictions on a split; scoring is queued for the worker."

    def add_arguments(self, parser):
        parser.add_argument(
            "predictions",
            help="COCO-style results JSON, CSV, or a zip of KITTI, YOLO or VOC result files",
        )
        parser.add_argument("--detector", required=True, help="detector slug")
        parser.add_argument("--label", required=True, help="version label, e.g. 1.4.0")
        parser.add_argument("--split", required=True, help="NAME:REVISION, e.g. bay-night:2")
        parser.add_argument("--user", required=True, help="username of the uploader")
        parser.add_argument("--create-version", action="store_true")

    def handle(self, *args, predictions, detector, label, split, user, create_version, **options):
        try:
            uploader = get_user_model().objects.get(username=user)
            found = Detector.objects.get(slug=detector)
            name, _, revision = split.partition(":")
            benchmark = BenchmarkSplit.objects.get(name=name, revision=int(revision or 0))
        except (
            get_user_model().DoesNotExist,
            Detector.DoesNotExist,
            BenchmarkSplit.DoesNotExist,
            ValueError,
        ) as e:
            raise CommandError(f"not found: {e}") from None
        known = ModelVersion.objects.filter(detector=found, label=label).exists()
        if not known and not create_version:
            raise CommandError(f"{found} has no version {label!r} (use --create-version)")
        try:
            with open(predictions, "rb") as f:
                prediction_set = services.submit_for_label(
                    found, label, benchmark, File(f, name=predictions), uploader
                )
        except OSError as e:
            raise CommandError(f"{e.filename}: {e.strerror}") from None
        except (InputError, UploadError, PermissionDenied) as e:
            raise CommandError(str(e)) from None
        self.stdout.write(f"stored {prediction_set}; evaluations queued")
