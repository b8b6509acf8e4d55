"""The cause pages on a demo-like story: from 1.5's failing night-pedestrian rule to the
images behind it and one image's boxes; every object behind a team check."""

import json

import numpy as np
import pytest
from django.test import override_settings
from django.urls import reverse

from releases.models import Outcome
from releases.selectors import cause

from . import cause_scenario

pytestmark = pytest.mark.django_db


@pytest.fixture
def story(users, team, run_tasks):
    with override_settings(BENCHBOOK_BOOTSTRAP_RESAMPLES=200):
        return cause_scenario.build(users, team, run_tasks)


def test_the_demo_like_rule_fails(story):
    failing = Outcome.objects.filter(version=story["1.5"], status="fail")
    assert [(o.class_name, o.rule.get("tag")) for o in failing] == [("pedestrian", "night")]


def test_drilldown_draws_what_the_records_say(client, users, story):
    """Each detection's outcome on the page is the stored records' (TP where the
    protocol matched it); each box's 'found' score is that of its TP."""
    client.force_login(users["engineer"])
    pair = cause.pair_for(users["engineer"], story["1.5"].pk, story["split"].pk)
    assert pair.reference.version == story["1.4"]  # the judged baseline by default
    records = pair.candidate.records
    image = int(records.det_image[0])
    response = client.get(reverse("image-detail", args=[story["1.5"].pk, story["split"].pk, image]))
    assert response.status_code == 200
    html = response.content.decode()
    start = html.index('id="drilldown-data"')
    data = json.loads(html[html.index(">", start) + 1 : html.index("</script>", start)])
    is_tp, _ = records.outcomes(0, 0)
    mine = np.flatnonzero(records.det_image == image)
    assert sorted(
        d["score"] for d in data["candidate"]["detections"] if d["outcome"] == "tp"
    ) == sorted(round(float(records.det_score[d]), 4) for d in mine if is_tp[d])
    truth = pair.truth
    assert len(data["truth"]) == int((truth.box_image == image).sum())
    assert data["image"]["width"] == 1280 and data["image"]["url"] is None
    assert data["reference"]["label"] == "1.4"


def test_other_teams_get_404_on_every_cause_page(client, users, story, rival_detector):
    version, split = story["1.5"], story["split"]
    evaluation = cause.pair_for(users["lead"], version.pk, split.pk).candidate.evaluation
    urls = [
        reverse("image-list", args=[version.pk]) + f"?split={split.pk}",
        reverse("image-detail", args=[version.pk, split.pk, 0]),
        reverse("image-file", args=[version.pk, split.pk, 0]),
        reverse("records-download", args=[evaluation.pk, "csv"]),
        reverse("records-download", args=[evaluation.pk, "jsonl"]),
        reverse("confusion", args=[version.pk]) + f"?split={split.pk}",
    ]
    for name in ("rival", "outsider"):
        client.force_login(users[name])
        for url in urls:
            assert client.get(url).status_code == 404, (name, url)
    client.logout()
    assert all(client.get(url).status_code == 302 for url in urls)  # to the login page
    from rest_framework.test import APIClient

    api = APIClient()
    api.force_authenticate(users["rival"])
    for url in (
        f"/api/v1/versions/{version.pk}/images/?split={split.pk}",
        f"/api/v1/versions/{version.pk}/images/{split.pk}/0/",
        f"/api/v1/evaluations/{evaluation.pk}/records.csv",
    ):
        assert api.get(url).status_code == 404, url


def _rescored_without(truth_dict, detections, image_id, tag="night"):
    """AP per class of the night images without ``image_id``, matched again from the
    files (the engine's ``evaluate``: an independent path from the stored records)."""
    import tempfile

    from evaluation import engine

    kept = [im for im in truth_dict["images"] if tag in im["tags"] and str(im["id"]) != image_id]
    ids = {im["id"] for im in kept}
    smaller = {
        **truth_dict,
        "images": kept,
        "annotations": [a for a in truth_dict["annotations"] if a["image_id"] in ids],
        "dont_care": [r for r in truth_dict.get("dont_care", []) if r["image_id"] in ids],
    }
    with tempfile.TemporaryDirectory() as work:
        gt, dt = f"{work}/gt.json", f"{work}/dt.json"
        with open(gt, "w") as f:
            json.dump(smaller, f)
        with open(dt, "w") as f:
            json.dump([d for d in detections if d["image_id"] in ids], f)
        loaded = engine.load_truth(gt)
        records = engine.match(loaded, engine.load_predictions(dt, loaded), "coco")
        return engine.headline(records, "coco")


