"""A split's image files (optional): which file each image is, where the files are,
and their checks.

The COCO ``file_name`` of each image names its file. Files come as a zip archive or a
set of files uploaded under the media storage (each checked: a JPEG, PNG or WebP by its
first bytes, at most ``BENCHBOOK_MAX_IMAGE_BYTES``, named by a ``file_name`` of the
split), or as a URL template the browser fills in (``https://images.example/{file_name}``).
Nothing is half-stored: a refused upload deletes what it wrote.
"""

import codecs
import csv
import functools
import os
import posixpath
import tempfile
import typing
import zipfile
from urllib.parse import urlsplit

import msgspec
from django.conf import settings
from django.core.files.base import ContentFile
from django.core.files.storage import default_storage
from django.db import IntegrityError, transaction

from .engine.loaders import ids, json_literals
from .models import BenchmarkSplit, SplitImages
from .services import UploadError
from .storage import TooLarge, local_path, spool

# First bytes of the accepted image types (common practice: the formats' signatures).
SIGNATURES = (
    (b"\xff\xd8\xff", "image/jpeg"),
    (b"\x89PNG\r\n\x1a\n", "image/png"),
)
_BLOCK = 1 << 20


def image_type(head):
    """The MIME type of an image from its first 12 bytes, or None.

    >>> image_type(b"\\x89PNG\\r\\n\\x1a\\n\\x00\\x00\\x00\\r"), image_type(b"GIF89a")
    ('image/png', None)
    """
    for magic, mime in SIGNATURES:
        if head.startswith(magic):
            return mime
    if head[:4] == b"RIFF" and head[8:12] == b"WEBP":
        return "image/webp"
    return None


def _limit():
    return settings.BENCHBOOK_MAX_IMAGE_BYTES


class _Image(msgspec.Struct):
    id: typing.Any = None
    file_name: typing.Any = ""


class _ImagesOnly(msgspec.Struct):
    images: list[_Image] = []


def id_texts(values):
    r"""Image ids read from COCO JSON as the engine shows them (``GroundTruth.image_ids``
    as text; ``loaders.ids``): a boolean or whole float is its integer (pycocotools'
    dicts key ``true`` as 1 and ``3.0`` as 3), numbers in decimal or their shortest
    form, text as written — JSON-quoted when some id of the family ends in U+0000 or
    holds a lone surrogate (shown as its escape), as the engine shows such a family.
    None for a value no id can be (null).

    >>> id_texts([7, 2**64 + 5, True, 3.0, 1e20, 2.5, float("inf"), float("nan"), None])
    ['7', '18446744073709551621', '1', '3', '100000000000000000000', '2.5', 'inf', 'nan', None]
    >>> id_texts(["img_001", "b"]), id_texts(["a\x00", "b"]), id_texts(["a\ud800"])
    (['img_001', 'b'], ['"a\\u0000"', '"b"'], ['"a\\ud800"'])
    """
    whole = []
    for value in values:
        if isinstance(value, bool) or (isinstance(value, float) and value.is_integer()):
            value = int(value)
        whole.append(value if isinstance(value, str | int | float) else None)
    keys = ids.typed_keys([v for v in whole if v is not None])
    shown = iter(ids.display(keys, ids.family_type(keys)).tolist())
    return [None if v is None else next(shown) for v in whole]


@functools.lru_cache(maxsize=16)
def _file_names(split_id, sha256):
    split = BenchmarkSplit.objects.get(pk=split_id)
    if split.source_format not in ("json", "csv") and not split.images_file:
        return {}  # a label archive names no file_name
    source = split.images_file if split.images_file else split.truth_file
    with local_path(source) as path:
        if split.source_format == "csv" or path.lower().endswith(".csv"):
            return _csv_file_names(path)
        with open(path, "rb") as f:
            data = f.read()
    # as the engine reads the file: a byte-order mark skipped, NaN/Infinity/1e400
    # anywhere read as Python's json reads them (pycocotools reads the file so)
    decoded = json_literals.decode(data.removeprefix(codecs.BOM_UTF8), _ImagesOnly)
    keys = id_texts([image.id for image in decoded.images])
    return {  # a lone surrogate (``"\\ud800"`` in the file) as its escape, as names are
        key: ids.escaped(image.file_name)
        for key, image in zip(keys, decoded.images)
        if key is not None and image.file_name and isinstance(image.file_name, str)
    }


