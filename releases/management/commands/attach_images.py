"""``manage.py attach_images --split NAME:REV --user NAME (--zip FILE | --files FILE… |
--url-template URL)``: give a split its images through the same service as the split
page and the API (role check, file checks, audit event)."""

from django.contrib.auth import get_user_model
from django.core.exceptions import PermissionDenied
from django.core.files import File
from django.core.management.base import BaseCommand, CommandError

from evaluation.models import BenchmarkSplit
from evaluation.services import UploadError
from releases.split_images import attach_split_images


class Command(BaseCommand):
    help = "Attach image files (a zip or files) or a URL template to a benchmark split."

    def add_arguments(self, parser):
        parser.add_argument("--split", required=True, help="NAME:REVISION, e.g. bay-night:2")
        parser.add_argument("--user", required=True, help="username (a lead of any team)")
        given = parser.add_mutually_exclusive_group(required=True)
        given.add_argument("--zip", help="a zip archive of images named by COCO file_name")
        given.add_argument("--files", nargs="+", help="image files named by COCO file_name")
        given.add_argument("--url-template", help="e.g. https://images.example/{file_name}")

    def handle(self, *args, split, user, zip=None, files=None, url_template=None, **options):
        try:
            actor = get_user_model().objects.get(username=user)
            name, _, revision = split.partition(":")
            benchmark = BenchmarkSplit.objects.get(name=name, revision=int(revision or 0))
        except (get_user_model().DoesNotExist, BenchmarkSplit.DoesNotExist, ValueError) as e:
            raise CommandError(f"not found: {e}") from None
        opened = []
        try:
            if zip:
                opened.append(open(zip, "rb"))
            for path in files or ():
                opened.append(open(path, "rb"))
            handles = [File(f, name=f.name) for f in opened]
            row = attach_split_images(
                actor,
                benchmark,
                archive=handles[0] if zip else None,
                files=handles if files else (),
                url_template=url_template or "",
            )
        except OSError as e:
            raise CommandError(f"{e.filename}: {e.strerror}") from None
        except (UploadError, PermissionDenied) as e:
            raise CommandError(str(e)) from None
        finally:
            for f in opened:
                f.close()
        what = row.url_template if row.source == "url" else f"{row.file_count} image files"
        self.stdout.write(f"{benchmark}: {what} attached")
