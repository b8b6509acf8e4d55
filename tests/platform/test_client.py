"""The pipeline client end to end: a live server, a real worker, every exit code.

The client runs as a separate process from a copy of releases/client/ alone, with
Django made unimportable, as on a build machine that has only Python.
"""

import http.server
import json
import os
import shutil
import subprocess
import sys
import threading

import pytest

from evaluation import services as evaluation_services
from releases import tokens

from .conftest import detections_for, upload
from .test_worker import worker  # noqa: F401

pytestmark = [pytest.mark.integration, pytest.mark.django_db(transaction=True)]
ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
NO_DJANGO = (
    "import os, runpy, sys; sys.path.insert(0, os.getcwd()); sys.modules['django'] = None; "
    "sys.argv[0] = 'client'; "
    "runpy.run_module('releases.client', run_name='__main__', alter_sys=True)"
)


@pytest.fixture
def client_home(tmp_path):
    home = tmp_path / "client-only"
    shutil.copytree(os.path.join(ROOT, "releases", "client"), home / "releases" / "client")
    (home / "releases" / "__init__.py").write_text("")
    return home


@pytest.fixture
def run(client_home, tmp_path):
    def run(*args, timeout=240):
        done = subprocess.run(
            [sys.executable, "-I", "-c", NO_DJANGO, *map(str, args)],
            cwd=client_home,
            capture_output=True,
            text=True,
            timeout=timeout,
        )
        return done.returncode, done.stdout, done.stderr

    return run


def _write(path, content):
    path.write_text(json.dumps(content))
    return path


