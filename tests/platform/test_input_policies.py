"""Files a reference implementation accepts are accepted and scored the same way by
default; the stricter policy is an option the user picks (``services.input_policy``).

References (named at each check):

* pycocotools 2.0.11 (``COCO.createIndex``, ``COCO.getAnnIds``/``loadAnns``,
  ``COCO.loadRes``, ``COCOeval._prepare``/``evaluate``), run here on the same files:
  annotations of images or categories the file does not list are never evaluated
  (``_prepare`` walks only ``getImgIds()``/``getCatIds()``), an annotation id given
  twice resolves to the last annotation with it (``anns`` is a dict filled in file
  order), detections of categories the split does not list are kept by ``loadRes`` and
  never looked at by ``evaluate``; detections of images the split lacks make
  ``loadRes`` assert "Results do not correspond to current coco set".
* The strict options refuse those files naming file, record and field and store
  nothing (the binding rule: bad input gets a clear error; common practice: refuse
  atomically).

Every entry point is exercised: the split loading page, API and command; the upload
page, API and command; the worker (a file past the inline-validation size); re-score;
the streamed pieces path (``test_upload_pieces.py``); the pipeline client
(``test_client_input_policies`` below, integration).
"""

import contextlib
import csv
import importlib.metadata
import io
import json

import pytest
from django.core.management import CommandError, call_command
from django.urls import reverse

from evaluation import engine, left_out
from evaluation import services as evaluation_services
from evaluation.models import BenchmarkSplit, Evaluation, PredictionFile, Scorecard
from evaluation.services import UploadError
from releases import rescore, services, suites
from releases.models import PredictionSet

from .conftest import detections_for, set_suite_policy, split_dict, upload
from .test_api import API, client_for, file

pytestmark = pytest.mark.django_db

PYCOCOTOOLS = "pycocotools 2.0.11"


def _messy_split(seed=31):
    """A COCO-style split pycocotools 2.0.11 accepts, with an annotation of an image the
    file does not list, one of a category it does not list, and a repeated annotation
    id; and detections made from its clean form (so every image they name is listed)."""
    clean = split_dict(seed=seed)
    detections = detections_for(clean, seed=seed + 1)
    messy = json.loads(json.dumps(clean))
    ann = messy["annotations"]
    template = dict(ann[0])
    ann.append({**template, "id": 900001, "image_id": 10**6})  # unlisted image
    ann.append({**template, "id": 900002, "category_id": 99})  # unlisted category
    ann[3]["id"] = ann[1]["id"]  # a repeated id: pycocotools scores two copies of ann[3]
    return messy, detections


def _pycocotools(tmp_path, truth, detections):
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval

    gt_path, dt_path = tmp_path / "gt.json", tmp_path / "dt.json"
    gt_path.write_text(json.dumps(truth))
    dt_path.write_text(json.dumps(detections))
    with contextlib.redirect_stdout(io.StringIO()):
        gt = COCO(str(gt_path))
        evaluator = COCOeval(gt, gt.loadRes(str(dt_path)), "bbox")
        evaluator.evaluate()
        evaluator.accumulate()
        evaluator.summarize()
    return evaluator


def _with_unknown_classes(detections):
    """Two detections of classes no split lists (ids 7 and 42)."""
    return detections + [{**detections[0], "category_id": 7}, {**detections[1], "category_id": 42}]


# Split loading ----------------------------------------------------------------------


def test_pycocotools_accepts_the_messy_split_and_reads_it_as_the_engine_counts(tmp_path):
    """The facts this module relies on, checked with pycocotools 2.0.11 itself: the
    file loads, the annotations it scores exclude the unlisted image and category, and
    the repeated id resolves to the last annotation with it."""
    from pycocotools.coco import COCO

    messy, _ = _messy_split()
    (tmp_path / "gt.json").write_text(json.dumps(messy))
    with contextlib.redirect_stdout(io.StringIO()):
        gt = COCO(str(tmp_path / "gt.json"))
    scored = gt.loadAnns(gt.getAnnIds(imgIds=sorted(gt.getImgIds()), catIds=gt.getCatIds()))
    ids = [a["id"] for a in scored]
    assert 900001 not in ids and 900002 not in ids
    repeated = messy["annotations"][1]["id"]
    copies = [a for a in scored if a["id"] == repeated]
    assert len(copies) == 2 and all(a is copies[0] for a in copies)
    assert copies[0]["bbox"] == messy["annotations"][3]["bbox"]  # the last one


