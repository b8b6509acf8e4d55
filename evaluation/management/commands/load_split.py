from django.core.files import File
from django.core.management.base import BaseCommand, CommandError

from evaluation import engine, left_out, services


class Command(BaseCommand):
    help = "Validate, hash and freeze a benchmark split (COCO-style JSON, or CSV + images table)."

    def add_arguments(self, parser):
        parser.add_argument("name")
        parser.add_argument("revision", type=int)
        parser.add_argument("truth", help="COCO-style JSON or boxes CSV")
        parser.add_argument(
            "--images", help="images table CSV (image_id; width,height,tags optional)"
        )
        parser.add_argument("--description", default="")
        parser.add_argument(
            "--annotations",
            choices=["reference", "strict"],
            default=None,
            help="reference (default): read a COCO-style file as pycocotools does "
            "(annotations of unlisted images/categories left out, a repeated id resolved to "
            "its last annotation; counted and shown); strict: refuse such files",
        )

    def handle(
        self, *args, name, revision, truth, images, description, annotations=None, **options
    ):
        try:
            with open(truth, "rb") as t:
                images_file = open(images, "rb") if images else None
                try:
                    split = services.load_split(
                        name=name,
                        revision=revision,
                        truth=File(t, name=truth),
                        images=File(images_file, name=images) if images_file else None,
                        description=description,
                        created_by="manage.py",
                        annotations=annotations,
                    )
                finally:
                    if images_file:
                        images_file.close()
        except OSError as e:
            raise CommandError(f"{e.filename}: {e.strerror}") from None
        except (engine.InputError, services.UploadError) as e:
            raise CommandError(str(e)) from None
        self.stdout.write(
            f"frozen {split}: {split.image_count} images, {split.box_count} boxes, "
            f"sha256 {split.sha256}"
        )
        for line in left_out.of_split(split):
            self.stdout.write(f"  {line}")