@pytest.fixture(params=["stored", "on request"])
def loo_path(request, monkeypatch):
    """The per-image list reads the leave-one-out file the worker stored ("stored"), or
    computes from the records, as for an evaluation stored before that file existed."""
    from evaluation import image_loo

    if request.param == "on request":
        monkeypatch.setattr(image_loo, "stored", lambda *args: None)
    from releases.selectors import image_list

    image_list._ROWS.clear()
    image_list._CLASS_LOO.clear()
    return request.param


def _assert_path(pair, path):
    from evaluation import image_loo

    found = image_loo.stored(pair.candidate.card, "AP", "all", "night")
    assert (found is not None) == (path == "stored")


def test_each_listed_contribution_is_the_change_without_that_image(users, story, loo_path):
    """Leaving the listed image out of both versions' files and scoring them again
    gives exactly the ΔAP change the list states (c_i = Δ − Δ_without_i), read from
    the stored leave-one-out file or computed on request."""
    from releases import demo
    from releases.selectors import image_list

    pair = cause.pair_for(users["lead"], story["1.5"].pk, story["split"].pk)
    _assert_path(pair, loo_path)
    listing = image_list.listing_filters({"class": "pedestrian", "tag": "night"})
    rows = image_list.image_rows(pair, listing)
    k = pair.classes.index("pedestrian")
    files = {}
    for label in ("1.4", "1.5"):
        index = demo.index_of("forward", label)
        day, night, jitter = demo.version_quality("forward", index, label)
        files[label] = demo.predictions(story["truth"], day, night, jitter, (index + 1) * 1000 + 17)
    mask = pair.truth.tag_mask("night")
    from evaluation import engine

    full = {
        label: engine.headline(side.records, "coco", weights=mask)[1][k]
        for label, side in (("1.5", pair.candidate), ("1.4", pair.reference))
    }
    change = full["1.5"] - full["1.4"]
    worst, best = rows["order"][0], rows["order"][-1]
    for image in (worst, best):
        image_id = str(pair.truth.image_ids[image])
        without = {
            label: _rescored_without(story["truth"], files[label], image_id)[1][k]
            for label in ("1.4", "1.5")
        }
        stated = rows["contribution"][image]
        assert stated == pytest.approx(change - (without["1.5"] - without["1.4"]), abs=1e-12)
    assert rows["contribution"][worst] < 0  # the list starts with a loss


def test_rule_link_filters_the_list_and_the_api_agrees(client, users, story):
    client.force_login(users["engineer"])
    version = story["1.5"]
    page = client.get(reverse("version", args=[version.pk])).content.decode()
    outcome = Outcome.objects.get(version=version, status="fail")
    link = f"/versions/{version.pk}/images/?split={story['split'].pk}&amp;class=pedestrian&amp;tag=night&amp;against={story['1.4'].pk}"
    assert link in page
    response = client.get(link.replace("&amp;", "&"))
    assert response.status_code == 200
    shown = [r["id"] for r in response.context["table"]["rows"]]
    from rest_framework.test import APIClient

    api = APIClient()
    api.force_authenticate(users["engineer"])
    body = api.get(
        f"/api/v1/versions/{version.pk}/images/",
        {"split": story["split"].pk, "class": "pedestrian", "tag": "night"},
    ).json()
    assert [r["id"] for r in body["images"]][: len(shown)] == shown
    assert body["reference"]["label"] == "1.4" and body["filters"]["tag"] == "night"
    assert set(body["images"][0]["candidate"]) >= {"tp", "fp", "missed", "fp_localisation"}
    assert outcome.split_id == story["split"].pk
    bad = api.get(
        f"/api/v1/versions/{version.pk}/images/", {"split": story["split"].pk, "class": "yeti"}
    )
    assert bad.status_code == 400 and "not a class" in bad.json()["message"]
    drill = api.get(f"/api/v1/versions/{version.pk}/images/{story['split'].pk}/0/").json()
    assert drill["candidate"]["label"] == "1.5" and drill["image"]["index"] == 0