def test_the_service_loads_what_pycocotools_accepts_and_records_what_it_left_out():
    messy, _ = _messy_split()
    split = evaluation_services.load_split(
        name="ring-road", revision=1, truth=upload("ring-road.json", messy)
    )
    assert split.annotation_policy == "reference"
    assert split.annotations_left_out == {
        "annotations_of_unlisted_images": 1,
        "annotations_of_unlisted_categories": 1,
        "duplicate_id_copies": 1,
    }
    # boxes as pycocotools scores them: every listed annotation, the repeated id's
    # first occurrence replaced by a copy of its last
    assert split.box_count == len(messy["annotations"]) - 2


def test_iscrowd_values_pycocotools_raises_on_get_their_own_line():
    """An ``iscrowd`` of null or of text ``int`` cannot read makes pycocotools 2.0.11's
    ``computeIoU`` raise (``int(o['iscrowd'])``); text it reads (``"1"``) it reads. The
    split loads, and its lines tell the two apart: none says pycocotools reads a null
    (red team audit15 F4)."""
    split = split_dict()
    split["annotations"][0]["iscrowd"] = None
    split["annotations"][1]["iscrowd"] = "1"
    loaded = evaluation_services.load_split(
        name="ring-road", revision=1, truth=upload("ring-road.json", split)
    )
    assert loaded.annotations_left_out == {
        "iscrowd_text_or_null": 2,
        "iscrowd_pycocotools_raises": 1,
    }
    lines = left_out.of_split(loaded)
    assert any(line.startswith("2 iscrowd values given as text or null") for line in lines)
    raises = [line for line in lines if line.startswith("1 iscrowd value of these")]
    assert raises and "where pycocotools raises" in raises[0], lines


def test_images_and_categories_listed_twice_load_as_pycocotools_indexes_them():
    """``COCO.createIndex`` (pycocotools 2.0.11) keeps the last entry of an image or
    category id listed twice and never reads names: such a split loads, its page and
    API say so, and ``strict`` refuses it naming the entry."""
    split = split_dict()
    split["images"].append(dict(split["images"][0]))
    split["categories"].append({**split["categories"][0], "id": 77})  # the same name
    loaded = evaluation_services.load_split(
        name="ring-road", revision=1, truth=upload("ring-road.json", split)
    )
    assert loaded.annotations_left_out == {"duplicate_image_entries": 1, "categories_renamed": 2}
    assert loaded.image_count == len(split["images"]) - 1
    lines = left_out.of_split(loaded)
    assert any("image ids listed more than once" in line for line in lines)
    assert any("named with their ids" in line for line in lines)
    with pytest.raises(engine.InputError, match=r"categories\[3\]: field 'name': duplicate name"):
        evaluation_services.load_split(
            name="ring-road", revision=2, truth=upload("r.json", split), annotations="strict"
        )


def test_the_strict_option_refuses_the_same_file_and_stores_nothing():
    messy, _ = _messy_split()
    with pytest.raises(engine.InputError) as caught:
        evaluation_services.load_split(
            name="ring-road",
            revision=1,
            truth=upload("ring-road.json", messy),
            annotations="strict",
        )
    assert str(caught.value).startswith("ring-road.json: annotations[")
    assert "duplicate id" in str(caught.value) and caught.value.field == "id"
    assert not BenchmarkSplit.objects.exists()


def test_an_unknown_annotation_policy_is_refused_naming_the_setting():
    with pytest.raises(UploadError, match="annotations: unknown policy 'lenient'"):
        evaluation_services.load_split(
            name="ring-road",
            revision=1,
            truth=upload("r.json", split_dict()),
            annotations="lenient",
        )
    assert not BenchmarkSplit.objects.exists()


def test_the_split_page_loads_by_default_and_shows_what_was_left_out(client, team, users):
    messy, _ = _messy_split()
    client.force_login(users["engineer"])
    response = client.post(
        reverse("load-split"),
        {"name": "ring-road", "revision": 1, "truth": upload("ring-road.json", messy)},
    )
    assert response.status_code == 302
    split = BenchmarkSplit.objects.get()
    page = client.get(reverse("split", args=[split.pk])).content.decode()
    assert "as pycocotools reads them" in page
    assert "1 annotation of images the file does not list left out" in page
    assert "1 annotation of categories the file does not list left out" in page
    assert "1 annotation with a repeated id scored as a copy of the last" in page