@pytest.mark.usefixtures("worker")
def test_a_pipeline_gates_on_the_verdict(
    live_server,
    detector,
    split_truth,
    users,
    run,
    tmp_path,
):
    evaluation_services.load_split(
        name="bay-night", revision=1, truth=upload("bay-night.json", split_truth)
    )
    _, token = tokens.create_token(users["engineer"], "pipeline")
    _, lead_token = tokens.create_token(users["lead"], "lead")
    connect = ["--url", live_server.url, "--token", token]
    good = _write(tmp_path / "good.json", detections_for(split_truth))

    def submit(version, *splits):
        """``submit --wait`` of Forward camera ``version``; ``splits`` are the split args."""
        detector_args = ["--detector", "Forward camera", "--version", version]
        return run("submit", *connect, *detector_args, *splits, "--wait", "--poll", "0.3")

    # 0: no criteria yet, nothing can regress; said so.
    code, out, err = submit("1.0", "--split", "bay-night", "--predictions", good)
    assert code == 0, out + err
    assert (
        "1.0: pass (no release criteria set)" in out and "AP50" in out and "bay-night rev 1" in out
    )
    assert f"scorecard: {live_server.url}/versions/" in out
    # how each protocol's numbers were computed (the stored record, red team audit15 F5)
    assert "bay-night rev 1: coco v" in out and "bay-night rev 1: voc v" in out
    assert ", boxes keep, engine " in out
    assert "[##############################] 100%" in err  # the progress bar, in a log

    # The lead approves 1.0 and sets criteria, with the same client's server.
    from rest_framework.test import APIClient

    lead = APIClient()
    lead.credentials(HTTP_AUTHORIZATION=f"Bearer {lead_token}")
    version_id = lead.get("/api/v1/versions/", {"label": "1.0"}).json()["results"][0]["id"]
    assert (
        lead.post(
            f"/api/v1/versions/{version_id}/sign-off/",
            {"decision": "approved", "comment": "first"},
            format="json",
        ).status_code
        == 201
    )
    rules = [{"metric": "AP", "class": "mean", "split": "*", "kind": "max_drop", "tolerance": 0.5}]
    assert (
        lead.post(
            f"/api/v1/detectors/{detector.pk}/criteria/", {"rules": rules}, format="json"
        ).status_code
        == 201
    )

    # 3: a version that lost every detection of one class regresses.
    lost = split_truth["categories"][0]["id"]
    worse = [d for d in detections_for(split_truth) if d["category_id"] != lost]
    code, out, err = submit(
        "1.1", "--split", f"bay-night@1={_write(tmp_path / 'worse.json', worse)}"
    )
    assert code == 3, out + err
    assert "1.1: regression (blocked)" in out and "fail" in out
    assert "do not replace" in out  # the caution beside a release verdict

    # 0 again: the same predictions as the baseline, under a new label, pass.
    # name:revision, as the criteria write it
    code, out, err = submit("1.2", "--split", "bay-night:1", "--predictions", good)
    assert code == 0, out + err
    assert "1.2: pass (candidate)" in out

    # 2: predictions the server refuses at upload (small enough to check inside the
    # request); the message names file, record and field.
    bad = detections_for(split_truth)
    bad[4]["bbox"] = bad[4]["bbox"][:3]
    code, out, err = submit(
        "1.3", "--split", "bay-night", "--predictions", _write(tmp_path / "bad.json", bad)
    )
    assert code == 2, out + err
    assert "bad.json: record 4: field 'bbox': must be 4 numbers [x, y, w, h]" in err

    # status, compare and report read the same server.
    code, out, _ = run("status", *connect, "--detector", "Forward camera", "1.1")
    assert code == 3 and "regression" in out
    code, out, _ = run("compare", *connect, "--detector", "Forward camera", "1.0", "1.1")
    assert code == 0 and "mean" in out and "1.0" in out and "delta" in out
    code, out, _ = run("report", *connect, "--detector", "Forward camera", "1.1")
    report = json.loads(out)
    assert code == 0 and report["version"] == "1.1" and report["outcomes"][0]["status"] == "fail"
    target = tmp_path / "report.html"
    code, out, _ = run(
        "report",
        *connect,
        "--detector",
        "Forward camera",
        "1.0",
        "--format",
        "html",
        "--output",
        target,
    )
    assert code == 0 and "Evidence report" in target.read_text()

    # 2: bad input caught by the server, with its message.
    code, _, err = run(
        "submit",
        *connect,
        "--detector",
        "Forward camera",
        "--version",
        "1.4",
        "--split",
        "no-such-split",
        "--predictions",
        good,
    )
    assert code == 2 and "no benchmark split 'no-such-split'" in err
    code, _, err = run(
        "status",
        "--url",
        live_server.url,
        "--token",
        "bbk_wrong",
        "--detector",
        "Forward camera",
        "1.0",
    )
    assert code == 2 and "HTTP 401: Authorization header: unknown or revoked token" in err
    reviewer_token = tokens.create_token(users["reviewer"], "r")[1]
    code, _, err = run(
        "submit",
        "--url",
        live_server.url,
        "--token",
        reviewer_token,
        "--detector",
        "Forward camera",
        "--version",
        "1.4",
        "--split",
        "bay-night",
        "--predictions",
        good,
    )
    assert code == 2 and "HTTP 403" in err and "only engineers and leads" in err


def test_usage_errors_are_bad_input(run, tmp_path):
    code, _, err = run("submit", "--url", "http://127.0.0.1:9", "--token", "t")
    assert code == 2 and "required" in err
    code, _, err = run(
        "submit",
        "--url",
        "http://127.0.0.1:9",
        "--token",
        "t",
        "--detector",
        "d",
        "--version",
        "1",
        "--split",
        "a",
        "--split",
        "b",
        "--predictions",
        tmp_path,
    )
    assert code == 2 and "give one --predictions per --split" in err
    code, _, err = run("status", "--detector", "d", "1")
    assert code == 2 and "--url and --token" in err


def test_unreachable_servers_and_server_errors_are_failures(run, tmp_path):
    # Nothing listens on the discard port: after its retries the client gives up with 1.
    code, _, err = run(
        "status",
        "--url",
        "http://127.0.0.1:9",
        "--token",
        "t",
        "--detector",
        "d",
        "1",
        "--timeout",
        "2",
        "--retries",
        "1",
    )
    assert code == 1 and "cannot reach" in err

    class Broken(http.server.BaseHTTPRequestHandler):
        def do_GET(self):
            self.send_response(503)
            self.send_header("Content-Type", "application/json")
            self.end_headers()
            self.wfile.write(b'{"status": 503, "message": "down for maintenance", "errors": []}')

        def log_message(self, *args):
            pass

    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Broken)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    try:
        code, _, err = run(
            "status",
            "--url",
            f"http://127.0.0.1:{server.server_port}",
            "--token",
            "t",
            "--detector",
            "d",
            "1",
            "--retries",
            "1",
        )
    finally:
        server.shutdown()
    assert code == 1 and "HTTP 503: down for maintenance" in err


