"""Freezing a benchmark split: validate the uploaded files with the engine, hash the
content, store files and row together (nothing half-stored).
"""

import os
import tempfile

from django.core.files import File
from django.db import transaction
from django.utils import timezone

from .. import engine, levels, signals, split_identity
from ..models import BenchmarkSplit
from ..storage import TooLarge, spool
from .policy import (
    ENGINE_IDS,
    HASH_SCHEME,
    VIS_RATIO_READING,
    UploadError,
    _format_of,
    _limit,
    input_policy,
)
from .stored import _read_truth


def load_split(
    *, name, revision, truth, images=None, description="", created_by="", annotations=None
):
    """Validate, hash and freeze a benchmark split from uploaded or opened files.

    ``truth``: COCO-style JSON, a boxes CSV (then ``images`` is the images table), or
    a zip of KITTI, YOLO or VOC XML label files (``images`` optional).
    ``annotations`` (``input_policy``): ``reference`` (default) reads a COCO-style file
    as pycocotools does — annotations of unlisted images or categories left out, a
    repeated annotation id resolved to its last annotation — and records what it left
    out (``annotations_left_out``, shown with the split); ``strict`` refuses such files.
    Raises ``engine.InputError`` for bad content and ``UploadError`` for a refused
    request; in both cases nothing is stored.
    """
    policy = input_policy(annotations=annotations)["annotations"]
    if BenchmarkSplit.objects.filter(name=name, revision=revision).exists():
        raise UploadError(
            f"{name} rev {revision} already exists and is frozen; "
            "load a corrected split as a new revision"
        )
    with tempfile.TemporaryDirectory() as work:
        try:
            truth_path, _, _ = spool(truth, _limit(), work)
            images_path = None
            if images is not None:
                images_dir = os.path.join(work, "images")
                os.mkdir(images_dir)
                images_path, _, _ = spool(images, _limit(), images_dir)
        except TooLarge as e:
            raise UploadError(str(e)) from None
        try:
            source_format = _format_of(truth_path, truth_path)
            loaded = engine.load_truth(
                truth_path,
                images=images_path,
                fmt=source_format,
                ids=ENGINE_IDS,
                annotations=policy,
                vis_ratio=VIS_RATIO_READING,
            )
        except engine.InputError as e:
            e.argument = "images" if images_path and str(e.path) == images_path else "truth"
            e.path = os.path.basename(e.path)  # the name as uploaded, not the spool folder
            raise
        except OverflowError:  # a number a fixed-size column cannot hold
            names = [os.path.basename(p) for p in (truth_path, images_path) if p]
            raise UploadError(
                f"{' or '.join(names)}: a number is too large to be read", path="truth"
            ) from None
        sha = loaded.content_hash(HASH_SCHEME)
        refusal = split_identity.twin_refusal(
            loaded, sha, HASH_SCHEME, lambda split: _read_truth(split, "keep")
        )
        if refusal:
            raise UploadError(refusal)
        tags = {tag: int(loaded.tag_mask(tag).sum()) for tag in loaded.tags()}
        counted = ~(loaded.crowd | loaded.ignore | loaded.difficult)
        split = BenchmarkSplit(
            name=name,
            revision=revision,
            description=description,
            classes=list(loaded.classes),
            class_counts={
                c: int(((loaded.box_class == k) & counted).sum())
                for k, c in enumerate(loaded.classes)
            },
            tags=tags,
            image_count=loaded.n_images,
            box_count=loaded.n_boxes_read(),  # pycocotools' rows, as before engine 2.21
            sha256=sha,
            source_format=source_format,
            road_counts=levels.split_counts(loaded),
            annotation_policy=policy,
            vis_ratio_reading=VIS_RATIO_READING,
            hash_scheme=HASH_SCHEME,
            annotations_left_out={
                key: int(loaded.box_counts.get(key, 0))
                for key in engine.ANNOTATION_COUNTS
                if loaded.box_counts.get(key, 0)
            },
            created_by=created_by,
            frozen_at=timezone.now(),
        )
        stored = []
        try:
            with transaction.atomic():
                with open(truth_path, "rb") as f:
                    split.truth_file.save(os.path.basename(truth_path), File(f), save=False)
                stored.append(split.truth_file)
                if images_path:
                    with open(images_path, "rb") as f:
                        split.images_file.save(os.path.basename(images_path), File(f), save=False)
                    stored.append(split.images_file)
                split.save()
                transaction.on_commit(
                    lambda: signals.split_frozen.send(BenchmarkSplit, split=split)
                )
        except Exception:
            for field_file in stored:  # nothing half-stored
                field_file.storage.delete(field_file.name)
            raise
    return split