def test_the_split_page_refuses_under_the_strict_option_in_place(client, team, users):
    messy, _ = _messy_split()
    client.force_login(users["engineer"])
    response = client.post(
        reverse("load-split"),
        {
            "name": "ring-road",
            "revision": 1,
            "truth": upload("ring-road.json", messy),
            "annotations": "strict",
        },
    )
    assert response.status_code == 400
    assert "ring-road.json: annotations[" in response.content.decode()
    assert not BenchmarkSplit.objects.exists()


def test_the_split_api_loads_by_default_shows_the_counts_and_refuses_under_strict(team, users):
    messy, _ = _messy_split()
    api = client_for(users["engineer"])
    strict = api.post(
        API + "splits/",
        {
            "name": "ring-road",
            "revision": 1,
            "truth": file("r.json", messy),
            "annotations": "strict",
        },
        format="multipart",
    )
    assert strict.status_code == 400, strict.json()
    assert strict.json()["file"] == "r.json" and strict.json()["field"] == "id"
    assert not BenchmarkSplit.objects.exists()
    made = api.post(
        API + "splits/",
        {"name": "ring-road", "revision": 1, "truth": file("r.json", messy)},
        format="multipart",
    )
    body = made.json()
    assert made.status_code == 201, body
    assert body["annotation_policy"] == "reference"
    assert body["annotations_left_out"]["annotations_of_unlisted_images"] == 1
    assert any("images the file does not list left out" in line for line in body["left_out"])
    assert api.get(API + f"splits/{body['id']}/").json()["left_out"] == body["left_out"]


def test_the_load_split_command_loads_by_default_and_refuses_under_strict(tmp_path):
    messy, _ = _messy_split()
    path = tmp_path / "ring-road.json"
    path.write_text(json.dumps(messy))
    with pytest.raises(CommandError, match=r"ring-road.json: annotations\["):
        call_command("load_split", "ring-road", "1", str(path), "--annotations", "strict")
    assert not BenchmarkSplit.objects.exists()
    out = io.StringIO()
    call_command("load_split", "ring-road", "1", str(path), stdout=out)
    assert "frozen ring-road rev 1" in out.getvalue()
    assert "1 annotation of categories the file does not list left out" in out.getvalue()


# Predictions naming classes the split does not list -----------------------------------


def test_the_platforms_numbers_equal_pycocotools_on_files_it_accepts(
    detector, version, users, run_tasks, tmp_path
):
    """The messy split and predictions with classes it does not list, through the
    platform's default path (split service, upload service, worker): every summary
    number and per-class AP of the stored ``coco`` scorecard equals pycocotools 2.0.11
    on the same two files (to 1e-12; in practice bit for bit)."""
    messy, detections = _messy_split()
    detections = _with_unknown_classes(detections)
    split = evaluation_services.load_split(
        name="ring-road", revision=1, truth=upload("ring-road.json", messy)
    )
    run_tasks(
        services.submit_predictions, version, split, upload("p.json", detections), users["engineer"]
    )
    evaluation = Evaluation.objects.get(protocol="coco")
    assert evaluation.state == "done", evaluation.error
    card = Scorecard.objects.get(evaluation=evaluation)
    assert importlib.metadata.version("pycocotools") == PYCOCOTOOLS.split()[1]
    reference = _pycocotools(tmp_path, messy, detections)
    for key, expected in zip(engine.COCO_SUMMARY_KEYS, reference.stats):
        got = card.summary[key]
        assert (-1.0 if got is None else got) == pytest.approx(expected, abs=1e-12), key
    precision = reference.eval["precision"]  # [T, R, K, A, M]
    for k, name in enumerate(split.classes):
        expected = precision[:, :, k, 0, 2]
        got = card.result["per_class"][name]["AP"]
        if (expected == -1).all():
            assert got is None, name
        else:
            assert got == pytest.approx(expected.mean(), abs=1e-12), name
    counts = card.result["counts"]
    assert (counts["dropped_predictions"], counts["dropped_classes"]) == (2, ["7", "42"])