def test_waiting_past_the_timeout_is_a_failure(
    live_server, detector, split_truth, users, run, tmp_path, monkeypatch, flushable
):
    """No worker takes the evaluations: the client hints at it, then gives up with 1."""
    from evaluation import tasks

    monkeypatch.setattr(tasks.score, "delay", lambda *args: None)  # queued, never scored
    evaluation_services.load_split(
        name="bay-night", revision=1, truth=upload("bay-night.json", split_truth)
    )
    _, token = tokens.create_token(users["engineer"], "pipeline")
    code, _, err = run(
        "submit", "--url", live_server.url, "--token", token, "--detector", "Forward camera",
        "--version", "1.0", "--split", "bay-night",
        "--predictions", _write(tmp_path / "p.json", detections_for(split_truth)),
        "--wait", "--wait-timeout", "2", "--poll", "0.2",
    )  # fmt: skip
    assert code == 1, err
    assert "note: still queued after 1 s: no worker has started on them" in err
    assert "--wait-timeout: still scoring after 2 s" in err


@pytest.mark.usefixtures("worker")
def test_a_partial_upload_exits_3_naming_the_missing_split(
    live_server, detector, split_truth, users, run, tmp_path, settings
):
    """The suite requires bay-night and bay-day; uploaded on bay-night only the verdict
    is incomplete and the client exits 3 naming bay-day; once bay-day is uploaded too
    (no criteria set) it passes with 0. An upload whose evaluation fails in the worker
    (a file above the inline-check limit) exits 2 (issue 10)."""
    settings.BENCHBOOK_INLINE_VALIDATION_BYTES = 0  # every file is checked by the worker
    from releases import suites

    from .conftest import split_dict

    evaluation_services.load_split(
        name="bay-night", revision=1, truth=upload("bay-night.json", split_truth)
    )
    day = split_dict(seed=9)
    evaluation_services.load_split(name="bay-day", revision=1, truth=upload("d.json", day))
    suites.set_suite(detector, users["lead"], {"splits": ["bay-night", "bay-day"]})
    _, token = tokens.create_token(users["engineer"], "pipeline")
    connect = ["--url", live_server.url, "--token", token, "--detector", "Forward camera"]
    night = _write(tmp_path / "night.json", detections_for(split_truth))

    code, out, err = run(
        "submit", *connect, "--version", "2.0", "--split", f"bay-night={night}", "--wait",
        "--poll", "0.3",
    )  # fmt: skip
    assert code == 3, out + err
    assert "2.0: incomplete" in out and "no predictions on bay-day rev 1" in out
    code, out, _ = run("status", *connect, "2.0")
    assert code == 3 and "missing: no scored predictions on bay-day rev 1" in out

    bad = detections_for(day)
    bad[1]["bbox"] = bad[1]["bbox"][:3]
    code, out, err = run(
        "submit", *connect, "--version", "2.1", "--split", f"bay-night={night}",
        "--split", f"bay-day={_write(tmp_path / 'bad-day.json', bad)}", "--wait", "--poll", "0.3",
    )  # fmt: skip
    assert code == 2, out + err
    assert "bad-day.json: record 1: field 'bbox'" in out and "2.1: incomplete" in out

    code, out, err = run(
        "submit", *connect, "--version", "2.0",
        "--split", f"bay-day={_write(tmp_path / 'day.json', detections_for(day))}", "--wait",
        "--poll", "0.3",
    )  # fmt: skip
    assert code == 0, out + err
    assert "2.0: pass (no release criteria set)" in out


