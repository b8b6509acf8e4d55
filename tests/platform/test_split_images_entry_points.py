"""Attaching images to a split through every entry point — page, API, ``manage.py
attach_images`` — goes through one service (``releases.split_images``): the role check,
the file checks, one audit event in the row's transaction; a refusal stores nothing and
records nothing."""

import io
import zipfile

import pytest
from django.contrib import admin
from django.core.management import CommandError, call_command
from django.urls import reverse

from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit, SplitImages
from releases import audit
from releases.models import AuditEvent

from .conftest import split_dict, upload
from .test_split_images import JPEG, PNG, _stored

pytestmark = pytest.mark.django_db


@pytest.fixture
def named_split(team):
    truth = split_dict(seed=21, n_images=4)
    for n, image in enumerate(truth["images"]):
        image["file_name"] = f"cam/{n:04d}.png"
    return evaluation_services.load_split(
        name="harbour-cam", revision=1, truth=upload("harbour-cam.json", truth)
    )


def _zip_file(tmp_path, members, name="images.zip"):
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as z:
        for member, data in members.items():
            z.writestr(member, data)
    path = tmp_path / name
    path.write_bytes(buffer.getvalue())
    return str(path)


def _events():
    return list(AuditEvent.objects.filter(kind=AuditEvent.Kind.IMAGES_ATTACHED))


def _attach(**options):
    out = io.StringIO()
    call_command("attach_images", stdout=out, **options)
    return out.getvalue()


def test_command_attaches_a_zip_and_records_one_event(named_split, users, settings, tmp_path):
    archive = _zip_file(tmp_path, {"export/cam/0000.png": PNG, "export/cam/0001.png": JPEG})
    said = _attach(split="harbour-cam:1", user="lead", zip=archive)
    assert "harbour-cam" in said and "2 image files attached" in said
    assert _stored(settings) == ["harbour-cam/rev1/cam/0000.png", "harbour-cam/rev1/cam/0001.png"]
    (event,) = _events()
    assert event.actor == "lead" and event.subject == f"split:{named_split.pk}"
    assert event.payload["file_count"] == 2 and event.payload["source"] == "files"
    assert audit.verify_audit()[0] is None  # the chain still verifies


def test_command_files_and_url_template(named_split, users, tmp_path):
    (tmp_path / "0002.png").write_bytes(PNG)
    (tmp_path / "0003.png").write_bytes(PNG)
    _attach(
        split="harbour-cam:1",
        user="lead",
        files=[str(tmp_path / "0002.png"), str(tmp_path / "0003.png")],
    )
    assert SplitImages.objects.get(split=named_split).file_count == 2
    with pytest.raises(CommandError, match="already has images"):
        _attach(split="harbour-cam:1", user="lead", url_template="https://i.example/{file_name}")
    assert len(_events()) == 1


@pytest.mark.parametrize("who", ["engineer", "reviewer", "outsider"])
def test_command_refuses_all_but_leads(named_split, users, tmp_path, who):
    """Only leads attach images (a split's one image source, shared by every team): an
    engineer, who may load splits, is refused too; nothing stored, no event."""
    archive = _zip_file(tmp_path, {"cam/0000.png": PNG})
    with pytest.raises(CommandError, match="only leads give splits their images"):
        _attach(split="harbour-cam:1", user=who, zip=archive)
    assert not SplitImages.objects.exists() and _events() == []


@pytest.mark.parametrize(
    "members, message",
    [
        ({"cam/0000.png": b"<html>not an image"}, "images.zip: cam/0000.png: not a JPEG"),
        ({"../../../etc/evil.png": PNG}, "../../../etc/evil.png: not a file_name"),
        ({"cam/0000.png": PNG, "/abs/cam/0000.png": PNG}, "was uploaded twice"),
    ],
)
def test_command_refuses_bad_archives_and_stores_nothing(
    named_split, users, settings, tmp_path, members, message
):
    archive = _zip_file(tmp_path, members)
    with pytest.raises(CommandError, match=message):
        _attach(split="harbour-cam:1", user="lead", zip=archive)
    assert _stored(settings) == [] and not SplitImages.objects.exists() and _events() == []