def _csv_file_names(path):
    """A CSV images table's file names, keyed by its ids typed as the engine types
    them (``ids.csv_ids``: integers when every id is one, so ``007`` is 7)."""
    with open(path, newline="", encoding="utf-8-sig") as f:
        rows = [
            (row.get("image_id") or row.get("id"), row.get("file_name"))
            for row in csv.DictReader(f)
        ]
    rows = [(key, name) for key, name in rows if key is not None]
    keys = ids.csv_ids([key for key, _ in rows]) if rows else []
    return {str(key): name for key, (_, name) in zip(keys, rows) if name}


def file_names(split):
    """``{str(image id): file_name}`` of a split's images (those that name a file)."""
    return _file_names(split.pk, split.sha256)


def images_of(split):
    """The split's ``SplitImages`` row, or None."""
    return SplitImages.objects.filter(split=split).first()


def image_url(images, file_name):
    """Where the browser loads an image from a URL template, or None."""
    if images is None or images.source != SplitImages.Source.URL or not file_name:
        return None
    return images.url_template.replace("{file_name}", file_name)


def check_url_template(template):
    parts = urlsplit(template)
    if parts.scheme not in ("http", "https") or not parts.netloc:
        raise UploadError(
            f"url_template: must be an http(s) URL, got {template!r}", path="url_template"
        )
    if "{file_name}" not in template:
        raise UploadError(
            "url_template: must contain {file_name} (the COCO file_name of each image)",
            path="url_template",
        )
    if len(template) > 500:
        raise UploadError("url_template: longer than 500 characters", path="url_template")
    return template


def _root(split):
    return f"split-images/{split.name}/rev{split.revision}"


def _safe(file_name):
    """Refuse a split file_name that would leave the images folder."""
    normal = posixpath.normpath(file_name.replace("\\", "/"))
    return not (normal.startswith(("/", "../")) or normal == ".." or "\x00" in normal)


class _Matcher:
    """Names the split's file for an uploaded name: exactly, below one extra top
    folder of an archive, or by its base name when that is unique in the split."""

    def __init__(self, names):
        # an uploaded name's backslashes are folder separators: a split's are read so
        # too (a file_name holding one, or a surrogate's escape ``\\udc00``, can match)
        self.names = {}
        for name in sorted(names):
            self.names.setdefault(_slashed(name), name)
        by_base = {}
        for normal, name in self.names.items():
            by_base.setdefault(posixpath.basename(normal), []).append(name)
        self.by_base = {b: n[0] for b, n in by_base.items() if len(n) == 1}

    def __call__(self, uploaded):
        uploaded = _slashed(uploaded)
        if uploaded in self.names:
            return self.names[uploaded]
        _, _, below = uploaded.partition("/")
        if below in self.names:
            return self.names[below]
        return self.by_base.get(posixpath.basename(uploaded))


def _slashed(name):
    return name.replace("\\", "/").lstrip("/")


def _stored(file_name):
    """The storage path of a (safe) file_name below the images folder: backslashes as
    folders, as ``_Matcher`` reads them (storage refuses a backslash)."""
    return posixpath.normpath(_slashed(file_name))


def _junk(name):
    base = posixpath.basename(name.rstrip("/"))
    return name.endswith("/") or name.startswith("__MACOSX/") or base.startswith(".")


