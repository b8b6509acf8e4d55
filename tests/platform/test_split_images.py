"""A split's image files: checked on upload (type by first bytes, size, names the split
lists), nothing half-stored, served only to readers of a version scored on the split."""

import io
import os
import zipfile

import pytest
from django.core.files.base import ContentFile
from django.urls import reverse

from evaluation import images
from evaluation import services as evaluation_services
from evaluation.models import SplitImages
from evaluation.services import UploadError
from releases import services

from .conftest import detections_for, split_dict, upload

pytestmark = pytest.mark.django_db

# The formats' published signatures (PNG spec section 5.2; JPEG SOI marker FFD8 + a marker).
PNG = b"\x89PNG\r\n\x1a\n" + b"\x00" * 32
JPEG = b"\xff\xd8\xff\xe0" + b"\x00" * 32


@pytest.fixture
def named_truth():
    truth = split_dict(seed=21, n_images=4)
    for n, image in enumerate(truth["images"]):
        image["file_name"] = f"cam/{n:04d}.png"
    return truth


@pytest.fixture
def named_split(named_truth):
    return evaluation_services.load_split(
        name="harbour-cam", revision=1, truth=upload("harbour-cam.json", named_truth)
    )


def _zip(members):
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as z:
        for name, data in members.items():
            z.writestr(name, data)
    return ContentFile(buffer.getvalue(), name="images.zip")


def _stored(settings):
    root = os.path.join(settings.MEDIA_ROOT, "split-images")
    return sorted(
        os.path.relpath(os.path.join(d, f), root) for d, _, files in os.walk(root) for f in files
    )


def test_image_types_by_first_bytes():
    """JPEG, PNG and WebP by their signatures (common practice); anything else None."""
    assert images.image_type(PNG[:12]) == "image/png"
    assert images.image_type(JPEG[:12]) == "image/jpeg"
    assert images.image_type(b"RIFF\x10\x00\x00\x00WEBP") == "image/webp"
    assert images.image_type(b"<svg xmlns=") is None
    assert images.image_type(b"GIF89a") is None


def test_zip_archive_is_stored_under_the_split(named_split, settings, tmp_path):
    # One extra top folder and junk entries are accepted, as archives come.
    archive = _zip(
        {
            "export/cam/0000.png": PNG,
            "export/cam/0001.png": JPEG,
            "__MACOSX/._0000.png": b"junk",
            "export/.DS_Store": b"junk",
        }
    )
    row = images.attach_images(named_split, archive=archive, created_by="lead")
    assert row.source == "files" and row.file_count == 2
    assert _stored(settings) == ["harbour-cam/rev1/cam/0000.png", "harbour-cam/rev1/cam/0001.png"]
    handle, mime = images.open_image(row, "cam/0001.png")
    assert mime == "image/jpeg" and handle.read() == JPEG
    handle.close()


@pytest.mark.parametrize(
    "members, message",
    [
        ({"cam/0000.png": PNG, "cam/0001.png": b"<html>not an image"}, "cam/0001.png: not a JPEG"),
        ({"cam/0000.png": PNG, "cam/9999.png": PNG}, "cam/9999.png: not a file_name"),
        ({"cam/0000.png": PNG + b"\x00" * 200}, "larger than the image limit of 100 bytes"),
    ],
)
def test_a_bad_member_refuses_the_whole_archive(named_split, settings, tmp_path, members, message):
    settings.BENCHBOOK_MAX_IMAGE_BYTES = 100
    with pytest.raises(UploadError, match=message):
        images.attach_images(named_split, archive=_zip(members))
    assert _stored(settings) == [] and not SplitImages.objects.exists()  # nothing half-stored


def test_not_a_zip_and_files_by_base_name(named_split, settings, tmp_path):
    with pytest.raises(UploadError, match="images.zip: not a zip archive"):
        images.attach_images(named_split, archive=ContentFile(b"plain", name="images.zip"))
    # A folder of files: browsers send base names only; unique base names match.
    row = images.attach_images(
        named_split, files=[ContentFile(PNG, name="0002.png"), ContentFile(PNG, name="0003.png")]
    )
    assert row.file_count == 2
    with pytest.raises(UploadError, match="already has images"):
        images.attach_images(named_split, url_template="https://images.example/{file_name}")