def test_a_traversing_member_lands_inside_the_split_folder(named_split, users, settings, tmp_path):
    """A member named ``../cam/0000.png`` is matched to the split's file_name below one
    top folder and stored as that name under the split's folder, never outside it."""
    archive = _zip_file(tmp_path, {"../cam/0000.png": PNG})
    _attach(split="harbour-cam:1", user="lead", zip=archive)
    assert _stored(settings) == ["harbour-cam/rev1/cam/0000.png"]


def test_a_split_whose_file_names_leave_the_folder_is_refused(team, users, tmp_path):
    truth = split_dict(seed=21, n_images=2)
    truth["images"][0]["file_name"] = "../../outside.png"
    truth["images"][1]["file_name"] = "cam/0001.png"
    evaluation_services.load_split(name="odd", revision=1, truth=upload("odd.json", truth))
    (tmp_path / "0001.png").write_bytes(PNG)
    with pytest.raises(CommandError, match="leaves the images folder"):
        _attach(split="odd:1", user="lead", files=[str(tmp_path / "0001.png")])
    assert _events() == []


@pytest.mark.parametrize(
    "split, message",
    [("harbour-cam:2", "not found"), ("nowhere:1", "not found"), ("x:y", "not found")],
)
def test_command_wrong_split_or_user(named_split, users, tmp_path, split, message):
    with pytest.raises(CommandError, match=message):
        _attach(split=split, user="lead", url_template="https://i.example/{file_name}")
    with pytest.raises(CommandError, match="not found"):
        _attach(split="harbour-cam:1", user="nobody", url_template="https://i.example/{file_name}")
    assert not SplitImages.objects.exists()


def test_command_missing_file(named_split, users, tmp_path):
    with pytest.raises(CommandError, match="No such file"):
        _attach(split="harbour-cam:1", user="lead", zip=str(tmp_path / "absent.zip"))


def test_frozen_split_stays_frozen_and_a_new_revision_needs_its_own(named_split, users, tmp_path):
    """Images sit beside a frozen split (its row and hash unchanged); a corrected split
    is a new revision with its own images."""
    before = BenchmarkSplit.objects.values("sha256", "frozen_at").get(pk=named_split.pk)
    _attach(split="harbour-cam:1", user="lead", url_template="https://i.example/{file_name}")
    assert BenchmarkSplit.objects.values("sha256", "frozen_at").get(pk=named_split.pk) == before
    truth = split_dict(seed=22, n_images=2)
    for n, image in enumerate(truth["images"]):
        image["file_name"] = f"cam/{n:04d}.png"
    evaluation_services.load_split(name="harbour-cam", revision=2, truth=upload("r2.json", truth))
    (tmp_path / "0000.png").write_bytes(PNG)
    _attach(split="harbour-cam:2", user="lead", files=[str(tmp_path / "0000.png")])
    assert SplitImages.objects.count() == 2 and len(_events()) == 2


def test_page_and_api_record_the_event_too(client, users, named_split):
    from rest_framework.test import APIClient

    client.force_login(users["lead"])
    url = reverse("split-images", args=[named_split.pk])
    client.post(url, {"url_template": "https://i.example/{file_name}"})
    (event,) = _events()
    assert event.payload["url_template"] == "https://i.example/{file_name}"
    api = APIClient()
    for who in ("engineer", "reviewer"):
        api.force_authenticate(users[who])
        refused = api.post(
            f"/api/v1/splits/{named_split.pk}/images/", {"url_template": "https://x/{file_name}"}
        )
        assert refused.status_code == 403 and len(_events()) == 1


def test_an_audit_failure_keeps_neither_row_nor_files(
    named_split, users, settings, tmp_path, monkeypatch
):
    def broken(*args, **kwargs):
        raise RuntimeError("audit chain unavailable")

    monkeypatch.setattr(audit, "record_event", broken)
    archive = _zip_file(tmp_path, {"cam/0000.png": PNG})
    with pytest.raises(RuntimeError):
        _attach(split="harbour-cam:1", user="lead", zip=archive)
    assert _stored(settings) == [] and not SplitImages.objects.exists()


def test_the_admin_is_no_way_around_the_service():
    assert SplitImages not in admin.site._registry