def attach_images(
    split, *, archive=None, files=(), url_template="", created_by="", on_attached=None
):
    """Give ``split`` its images: a zip ``archive``, uploaded ``files`` or a
    ``url_template``. Each file is checked (type by its first bytes, size, a name the
    split's ``file_name`` lists); the first bad one refuses the whole upload, naming
    the file. Returns the ``SplitImages`` row. A split has one image source.
    ``on_attached(row)`` runs in the row's transaction (the caller's audit event): if
    it raises, the row is not kept and the stored files are deleted."""
    then = on_attached or (lambda row: None)
    if SplitImages.objects.filter(split=split).exists():
        raise UploadError(f"{split} already has images", path="images")
    if url_template:
        try:
            with transaction.atomic():
                row = SplitImages.objects.create(
                    split=split,
                    source=SplitImages.Source.URL,
                    url_template=check_url_template(url_template),
                    created_by=created_by,
                )
                then(row)
                return row
        except IntegrityError:
            raise UploadError(f"{split} already has images", path="images") from None
    names = file_names(split)
    if not names:
        raise UploadError(
            f"{split}: its images name no file_name, so no file can be matched", path="images"
        )
    unsafe = next((n for n in names.values() if not _safe(n)), None)
    if unsafe is not None:
        raise UploadError(f"{split}: file_name {unsafe!r} leaves the images folder", path="images")
    match = _Matcher(names.values())
    root = _root(split)
    stored = []
    try:
        with tempfile.TemporaryDirectory() as work:
            seen = set()
            if archive is not None:
                _store_archive(archive, match, root, work, stored, seen)
            for uploaded in files:
                uploaded.seek(0)
                _checked_put(uploaded.name, uploaded.read, match, root, stored, seen)
            if not stored:
                raise UploadError("no image files were uploaded", path="images")
            with transaction.atomic():
                row = SplitImages.objects.create(
                    split=split,
                    source=SplitImages.Source.FILES,
                    root=root,
                    file_count=len(stored),
                    created_by=created_by,
                )
                then(row)
                return row
    except BaseException:
        for name in stored:
            default_storage.delete(name)
        raise


def _checked_put(source_name, read, match, root, stored, seen):
    target = match(source_name)
    if target is None:
        raise UploadError(f"{source_name}: not a file_name of the split's images", path="images")
    if target in seen:
        raise UploadError(f"{source_name}: {target} was uploaded twice", path="images")
    limit = _limit()
    data = bytearray()
    while block := read(_BLOCK):
        data += block
        if len(data) > limit:
            raise UploadError(
                f"{source_name}: larger than the image limit of {limit:,} bytes", path="images"
            )
    if image_type(bytes(data[:12])) is None:
        raise UploadError(
            f"{source_name}: not a JPEG, PNG or WebP image (by its first bytes)", path="images"
        )
    name = f"{root}/{_stored(target)}"
    default_storage.delete(name)  # a leftover of an interrupted upload
    saved = default_storage.save(name, ContentFile(bytes(data)))
    stored.append(saved)
    seen.add(target)
    if saved != name:
        raise UploadError(f"{source_name}: could not be stored as {name}", path="images")


def _store_archive(archive, match, root, work, stored, seen):
    try:
        path, _, _ = spool(archive, settings.BENCHBOOK_MAX_UPLOAD_BYTES, work)
    except TooLarge as e:
        raise UploadError(str(e), path="archive") from None
    archive_name = os.path.basename(path)
    try:
        bundle = zipfile.ZipFile(path)
    except (zipfile.BadZipFile, OSError):
        raise UploadError(f"{archive_name}: not a zip archive", path="archive") from None
    with bundle:
        for info in bundle.infolist():
            if _junk(info.filename):
                continue
            try:
                with bundle.open(info) as member:
                    _checked_put(
                        f"{archive_name}: {info.filename}",
                        member.read,
                        lambda n: match(n.split(": ", 1)[1]),
                        root,
                        stored,
                        seen,
                    )
            except (zipfile.BadZipFile, RuntimeError, NotImplementedError, EOFError) as e:
                raise UploadError(
                    f"{archive_name}: {info.filename}: cannot be read ({e})", path="archive"
                ) from None


def open_image(split_images, file_name):
    """``(open file, MIME type)`` of one stored image, or None (no such file). The
    type is read from the file's first bytes again, so only checked types are served."""
    if split_images is None or split_images.source != SplitImages.Source.FILES:
        return None
    if not _safe(file_name):
        return None
    name = f"{split_images.root}/{_stored(file_name)}"
    if not default_storage.exists(name):
        return None
    f = default_storage.open(name, "rb")
    mime = image_type(f.read(12))
    if mime is None:
        f.close()
        return None
    f.seek(0)
    return f, mime