def test_kinds_of_error_name_what_grew_for_the_failing_class(client, users, story):
    """The version page shows TIDE's ΔAP per error type for 1.5 and its baseline 1.4
    (the engine's ``tide.error_breakdown`` of each stored records file) and names the
    error type that grew most for pedestrians: 1.5 misses pedestrians at night."""
    from evaluation import engine
    from evaluation.engine import tide
    from releases.selectors import errors

    pair = cause.pair_for(users["lead"], story["1.5"].pk, story["split"].pk)
    found = errors.version_breakdowns(story["1.5"])[0]
    mine = tide.error_breakdown(pair.candidate.records, engine.get_protocol("coco"))
    theirs = tide.error_breakdown(pair.reference.records, engine.get_protocol("coco"))
    for row in found["mean"]:
        assert row["candidate"] == mine["mean"]["delta"][row["type"]]
        assert row["change"] == pytest.approx(
            mine["mean"]["delta"][row["type"]] - theirs["mean"]["delta"][row["type"]]
        )
    grew = {name: error for name, error, _ in found["class_grew"]}
    assert grew.get("pedestrian") == "missed"
    client.force_login(users["engineer"])
    page = client.get(reverse("version", args=[story["1.5"].pk])).content.decode()
    assert "pedestrian — <strong>missed</strong>" in page
    compare = client.get(
        reverse("compare", args=[story["detector"].pk]),
        {"candidate": story["1.5"].pk, "reference": story["1.4"].pk},
    ).content.decode()
    assert "pedestrian — <strong>missed</strong>" in compare


def test_confusion_totals_match_the_image_lists_counts(client, users, story):
    """At the deployed thresholds, the matrix's TP on the diagonal, each column's false
    positives and each row's missed boxes equal the per-image counts summed over the
    split; a cell lists exactly its detections."""
    from evaluation.engine import per_image
    from releases.selectors import errors

    pair = cause.pair_for(users["lead"], story["1.5"].pk, story["split"].pk)
    records = pair.candidate.records
    found = errors.confusion_for(pair)
    counts = np.array(found["matrix"]["counts"])
    n = len(pair.classes)
    for k in range(n):
        per = per_image.image_counts(records, pair.thresholds, k)
        assert counts[k, k] == per["tp"].sum()
        assert counts[:, k].sum() - counts[k, k] == per["fp"].sum()
        assert counts[k, n] == per["missed"].sum()
    k = pair.classes.index("pedestrian")
    client.force_login(users["engineer"])
    response = client.get(
        reverse("confusion", args=[story["1.5"].pk]),
        {"split": story["split"].pk, "row": n, "col": k},
    )
    assert response.status_code == 200
    cell = response.context["cell"]
    assert len(cell["detections"]) == counts[n, k] and cell["column"] == "pedestrian"
    assert all(d["reason"].startswith("fp_") for d in cell["detections"])
    normalised = client.get(
        reverse("confusion", args=[story["1.5"].pk]),
        {"split": story["split"].pk, "view": "normalised"},
    ).context["grid"]
    shares = [c["share"] for c in normalised[k]["cells"]]
    assert sum(shares) == pytest.approx(1.0)