def test_the_pages_read_a_split_with_a_repeated_annotation_id(
    client, detector, version, users, run_tasks
):
    """A split whose repeated annotation id became two copies of its last annotation
    (as pycocotools scores it): the version page, the image list and drill-down and the
    records download all work, and the download has one box row per scored box (the
    copies share their id, as in pycocotools' index)."""
    messy, detections = _messy_split()
    split = evaluation_services.load_split(
        name="ring-road", revision=1, truth=upload("ring-road.json", messy)
    )
    prediction_set = run_tasks(
        services.submit_predictions, version, split, upload("p.json", detections), users["engineer"]
    )
    evaluation = prediction_set.evaluations.get(protocol="coco")
    assert evaluation.state == "done", evaluation.error
    client.force_login(users["engineer"])
    for url in (
        reverse("version", args=[version.pk]),
        reverse("image-list", args=[version.pk]) + f"?split={split.pk}",
        reverse("image-detail", args=[version.pk, split.pk, 0]),
    ):
        assert client.get(url).status_code == 200, url
    response = client.get(reverse("records-download", args=[evaluation.pk, "csv"]))
    rows = list(csv.DictReader(io.StringIO(b"".join(response.streaming_content).decode())))
    boxes = [r for r in rows if r["row"] == "box"]
    assert len(boxes) == split.box_count
    repeated = str(messy["annotations"][1]["id"])
    assert sum(r["box_id"] == repeated for r in boxes) == 2


def test_the_api_accepts_unknown_classes_by_default_and_shows_them_left_out(
    detector, split, split_truth, users, run_tasks
):
    detections = _with_unknown_classes(detections_for(split_truth))
    api = client_for(users["engineer"])
    response = run_tasks(
        api.post,
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "2.0",
            "split": split.pk,
            "predictions": file("p.json", detections),
        },
        format="multipart",
    )
    assert response.status_code == 201, response.json()
    evaluation = Evaluation.objects.get(protocol="coco")
    assert (evaluation.state, evaluation.unknown_classes) == ("done", "drop")
    line = "2 detections of classes the split does not list were left out: ids 7, 42"
    assert line in api.get(API + f"evaluations/{evaluation.pk}/result/").json()["left_out"]
    version_id = PredictionSet.objects.get().version_id
    (row,) = api.get(API + f"versions/{version_id}/results/").json()["splits"]
    assert line in row["left_out"]
    detail = api.get(API + f"evaluations/{evaluation.pk}/").json()
    assert detail["unknown_classes"] == "drop"


def test_the_api_refuses_unknown_classes_under_the_strict_option(
    detector, split, split_truth, users
):
    set_suite_policy(detector, users["lead"], unknown_classes="reject")
    ok = detections_for(split_truth)
    response = client_for(users["engineer"]).post(
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "2.0",
            "split": split.pk,
            "predictions": file("u.json", ok + [{**ok[0], "category_id": 7}]),
        },
        format="multipart",
    )
    body = response.json()
    assert response.status_code == 400, body
    assert body["message"].startswith(
        f"predictions: u.json: record {len(ok)}: field 'category_id': class 7 is not one of "
        "the split's classes"
    )
    assert (body["file"], body["field"]) == ("u.json", "category_id")
    assert not PredictionFile.objects.exists() and not Evaluation.objects.exists()


def test_the_upload_page_accepts_by_default_and_the_version_page_shows_the_drop(
    client, detector, split, split_truth, users, run_tasks
):
    client.force_login(users["engineer"])
    detections = _with_unknown_classes(detections_for(split_truth))
    response = run_tasks(
        client.post,
        reverse("upload", args=[detector.pk]),
        {"version": "2.0", "split": split.pk, "predictions": upload("p.json", detections)},
    )
    assert response.status_code == 302
    version_id = PredictionSet.objects.get().version_id
    page = client.get(reverse("version", args=[version_id])).content.decode()
    assert "2 detections of classes the split does not list were left out: ids 7, 42" in page


def test_the_upload_page_refuses_under_the_strict_option_in_place(
    client, detector, split, split_truth, users
):
    set_suite_policy(detector, users["lead"], unknown_classes="reject")
    client.force_login(users["engineer"])
    ok = detections_for(split_truth)
    response = client.post(
        reverse("upload", args=[detector.pk]),
        {
            "version": "2.0",
            "split": split.pk,
            "predictions": upload("u.json", ok + [{**ok[0], "category_id": 7}]),
        },
    )
    assert response.status_code == 400
    assert "u.json: record" in response.content.decode()
    assert "class 7 is not one of the split" in response.content.decode()
    assert not PredictionFile.objects.exists()