@pytest.mark.usefixtures("worker")
def test_rescore_on_a_new_revision_from_the_pipeline(
    live_server, detector, split_truth, users, run, tmp_path
):
    """``rescore`` re-scores every version's stored file on the relabelled split through
    the API's one service (leads only): the real worker scores them, ``--wait`` prints
    the detections dropped for the removed image (counted from the file: pycocotools'
    loadRes would refuse them, so the count is the file's detections on that image);
    again, every version is skipped with the reason; an engineer's token is refused
    (exit 2) and nothing is stored."""
    from evaluation.models import Evaluation

    from .test_rescore import _revision

    evaluation_services.load_split(
        name="bay-night", revision=1, truth=upload("bay-night.json", split_truth)
    )
    _, engineer = tokens.create_token(users["engineer"], "pipeline")
    _, lead = tokens.create_token(users["lead"], "lead")
    detections = detections_for(split_truth)
    code, out, err = run(
        "submit", "--url", live_server.url, "--token", engineer, "--detector", "Forward camera",
        "--version", "1.0", "--split", f"bay-night={_write(tmp_path / 'p.json', detections)}",
        "--wait", "--poll", "0.3",
    )  # fmt: skip
    assert code == 0, out + err
    removed = split_truth["images"][0]["id"]
    evaluation_services.load_split(
        name="bay-night", revision=2, truth=upload("r2.json", _revision(split_truth, removed))
    )
    on_removed = sum(d["image_id"] == removed for d in detections)
    assert on_removed > 0
    rescore = ["rescore", "--url", live_server.url, "--detector", "Forward camera"]
    rescore += ["--split", "bay-night@2"]

    before = Evaluation.objects.count()
    code, out, err = run(*rescore, "--token", engineer)
    assert code == 2 and "only leads" in err, out + err
    assert Evaluation.objects.count() == before

    code, out, err = run(*rescore, "--token", lead, "--wait", "--poll", "0.3")
    assert code == 0, out + err
    assert "Forward camera on bay-night rev 2: 1 re-scored, 0 skipped" in out
    assert "bay-night rev 1" in out  # where the stored file came from
    rows = [line.split() for line in out.splitlines() if line.split()[:1] == ["1.0"]]
    scored = [row for row in rows if row[1] != "rescored"]  # one per suite protocol
    assert scored and all(row[2:4] == ["done", str(on_removed)] for row in scored), out

    code, out, err = run(*rescore, "--token", lead, "--version", "1.0")
    assert code == 0, out + err
    assert "0 re-scored, 1 skipped" in out and "already re-scored on" in out


@pytest.mark.usefixtures("worker")
def test_the_client_gets_the_reference_default_and_the_strict_option(
    live_server, detector, split_truth, users, run, tmp_path
):
    """Predictions naming a class the split does not list: under the default the
    client's submit passes and prints what was left out (as pycocotools 2.0.11, whose
    ``evaluate`` never looks at such detections); once the lead picks the strict option
    the same file is refused at upload, exit 2, naming file, record and field."""
    from .conftest import set_suite_policy

    evaluation_services.load_split(
        name="bay-night", revision=1, truth=upload("bay-night.json", split_truth)
    )
    _, token = tokens.create_token(users["engineer"], "pipeline")
    connect = ["--url", live_server.url, "--token", token, "--detector", "Forward camera"]
    ok = detections_for(split_truth)
    odd = _write(tmp_path / "odd.json", ok + [{**ok[0], "category_id": 7}])
    code, out, err = run(
        "submit", *connect, "--version", "3.0", "--split", f"bay-night={odd}", "--wait",
        "--poll", "0.3",
    )  # fmt: skip
    assert code == 0, out + err
    assert (
        "bay-night rev 1: 1 detection of classes the split does not list was left out: ids 7" in out
    )
    set_suite_policy(detector, users["lead"], unknown_classes="reject")
    code, out, err = run(
        "submit", *connect, "--version", "3.1", "--split", f"bay-night={odd}", "--wait",
        "--poll", "0.3",
    )  # fmt: skip
    assert code == 2, out + err
    assert f"odd.json: record {len(ok)}: field 'category_id': class 7 is not one of" in out + err