def test_a_size_and_a_metric_rank_by_that_buckets_change(client, users, story, loo_path):
    """With a size chosen, ΔAP is the change of that size bucket's AP (scorecard
    ``AP_<size>``), and with ``metric=AP50`` of the class's AP at IoU 0.5: the listed
    image's value equals both records re-scored by the engine with its weight 0."""
    from evaluation import engine
    from releases.selectors import image_list

    pair = cause.pair_for(users["lead"], story["1.5"].pk, story["split"].pk)
    _assert_path(pair, loo_path)
    mask = pair.truth.tag_mask("night")
    for query, key in (({"size": "medium"}, "AP_medium"), ({"metric": "AP50"}, "AP50")):
        listing = image_list.listing_filters({"class": "pedestrian", "tag": "night", **query})
        rows = image_list.image_rows(pair, listing)

        def value(side, w, key=key):
            row = engine.score_records(side.records, "coco", weights=w)["per_class"]
            return row["pedestrian"][key]

        change = value(pair.candidate, mask) - value(pair.reference, mask)
        worst = rows["order"][0]
        w = mask.copy()
        w[worst] = 0
        without = value(pair.candidate, w) - value(pair.reference, w)
        assert rows["contribution"][worst] == pytest.approx(change - without, abs=1e-12)
        assert rows["contribution"][worst] < 0
    client.force_login(users["engineer"])
    url = f"/versions/{story['1.5'].pk}/images/?split={story['split'].pk}&metric=AP90"
    page = client.get(url).content.decode()
    assert "metric: &#x27;AP90&#x27; is not one of AP, AP50, AP75" in page


def test_compare_page_shows_both_confusion_matrices(client, users, story):
    """Side by side in one class order: each version's counts equal the engine's
    ``confusion_matrix`` of its own records at the deployed thresholds (rows sum to the
    boxes plus the background row's false positives), and a cell's link opens that
    version's confusion page on that cell."""
    import re

    from evaluation.engine import confusion

    client.force_login(users["engineer"])
    detector = story["detector"]
    url = reverse("compare", args=[detector.pk])
    query = f"?candidate={story['1.5'].pk}&reference={story['1.4'].pk}"
    response = client.get(url + query)
    assert response.status_code == 200
    found = response.context["confusions"][story["split"].pk]
    pair = cause.pair_for(users["engineer"], story["1.5"].pk, story["split"].pk)
    assert [s["version"].label for s in found["sides"]] == ["1.4", "1.5"]
    for side, records in zip(found["sides"], (pair.reference.records, pair.candidate.records)):
        expected = confusion.confusion_matrix(records, pair.thresholds)
        assert side["counts"] == expected["counts"] and found["labels"] == expected["labels"]
    assert found["sides"][0]["counts"] != found["sides"][1]["counts"]  # two matrices
    html = response.content.decode()
    table = f'id="confusion-{story["split"].pk}-{story["1.5"].pk}"'
    assert table in html and f'id="confusion-{story["split"].pk}-{story["1.4"].pk}"' in html
    k = pair.classes.index("pedestrian")
    link = found["sides"][1]["grid"][k]["cells"][k]["link"]
    assert link.replace("&", "&amp;") in html
    cell = client.get(link.split("#")[0])
    assert cell.status_code == 200 and cell.context["cell"]["row"] == "pedestrian"
    assert cell.context["cell"]["total"] == found["sides"][1]["counts"][k][k]
    assert re.search(r"<h3[^>]*>Confusion, side by side</h3>", html)


def test_the_list_of_every_class_equals_the_per_class_results(users, story, monkeypatch):
    """No class filter: each image's ΔAP is the mean over the classes with positives of
    the per-class changes (the headline mean), equal to each class's leave-one-out run
    on its own; without a stored file, every class's leave-one-out runs once, and the
    one-class lists after it reuse it."""
    import warnings

    from evaluation import engine, image_loo
    from evaluation.engine import per_image
    from releases.selectors import image_list

    monkeypatch.setattr(image_loo, "stored", lambda *args: None)  # computed on request

    pair = cause.pair_for(users["lead"], story["1.5"].pk, story["split"].pk)
    mask = pair.truth.tag_mask("night")
    image_list._CLASS_LOO.clear()
    image_list._ROWS.clear()
    calls = []
    real = per_image.leave_one_out
    monkeypatch.setattr(
        per_image, "leave_one_out", lambda *a, **k: calls.append(a) or real(*a, **k)
    )
    everything = image_list.image_rows(pair, image_list.listing_filters({"tag": "night"}))
    n_classes = len(pair.classes)
    assert len(calls) == 2 * n_classes  # both versions, each class once
    protocol = engine.get_protocol(pair.protocol)
    changes = []
    for k in range(n_classes):
        c_ap, c_without = real(pair.candidate.records, protocol, k, mask)
        r_ap, r_without = real(pair.reference.records, protocol, k, mask)
        changes.append((c_ap - c_without, r_ap - r_without))
        one = image_list.image_rows(
            pair, image_list.listing_filters({"class": pair.classes[k], "tag": "night"})
        )
        expected = (c_ap - c_without) - (r_ap - r_without)
        np.testing.assert_array_equal(one["contribution"], expected)
    assert len(calls) == 2 * n_classes  # the one-class lists reused them
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        mean_c = np.nanmean(np.stack([c for c, _ in changes]), axis=0)
        mean_r = np.nanmean(np.stack([r for _, r in changes]), axis=0)
    np.testing.assert_allclose(everything["contribution"], mean_c - mean_r, atol=1e-15)