def test_the_upload_command_follows_the_suites_class_policy(
    detector, split, split_truth, users, tmp_path, django_capture_on_commit_callbacks
):
    path = tmp_path / "p.json"
    path.write_text(json.dumps(_with_unknown_classes(detections_for(split_truth))))
    args = ["upload_predictions", str(path), "--detector", detector.slug, "--split", "bay-night:1"]
    args += ["--user", "engineer", "--create-version"]
    set_suite_policy(detector, users["lead"], unknown_classes="reject")
    with pytest.raises(CommandError, match="class 7 is not one of the split's classes"):
        call_command(*args, "--label", "2.0")
    assert not PredictionFile.objects.exists()
    set_suite_policy(detector, users["lead"], unknown_classes="drop")
    out = io.StringIO()
    call_command(*args, "--label", "2.1", stdout=out)
    assert "evaluations queued" in out.getvalue()
    assert set(Evaluation.objects.values_list("unknown_classes", flat=True)) == {"drop"}


@pytest.mark.parametrize("policy, state", [("drop", "done"), ("reject", "failed")])
def test_the_worker_follows_the_class_policy_past_the_inline_size(
    detector, version, split, split_truth, users, run_tasks, settings, policy, state
):
    """A file past the inline-validation size is checked by the worker under the
    evaluation's class policy: scored with the drop counted, or failed with the
    engine's message naming file, record and field."""
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 0
    set_suite_policy(detector, users["lead"], unknown_classes=policy)
    ok = detections_for(split_truth)
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("big.json", ok + [{**ok[0], "category_id": 7}]),
        users["engineer"],
    )
    evaluations = list(Evaluation.objects.all())
    assert {(e.state, e.unknown_classes) for e in evaluations} == {(state, policy)}
    for e in evaluations:
        if state == "failed":
            assert e.error.startswith(
                f"big.json: record {len(ok)}: field 'category_id': class 7 is not one of"
            )
        else:
            assert e.scorecard.result["counts"]["dropped_classes"] == ["7"]


def test_the_same_file_under_the_other_class_policy_is_another_evaluation(
    detector, split, split_truth, users, run_tasks
):
    """The class policy is part of what is evaluated: a suite change to ``reject``
    leaves the ``drop`` evaluations uncounted and requests its own (which fail)."""
    ok = detections_for(split_truth)
    version = services.create_version(detector, "2.0", users["engineer"])
    bad = ok + [{**ok[0], "category_id": 7}]
    prediction_set = run_tasks(
        services.submit_predictions, version, split, upload("p.json", bad), users["engineer"]
    )
    assert {e.unknown_classes for e in prediction_set.evaluations.all()} == {"drop"}
    run_tasks(set_suite_policy, detector, users["lead"], unknown_classes="reject")
    run_tasks(services.request_for_set, prediction_set)
    rows = {(e.unknown_classes, e.state) for e in prediction_set.evaluations.all()}
    assert rows == {("drop", "done"), ("reject", "failed")}


def test_a_suite_names_its_class_policy_and_refuses_an_unknown_one(detector, users):
    api = client_for(users["lead"])
    spec = {"splits": ["bay-night"], "protocols": ["coco"], "unknown_classes": "ignore"}
    evaluation_services.load_split(
        name="bay-night", revision=1, truth=upload("b.json", split_dict())
    )
    bad = api.post(API + f"detectors/{detector.pk}/suite/", spec, format="json")
    assert bad.status_code == 400 and bad.json()["errors"][0]["path"] == "unknown_classes"
    with pytest.raises(suites.SuiteError, match="unknown_classes: must be one of drop, reject"):
        suites.set_suite(detector, users["lead"], spec)  # the page posts the JSON here
    good = api.post(
        API + f"detectors/{detector.pk}/suite/",
        {**spec, "unknown_classes": "reject"},
        format="json",
    )
    assert good.status_code == 201, good.json()
    assert good.json()["unknown_classes"] == "reject"
    assert suites.current_suite(detector).unknown_classes == "reject"
    default = api.post(
        API + f"detectors/{detector.pk}/suite/",
        {k: v for k, v in spec.items() if k != "unknown_classes"},
        format="json",
    )
    assert default.json()["unknown_classes"] == "drop"  # the reference behaviour


