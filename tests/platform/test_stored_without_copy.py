"""Uploads and their pieces enter the storage without a copy where the disk allows it
(``storage.save_from_path``: a hard link moved into place), and with a copy where it
does not; either way the stored bytes are the spooled bytes (their SHA-256, FIPS
180-4 via ``hashlib``, equals the upload's) and the spooled file stays readable for
the rest of the upload check."""

import hashlib
import json
import os

import pytest
from django.core.files.uploadedfile import SimpleUploadedFile

from evaluation import services, storage
from evaluation.models import PredictionFile

from .conftest import detections_for

pytestmark = pytest.mark.django_db


def _sha(path):
    with open(path, "rb") as f:
        return hashlib.sha256(f.read()).hexdigest()


def _received(split, split_truth):
    data = json.dumps(detections_for(split_truth)).encode()
    return data, services.received_predictions(SimpleUploadedFile("dt.json", data), split)


@pytest.mark.parametrize("links", [True, False], ids=["hard-link", "copy"])
def test_the_stored_file_holds_the_uploaded_bytes(split, split_truth, monkeypatch, links):
    if not links:  # a disk (or another file system) without hard links: copied
        monkeypatch.setattr(storage.os, "link", _no_link)
    data, received = _received(split, split_truth)
    with received as got:
        stored = got.store()
        assert os.path.exists(got.path) and _sha(got.path) == got.sha256  # still there
        left = [n for n in os.listdir(os.path.dirname(got.path)) if n.endswith(".link")]
        assert left == []  # no link left behind beside the spooled file
    row = PredictionFile.objects.get(pk=stored.pk)
    assert _sha(row.file.path) == hashlib.sha256(data).hexdigest() == row.sha256
    assert os.stat(row.file.path).st_nlink == 1  # the spool folder is gone: one name


def test_a_failed_save_leaves_no_link(tmp_path, monkeypatch):
    source = tmp_path / "dt.json"
    source.write_bytes(b"[]")

    class Refusing:
        def save(self, name, content, save=False):
            assert content.temporary_file_path().endswith(".link")
            raise OSError("disk full")

    with pytest.raises(OSError, match="disk full"):
        storage.save_from_path(Refusing(), str(source), "dt.json")
    assert sorted(os.listdir(tmp_path)) == ["dt.json"] and source.read_bytes() == b"[]"


def _no_link(src, dst):
    raise OSError(18, "Invalid cross-device link")