def test_the_stored_file_holds_what_the_records_give_on_request(users, story, monkeypatch):
    """Every member the worker stored (each metric, size bucket and tag, every class)
    equals, to the bit, ``per_image.leave_one_out`` of the stored records with the
    tag's 0/1 weights — the computation the list runs on request — and a list read
    from the file runs no leave-one-out at all."""
    from evaluation import engine, image_loo
    from evaluation.engine import per_image
    from releases.selectors import image_list

    pair = cause.pair_for(users["lead"], story["1.5"].pk, story["split"].pk)
    protocol = engine.get_protocol(pair.protocol)
    for side in (pair.candidate, pair.reference):
        records = side.records
        row = image_loo.row_of(side.card)
        slots = image_loo.metric_slots(records)
        tags = ["", *pair.truth.tags()]
        assert set(row.members) == {
            image_loo.key(m, a, t) for m in slots for a in records.area_names for t in tags
        }
        for metric, slot in slots.items():
            for area, size in enumerate(records.area_names):
                for tag in tags:
                    aps, without = image_loo.read(row, image_loo.key(metric, size, tag))
                    w = pair.truth.tag_mask(tag) if tag else None
                    for k in range(len(records.classes)):
                        ap, expected = per_image.leave_one_out(
                            records, protocol, k, w, area=area, slot=slot
                        )
                        assert np.array_equal(aps[k], ap, equal_nan=True)
                        assert np.array_equal(without[k], expected, equal_nan=True)
    image_list._ROWS.clear()
    image_list._CLASS_LOO.clear()
    monkeypatch.setattr(per_image, "leave_one_out", None)  # would fail if called
    monkeypatch.setattr(per_image, "leave_one_out_metrics", None)
    for query in ({}, {"class": "pedestrian", "tag": "night", "size": "small"}):
        assert len(image_list.image_rows(pair, image_list.listing_filters(query))["order"])


def test_a_changed_leave_one_out_file_is_signalled_and_the_records_decide(
    users, story, monkeypatch
):
    """A member whose bytes no longer match their SHA-256 is not used: the mismatch is
    audited ("content mismatch") and the list is computed from the
    hash-checked records, with the same numbers."""
    import zipfile

    from evaluation import image_loo
    from releases.models import AuditEvent
    from releases.selectors import image_list

    pair = cause.pair_for(users["lead"], story["1.5"].pk, story["split"].pk)
    listing = image_list.listing_filters({"class": "pedestrian", "tag": "night"})
    image_list._ROWS.clear()
    before = image_list.image_rows(pair, listing)["contribution"].copy()
    row = image_loo.row_of(pair.candidate.card)
    member = row.members[image_loo.key("AP", "all", "night")]["member"]
    with zipfile.ZipFile(row.file.path) as z:
        contents = {name: z.read(name) for name in z.namelist()}
    data = bytearray(contents[member])
    data[-1] ^= 0xFF  # the last value's last byte
    contents[member] = bytes(data)
    with zipfile.ZipFile(row.file.path, "w") as z:
        for name, value in contents.items():
            z.writestr(name, value)
    monkeypatch.setattr(image_loo, "_MEMBERS", None)  # a fresh process
    image_list._ROWS.clear()
    image_list._CLASS_LOO.clear()
    assert image_loo.stored(pair.candidate.card, "AP", "all", "night") is None
    events = AuditEvent.objects.filter(kind=AuditEvent.Kind.CONTENT_MISMATCH)
    assert [e.subject for e in events] == [f"leave-one-out:{row.pk}"]
    after = image_list.image_rows(pair, listing)["contribution"]
    assert np.array_equal(before, after, equal_nan=True)