def test_re_score_follows_the_suites_default_and_counts_the_drop(
    detector, split, split_truth, users, run_tasks
):
    """A stored file naming a class the split does not list, re-scored on a new
    revision under the default policy: scored, the drop counted and named."""
    ok = detections_for(split_truth)
    version = services.create_version(detector, "2.0", users["engineer"])
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", ok + [{**ok[0], "category_id": 7}]),
        users["engineer"],
    )
    revised = json.loads(json.dumps(split_truth))
    revised["annotations"] = revised["annotations"][:-1]
    rev2 = evaluation_services.load_split(
        name="bay-night", revision=2, truth=upload("bay-night-2.json", revised)
    )
    run_tasks(rescore.rescore, detector, users["lead"], rev2)
    new = PredictionSet.objects.get(version=version, split=rev2)
    for e in new.evaluations.all():
        assert (e.state, e.unknown_classes) == ("done", "drop"), e.error
        assert e.scorecard.result["counts"]["dropped_classes"] == ["7"]


def test_predictions_of_images_the_split_lacks_stay_refused(detector, split, split_truth, users):
    """pycocotools' ``loadRes`` asserts "Results do not correspond to current coco set"
    for such files: refused under every class policy."""
    ok = detections_for(split_truth)
    response = client_for(users["engineer"]).post(
        API + "prediction-sets/",
        {
            "detector": detector.pk,
            "version": "2.0",
            "split": split.pk,
            "predictions": file("i.json", ok + [{**ok[0], "image_id": 99999}]),
        },
        format="multipart",
    )
    assert response.status_code == 400
    assert "image 99999 is not in the split" in response.json()["message"]


def test_a_lead_cannot_approve_on_evaluations_of_the_old_class_policy(
    detector, split, split_truth, users, run_tasks, monkeypatch
):
    """The gate's promise across a policy change: a version scored under ``drop`` passes;
    once the suite says ``reject`` its ``drop`` evaluations no longer count. Before the
    worker has scored and judged under the new policy no decision can be recorded; after
    (the strict evaluation fails on the unlisted class) only an override with a written
    justification can approve it (``services.sign_off``, the one function behind every
    entry point)."""
    from releases import tasks as release_tasks
    from releases import verdicts
    from releases.models import SignOff
    from releases.services import DecisionError

    ok = detections_for(split_truth)
    version = services.create_version(detector, "2.0", users["engineer"])
    bad = ok + [{**ok[0], "category_id": 7}]
    run_tasks(services.submit_predictions, version, split, upload("p.json", bad), users["engineer"])
    assert verdicts.verdict_of(version).state == "pass"
    with monkeypatch.context() as held:  # the worker has not run yet
        held.setattr("evaluation.services.queueing.dispatch", lambda pk: None)
        held.setattr(release_tasks.judge, "delay", lambda *args: None)
        set_suite_policy(detector, users["lead"], unknown_classes="reject")
        assert verdicts.verdict_of(version).state != "pass"
        for justification in ("", "the unlisted class is harmless"):
            with pytest.raises(DecisionError):
                services.sign_off(
                    version, users["lead"], "approved", "ship", justification=justification
                )
    assert not SignOff.objects.exists()
    run_tasks(services.request_for_set, version.prediction_sets.get())
    run_tasks(release_tasks.judge, version.pk)
    assert verdicts.verdict_of(version).state == "incomplete"
    with pytest.raises(DecisionError):
        services.sign_off(version, users["lead"], "approved", "ship")
    assert not SignOff.objects.exists()
    services.sign_off(
        version, users["lead"], "approved", "ship", justification="class 7 is a known extra"
    )
    assert SignOff.objects.get().decision == "approved"


