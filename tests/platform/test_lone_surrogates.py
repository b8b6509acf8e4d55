"""Category names and file names holding lone UTF-16 surrogate escapes (``"\\ud800"``
alone), through the platform's entry points, on the database in use (CI: PostgreSQL,
whose text and jsonb refuse a lone surrogate).

Reference: pycocotools 2.0.11 reads such files (Python's ``json``) and never reads
names or file names, so the numbers are its numbers; the platform shows and stores
each surrogate as its escape (``car\\ud800``), names alike once escaped told apart by
their ids as the split shows them. Ids holding surrogates go through every entry point
in ``test_any_ids.py`` (kind ``surrogate``).
"""

import json

import pytest
from django.urls import reverse
from django.utils.html import escape

from evaluation import images
from evaluation.models import BenchmarkSplit, Evaluation

from .conftest import upload
from .test_any_ids import KINDS, _assert_pycocotools_numbers, _files, _png
from .test_api import API, client_for, file

pytestmark = pytest.mark.django_db

NAMES = ["car\ud800", "car\\ud800", "\udfff"]  # the first two alike once escaped
SHOWN = ['car\\ud800 (id "cat\\\\udbff")', 'car\\ud800 (id "cat\\udbff")', "\\udfff"]


def _split_files():
    truth, sets = _files(KINDS["surrogate"], n_sets=2)
    for category, name in zip(truth["categories"], NAMES):
        category["name"] = name
    for n, image in enumerate(truth["images"]):
        image["file_name"] = f"cam/\udc00{n:04d}.png"
    return truth, sets


def _written(text):
    return text.encode("utf-8", "backslashreplace").decode("utf-8")


@pytest.mark.parametrize("entry", ["page", "api", "command"])
def test_names_and_file_names_are_stored_and_shown_escaped(
    entry, client, users, team, detector, run_tasks, tmp_path
):
    """The split loads through each entry point; its classes are the escaped names
    (renamed where two meet); file names map escaped, an image uploaded under that name
    is served; predictions through the page and the API score as pycocotools; the split
    page, the version page and the API show the names."""
    from django.core.management import call_command

    truth, sets = _split_files()
    client.force_login(users["lead"])
    api = client_for(users["engineer"])
    if entry == "page":
        response = client.post(
            reverse("load-split"),
            {"name": "lone", "revision": 1, "truth": upload("lone.json", truth)},
        )
        assert response.status_code == 302, response.content.decode()
    elif entry == "api":
        response = api.post(
            API + "splits/",
            {"name": "lone", "revision": 1, "truth": file("lone.json", truth)},
            format="multipart",
        )
        assert response.status_code == 201, response.json()
    else:
        path = tmp_path / "lone.json"
        path.write_text(json.dumps(truth))
        call_command("load_split", "lone", "1", str(path))
    split = BenchmarkSplit.objects.get()
    assert sorted(split.classes) == sorted(SHOWN)
    names = images.file_names(split)
    assert sorted(names.values()) == [
        f"cam/\\udc00{n:04d}.png" for n in range(len(truth["images"]))
    ]
    run_tasks(
        images.attach_images,
        split,
        files=[upload(_written(i["file_name"]), _png(n)) for n, i in enumerate(truth["images"])],
    )
    response = run_tasks(
        client.post,
        reverse("upload", args=[detector.pk]),
        {"version": "1.0", "split": split.pk, "predictions": upload("a.json", sets[0])},
    )
    assert response.status_code in (200, 302), response.content.decode()
    response = run_tasks(
        api.post,
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "2.0",
            "split": split.pk,
            "predictions": file("b.json", sets[1]),
        },
        format="multipart",
    )
    assert response.status_code == 201, response.json()
    for label, dets in zip(("1.0", "2.0"), sets):
        version = detector.versions.get(label=label)
        evaluation = Evaluation.objects.get(prediction_sets__version=version, protocol="coco")
        card = _assert_pycocotools_numbers_by_name(evaluation, truth, dets, tmp_path)
        assert sorted(card.result["per_class"]) == sorted(SHOWN)
    version = detector.versions.get(label="2.0")
    for url in (reverse("split", args=[split.pk]), reverse("version", args=[version.pk])):
        page = client.get(url)
        assert page.status_code == 200, url
        for name in SHOWN:
            assert escape(name) in page.content.decode(), (url, name)
    results = api.get(API + f"versions/{version.pk}/results/")
    assert results.status_code == 200
    body = results.content.decode()
    for name in SHOWN:
        assert json.dumps(name)[1:-1] in body, name
    served = client.get(reverse("image-file", args=[version.pk, split.pk, 0]))
    assert served.status_code == 200


def _assert_pycocotools_numbers_by_name(evaluation, truth, dets, tmp_path):
    """``test_any_ids._assert_pycocotools_numbers`` keys per-class AP by name; here the
    names are renamed, so each category's class is found by its id."""
    renamed = dict(zip(KINDS["surrogate"]["categories"], [SHOWN[1], SHOWN[0], SHOWN[2]]))
    plain = dict(truth)
    plain["categories"] = [{**c, "name": renamed[c["id"]]} for c in truth["categories"]]
    # the names there are only looked up; the numbers come from pycocotools
    return _assert_pycocotools_numbers(evaluation, plain, dets, tmp_path)


def test_a_split_page_error_names_a_surrogate_escaped(client, users, team):
    """A refused split (image ids mixing text and numbers, which pycocotools' ``sorted``
    cannot order) names the record and an id holding a surrogate escaped: the message
    is shown as text and nothing is stored."""
    truth, _ = _split_files()
    truth["images"].append({"id": 5, "file_name": "x.png"})
    client.force_login(users["engineer"])
    response = client.post(
        reverse("load-split"),
        {"name": "lone", "revision": 1, "truth": upload("lone.json", truth)},
    )
    assert response.status_code == 400
    text = response.content.decode()
    assert "mix numbers and text" in text and escape("'a\\ud800'") in text
    assert not BenchmarkSplit.objects.exists()