def test_the_list_names_the_rules_numbers_and_the_kind_of_error_that_grew(client, users, story):
    """Opened from the failing rule, the list states both versions' AP of the rule's
    class on its tag's images — the engine's ``headline`` of each stored records file
    with the tag's images weighted 1 (the rule's own computation) — their change, and
    the class's kinds of error with the one that grew most (``tide.error_breakdown``
    of each records file): missed pedestrians. Links go to both records downloads."""
    from evaluation import engine
    from evaluation.engine import tide

    client.force_login(users["engineer"])
    version, split = story["1.5"], story["split"]
    url = f"/versions/{version.pk}/images/?split={split.pk}&class=pedestrian&tag=night&against={story['1.4'].pk}"
    response = client.get(url)
    table, kinds = response.context["table"], response.context["kinds"]
    pair = cause.pair_for(users["engineer"], version.pk, split.pk)
    k = pair.truth.classes.index("pedestrian")
    mask = pair.truth.tag_mask("night")
    expected = {
        name: engine.headline(side.records, "coco", weights=mask)[1][k]
        for name, side in (("candidate", pair.candidate), ("reference", pair.reference))
    }
    assert table["ap"] == pytest.approx(expected, abs=1e-12)
    assert table["change"] == pytest.approx(expected["candidate"] - expected["reference"])
    body = client.get(url.replace("/versions/", "/api/v1/versions/")).json()
    assert body["ap"] == pytest.approx(expected, abs=1e-12)
    assert body["change"] == pytest.approx(table["change"])
    mine = tide.error_breakdown(pair.candidate.records, engine.get_protocol("coco"))
    theirs = tide.error_breakdown(pair.reference.records, engine.get_protocol("coco"))
    for row in kinds["rows"]:
        ours = mine["per_class"]["pedestrian"]["delta"][row["type"]]
        other = theirs["per_class"]["pedestrian"]["delta"][row["type"]]
        assert row["candidate"] == ours and row["change"] == pytest.approx(ours - other)
    assert kinds["grew"] == "missed"
    html = response.content.decode()
    assert 'id="list-kinds"' in html and "grew most against 1.4: <strong>missed</strong>" in html
    for side in (pair.candidate, pair.reference):
        assert reverse("records-download", args=[side.evaluation.pk, "csv"]) in html


def test_the_drilldowns_boxes_carry_the_downloads_box_ids(client, users, story):
    """Each drawn box names its annotation id, the ``box_id`` of its row in the records
    download, where the outcome and the matching detection's score are the page's."""
    import csv
    import io

    client.force_login(users["engineer"])
    pair = cause.pair_for(users["engineer"], story["1.5"].pk, story["split"].pk)
    image = int(pair.candidate.records.gt_image[0])
    drill = cause.image_drilldown(pair, image)
    body = b"".join(
        client.get(
            reverse("records-download", args=[pair.candidate.evaluation.pk, "csv"])
        ).streaming_content
    ).decode()
    rows = list(csv.DictReader(io.StringIO(body)))
    image_id = str(pair.truth.image_ids[image])
    boxes = {r["box_id"]: r for r in rows if r["row"] == "box" and r["image_id"] == image_id}
    scores = {r["detection"]: float(r["score"]) for r in rows if r["row"] == "detection"}
    assert sorted(boxes) == sorted(b["id"] for b in drill["truth"])
    for box in drill["truth"]:
        row = boxes[box["id"]]
        assert row["reason"] == box["reason"]["candidate"]
        near = box["near"]["candidate"]
        assert (near is None) == (row["detection"] == "")
        if near is not None:
            assert near["score"] == pytest.approx(scores[row["detection"]], abs=1e-4)
        if row["outcome"] == "matched":
            assert box["found"]["candidate"] == pytest.approx(scores[row["detection"]], abs=1e-4)