@pytest.mark.parametrize(
    "template, message",
    [
        ("ftp://images.example/{file_name}", "must be an http"),
        ("javascript:alert(1)//{file_name}", "must be an http"),
        ("https://images.example/all.jpg", "must contain {file_name}"),
    ],
)
def test_url_templates_are_checked(named_split, template, message):
    with pytest.raises(UploadError, match=message):
        images.attach_images(named_split, url_template=template)
    row = images.attach_images(named_split, url_template="https://images.example/{file_name}")
    assert images.image_url(row, "cam/0001.png") == "https://images.example/cam/0001.png"


def test_image_files_are_served_to_readers_of_the_version_only(
    client, users, detector, rival_detector, named_split, named_truth, run_tasks, settings, tmp_path
):
    images.attach_images(named_split, archive=_zip({"cam/0000.png": PNG, "cam/0001.png": PNG}))
    version = services.create_version(detector, "1.5", users["engineer"])
    run_tasks(
        services.submit_predictions,
        version,
        named_split,
        upload("p.json", detections_for(named_truth)),
        users["engineer"],
    )
    # image index 0 is the smallest image id; which file it has is the split's business
    names = images.file_names(named_split)
    first = str(min(int(i) for i in names))
    index_of_cam0 = sorted(int(i) for i in names).index(
        int(next(i for i, n in names.items() if n == "cam/0000.png"))
    )
    url = reverse("image-file", args=[version.pk, named_split.pk, index_of_cam0])
    client.force_login(users["engineer"])
    response = client.get(url)
    assert response.status_code == 200 and response["Content-Type"] == "image/png"
    assert response["X-Content-Type-Options"] == "nosniff"
    assert b"".join(response.streaming_content) == PNG
    # The drill-down draws over the file served by that view, not a media URL.
    page = client.get(reverse("image-detail", args=[version.pk, named_split.pk, index_of_cam0]))
    assert f'href="{url}"' in page.content.decode() and "/media/" not in page.content.decode()
    assert first  # the mapping is non-empty
    for outsider in ("rival", "outsider"):
        client.force_login(users[outsider])
        assert client.get(url).status_code == 404
    client.force_login(users["reviewer"])  # safety review reads every team
    assert client.get(url).status_code == 200
    # no stored file for that image, an index past the split, a split not scored: 404
    client.force_login(users["engineer"])
    missing = sorted(int(i) for i in names).index(
        int(next(i for i, n in names.items() if n == "cam/0003.png"))
    )
    assert (
        client.get(reverse("image-file", args=[version.pk, named_split.pk, missing])).status_code
        == 404
    )
    assert (
        client.get(reverse("image-file", args=[version.pk, named_split.pk, 99])).status_code == 404
    )
    assert (
        client.get(reverse("image-file", args=[version.pk, named_split.pk + 1, 0])).status_code
        == 404
    )
    assert rival_detector  # the rival team exists and sees nothing


def test_page_and_api_attach_images_with_the_role_check(client, users, team, named_split):
    """Leads (any team) attach images; engineers (who may load splits) and others are
    refused, and the split page offers them no form; a bad file is named in the error
    and nothing is stored (page: message; API: 400 body)."""
    from rest_framework.test import APIClient

    from releases import tokens

    url = reverse("split-images", args=[named_split.pk])
    page_url = reverse("split", args=[named_split.pk])
    for who in ("outsider", "engineer"):
        client.force_login(users[who])
        template = {"url_template": "https://i.example/{file_name}"}
        assert client.post(url, template).status_code == 403
        assert 'class="images-form"' not in client.get(page_url).content.decode()
    assert not SplitImages.objects.exists()
    client.force_login(users["lead"])
    assert 'class="images-form"' in client.get(page_url).content.decode()
    bad = _zip({"cam/0000.png": b"not an image at all"})
    response = client.post(url, {"archive": bad}, follow=True)
    assert "cam/0000.png: not a JPEG, PNG or WebP" in response.content.decode()
    assert not SplitImages.objects.exists()
    _, token = tokens.create_token(users["lead"], "ci")
    api = APIClient()
    api.credentials(HTTP_AUTHORIZATION=f"Bearer {token}")
    endpoint = f"/api/v1/splits/{named_split.pk}/images/"
    body = api.post(endpoint, {"url_template": "ftp://x/{file_name}"}, format="multipart").json()
    assert body["status"] == 400 and "must be an http" in body["message"]
    response = api.post(endpoint, {"archive": _zip({"cam/0001.png": PNG})}, format="multipart")
    assert response.status_code == 201 and response.json()["file_count"] == 1
    page = client.get(reverse("split", args=[named_split.pk])).content.decode()
    assert "1 file uploaded" in page