def test_lost_image_lines_name_the_reference_of_the_count():
    """A level result under ``miss-rate-cityscale`` counts the images the CityPersons
    script's ``np.unique`` loses (the engine's reason names it); the line says so, and
    pycocotools' counts keep naming pycocotools."""
    from evaluation import left_out
    from evaluation.engine.provenance import LOST_REASON

    for reference in ("pycocotools 2.0.11", "the CityPersons script (eval_MR_multisetup.py)"):
        counts = {
            "images_left_out": {
                "images": 1,
                "truth_boxes": 2,
                "ids": [9007199254740993],
                "reason": LOST_REASON.format(reference, "image"),
            }
        }
        (line,) = left_out.detection_lines(counts)
        named = "the CityPersons script" if "CityPersons" in reference else "pycocotools"
        assert f"as in {named} (its np.unique of the image ids" in line, line


def test_records_never_read_on_lost_ids_are_named():
    """Annotations and detections left out because pycocotools never reads them (their
    image's id is one its np.unique loses) each get a line."""
    from evaluation import left_out

    (split_line,) = left_out.annotation_lines({"unreadable_on_lost_ids": 2})
    assert split_line.startswith("2 annotations with a bbox or area"), split_line
    counts = {"boxes": {"predictions": {"unreadable_on_lost_ids": 1}}}
    (line,) = left_out.detection_lines(counts)
    assert line.startswith("1 detection with a score or field"), line


def test_records_under_a_changed_value_are_named(tmp_path):
    """Annotations and detections written with the value pycocotools' np.unique changes
    a listed id into (scored under that id by ``coco``, left out by ``voc``:
    tests/engine/test_changed_value_aliases.py) get a line on the split and on each
    result, saying which."""
    import json

    from evaluation import left_out
    from evaluation.engine import evaluate, load_predictions, load_truth

    split = {
        "images": [{"id": i, "width": 64, "height": 64} for i in (2**63 + 1, 5)],
        "categories": [{"id": 1, "name": "car"}],
        "annotations": [
            {"id": n + 1, "image_id": i, "category_id": 1, "bbox": [1, 1, 9, 9], "area": 81}
            | {"iscrowd": 0}
            for n, i in enumerate((5, 2**63))
        ],
    }
    dets = [{"image_id": 5, "category_id": 1, "bbox": [1, 1, 9, 9], "score": 0.9}]
    (tmp_path / "gt.json").write_text(json.dumps(split))
    (tmp_path / "dt.json").write_text(json.dumps(dets))
    truth = load_truth(tmp_path / "gt.json")
    (split_line,) = left_out.annotation_lines(truth.box_counts)
    assert split_line.startswith("1 annotation of an image or category the file"), split_line
    predictions = load_predictions(tmp_path / "dt.json", truth)
    for protocol, said in (("coco", "scored under that id"), ("voc", "left out")):
        lines = left_out.detection_lines(evaluate(truth, predictions, protocol)["counts"])
        assert any(line.startswith("1 ground-truth box and 0 detections") for line in lines)
        assert any(said in line for line in lines), lines


def test_a_class_counted_more_than_once_is_named(tmp_path):
    """A NaN category id listed twice beside an id beyond 64 bits: pycocotools 2.0.11's
    np.unique keeps both entries (NaN != NaN) and counts that category twice in every
    mean, and so does the engine under ``coco`` (tests/engine/test_unique_lost_ids.py);
    the result's line says so, naming the class and how often."""
    import json

    from evaluation import left_out
    from evaluation.engine import evaluate, load_predictions, load_truth

    nan, box = float("nan"), [10, 10, 20, 20]  # json writes the literal NaN
    split = {
        "images": [{"id": 1, "width": 200, "height": 200}],
        "categories": [
            {"id": 2**64, "name": "wide"},
            {"id": nan, "name": "odd"},
            {"id": 1, "name": "car"},
            {"id": nan, "name": "odd"},
        ],
        "annotations": [
            {"id": 1, "image_id": 1, "category_id": nan, "bbox": box, "area": 400, "iscrowd": 0}
        ],
    }
    (tmp_path / "gt.json").write_text(json.dumps(split))
    detections = [{"image_id": 1, "category_id": nan, "bbox": box, "score": 0.9}]
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    truth = load_truth(tmp_path / "gt.json")
    result = evaluate(truth, load_predictions(tmp_path / "dt.json", truth), "coco")
    lines = left_out.of_result(result)
    assert any(line.startswith("1 class counted more than once") for line in lines), lines
    assert any("odd (2 times)" in line for line in lines), lines
    voc = evaluate(truth, load_predictions(tmp_path / "dt.json", truth), "voc")
    assert not any("counted more than once" in line for line in left_out.of_result(voc))
