"""``python -m releases.client``: submit predictions and gate a pipeline on the verdict.

    python -m releases.client submit --url URL --token TOKEN --detector NAME \\
        --version LABEL --split NAME --predictions FILE [--split ... --predictions ...] --wait
    python -m releases.client status  --detector NAME VERSION [--wait]
    python -m releases.client compare --detector NAME VERSION_A VERSION_B
    python -m releases.client report  --detector NAME VERSION --format json|html
    python -m releases.client rescore --detector NAME --split NAME@REVISION
                                      [--version LABEL ...] [--wait]

``--url`` and ``--token`` default to $BENCHBOOK_URL and $BENCHBOOK_TOKEN. A split is
``name`` (its newest revision), ``name@revision`` or ``name:revision``;
``--split name=FILE`` pairs a split with its file in one argument.
"""

import argparse
import os
import sys
import time

from . import BAD_INPUT, FAILURE, OK, REGRESSION, render
from .http import Api, ClientError

QUEUED_HINT_SECONDS = 60
FINAL = ("incomplete", "regression", "pass")


def exit_of(verdict):
    """0 only for pass; 2 when an evaluation failed on the uploaded file (bad input);
    3 for any other incomplete verdict (a required split missing) and for a regression."""
    if verdict["state"] == "pass":
        return OK
    if any(e["state"] == "failed" for e in verdict["evaluations"]):
        return BAD_INPUT
    if verdict["state"] in ("incomplete", "regression"):
        return REGRESSION
    return FAILURE


def _connection_options():
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--url", default=os.environ.get("BENCHBOOK_URL"), help="server address")
    common.add_argument("--token", default=os.environ.get("BENCHBOOK_TOKEN"), help="API token")
    common.add_argument("--timeout", type=float, default=60, help="seconds per request")
    common.add_argument(
        "--retries", type=int, default=3, help="retries of a request that could not get through"
    )
    return common


def _parser():
    common = _connection_options()
    parser = argparse.ArgumentParser(
        prog="python -m releases.client",
        description=__doc__,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    commands = parser.add_subparsers(dest="command", required=True)

    submit = commands.add_parser("submit", parents=[common], help="upload predictions")
    submit.add_argument("--detector", required=True)
    submit.add_argument("--version", required=True, help="version label, created if new")
    submit.add_argument("--split", action="append", required=True, dest="splits")
    submit.add_argument("--predictions", action="append", default=[], help="one per --split")
    submit.add_argument("--source-commit", default="")
    submit.add_argument("--notes", default="")
    _wait_options(submit)

    status = commands.add_parser("status", parents=[common], help="scoring state and verdict")
    status.add_argument("--detector", required=True)
    status.add_argument("version")
    _wait_options(status)

    compare = commands.add_parser("compare", parents=[common], help="per-class AP deltas")
    compare.add_argument("--detector", required=True)
    compare.add_argument("version_a", help="reference, e.g. the baseline")
    compare.add_argument("version_b", help="candidate")

    report = commands.add_parser("report", parents=[common], help="the evidence report")
    report.add_argument("--detector", required=True)
    report.add_argument("version")
    report.add_argument("--format", choices=["json", "html"], default="json")
    report.add_argument("--output", help="write to this file instead of stdout")

    rescore = commands.add_parser(
        "rescore", parents=[common], help="re-score stored predictions on a new split revision"
    )
    rescore.add_argument("--detector", required=True)
    rescore.add_argument("--split", required=True, help="the revision to score on")
    rescore.add_argument(
        "--version", action="append", dest="versions", help="version label (default: all)"
    )
    _wait_options(rescore)
    return parser


def _wait_options(parser):
    parser.add_argument("--wait", action="store_true", help="wait for scoring and judging")
    parser.add_argument("--wait-timeout", type=float, default=3600, help="seconds (default 1 h)")
    parser.add_argument("--poll", type=float, default=2.0, help="seconds between checks")


# Lookups ---------------------------------------------------------------------------


def find_detector(api, name):
    found = api.get_all("detectors/", name=name)
    if not found:
        raise ClientError(
            f"--detector: no detector named {name!r} that this token can see", BAD_INPUT
        )
    if len(found) > 1:
        teams = ", ".join(d["team"] for d in found)
        raise ClientError(f"--detector: {name!r} is ambiguous (teams {teams})", BAD_INPUT)
    return found[0]


def find_split(api, spec):
    # name@revision, or name:revision as the release criteria write it
    name, _, revision = spec.replace(":", "@", 1).partition("@")
    found = api.get_all("splits/", name=name)
    if revision:
        found = [s for s in found if str(s["revision"]) == revision]
    if not found:
        raise ClientError(f"--split: no benchmark split {spec!r}", BAD_INPUT)
    return max(found, key=lambda s: s["revision"])


def find_version(api, detector, label):
    found = api.get_all("versions/", detector=detector["id"], label=label)
    if not found:
        raise ClientError(f"no version {label!r} of {detector['name']}", BAD_INPUT)
    return found[0]


def _pairs(args):
    """(split spec, file) pairs from ``--split a --predictions f`` or ``--split a=f``."""
    explicit = [s.partition("=") for s in args.splits]
    if all(sep for _, sep, _ in explicit) and not args.predictions:
        pairs = [(name, path) for name, _, path in explicit]
    elif len(args.splits) == len(args.predictions):
        pairs = list(zip(args.splits, args.predictions))
    else:
        raise ClientError(
            f"--predictions: {len(args.predictions)} file(s) for {len(args.splits)} split(s); "
            "give one --predictions per --split, in the same order (predictions are per split)",
            BAD_INPUT,
        )
    for _, path in pairs:
        if not os.path.isfile(path):
            raise ClientError(f"--predictions: {path}: no such file", BAD_INPUT)
    return pairs


# Commands --------------------------------------------------------------------------


def submit(api, args, out):
    pairs = _pairs(args)
    detector = find_detector(api, args.detector)
    targets = [(find_split(api, spec), path) for spec, path in pairs]
    progress = render.Progress()
    version_id = None
    for split, path in targets:
        label = f"uploading {os.path.basename(path)} for {split['name']} rev {split['revision']}"
        stored = api.upload(
            "prediction-sets/",
            {
                "detector": detector["id"],
                "version": args.version,
                "split": split["id"],
                "source_commit": args.source_commit,
                "notes": args.notes,
            },
            "predictions",
            path,
            on_progress=lambda sent, total, label=label: progress.show(sent / max(total, 1), label),
        )
        progress.done()
        version_id = stored["version"]
        out.write(
            f"stored {stored['file_name']} on {stored['split_name']} "
            f"(sha256 {stored['sha256'][:16]}…) as prediction set {stored['id']}\n"
        )
    if not args.wait:
        out.write(
            f"{detector['name']} {args.version}: scoring queued; "
            f"{api.site}/versions/{version_id}/\n"
        )
        return OK
    return _wait_and_report(api, version_id, args, out)


def _wait_and_report(api, version_id, args, out):
    progress = render.Progress()
    started = time.monotonic()
    deadline = started + args.wait_timeout
    warned = False
    while True:
        verdict = api.get(f"versions/{version_id}/verdict/")
        evaluations = verdict["evaluations"]
        if verdict["state"] in FINAL:
            break
        done = sum(e["state"] in ("done", "failed") for e in evaluations)
        share = sum(100 if e["state"] in ("done", "failed") else e["progress"] for e in evaluations)
        text = f"{done}/{len(evaluations)} evaluations finished"
        if verdict["state"] == "judging":
            text = "judging against the release criteria"
        progress.show(share / (100 * max(len(evaluations), 1)), text)
        queued = evaluations and all(e["state"] == "queued" for e in evaluations)
        hint_after = min(QUEUED_HINT_SECONDS, args.wait_timeout / 2)
        if queued and not warned and time.monotonic() - started > hint_after:
            warned = True
            sys.stderr.write(
                f"\nnote: still queued after {hint_after:.0f} s: "
                "no worker has started on them (is one running?)\n"
            )
        _wait_or_give_up(deadline, progress, args, f"still {verdict['state']}")
    progress.show(1.0, "scored and judged")
    progress.done()
    return _print_verdict(api, version_id, verdict, out)


def _wait_or_give_up(deadline, progress, args, what):
    """Sleep one poll interval, or raise the ``--wait-timeout`` failure past the deadline
    (``what``: where things stand, e.g. "still scoring")."""
    if time.monotonic() > deadline:
        progress.done()
        raise ClientError(f"--wait-timeout: {what} after {args.wait_timeout:.0f} s", FAILURE)
    time.sleep(args.poll)


def _print_verdict(api, version_id, verdict, out):
    version = api.get(f"versions/{version_id}/")
    failed = [e for e in verdict["evaluations"] if e["state"] == "failed"]
    for e in failed:
        out.write(
            f"evaluation {e['id']} ({e['protocol']} on {e['split_name']}) failed: {e['error']}\n"
        )
    results = api.get(f"versions/{version_id}/results/")
    if results["splits"]:
        out.write("\n" + render.summary_table(results) + "\n")
        for line in render.provenance_lines(results):  # how the numbers were computed
            out.write(line + "\n")
        for entry in results["splits"]:  # what the reference reading left out
            for line in entry.get("left_out", []):
                out.write(f"{entry['split_name']}: {line}\n")
    judgement = verdict["judgement"]
    if judgement:
        outcomes = api.get_all("outcomes/", version=version_id, judgement=judgement["id"])
        if outcomes:
            out.write("\n" + render.outcomes_table(outcomes) + "\n")
    for name in verdict["missing"]:
        out.write(f"missing: no scored predictions on {name} (required by the suite)\n")
    state = verdict["state"]
    shown = state
    if state == "pass" and verdict["no_criteria"]:
        shown = "pass (no release criteria set)"
    out.write(f"\n{version['label']}: {shown} ({version['state']})\n")
    for reason in verdict["reasons"]:
        out.write(f"  - {reason}\n")
    out.write(f"scorecard: {api.site}/versions/{version_id}/\n")
    if state in FINAL:
        out.write(f"Note: {render.CAUTION}\n")
    return exit_of(verdict)


def status(api, args, out):
    detector = find_detector(api, args.detector)
    version = find_version(api, detector, args.version)
    if args.wait:
        return _wait_and_report(api, version["id"], args, out)
    verdict = api.get(f"versions/{version['id']}/verdict/")
    rows = [
        [e["split_name"], e["protocol"], e["state"], f"{e['progress']}%", e["error"][:60]]
        for e in verdict["evaluations"]
    ]
    if rows:
        out.write(render.table(["split", "protocol", "state", "progress", "error"], rows) + "\n")
    if verdict["state"] not in FINAL:
        out.write(
            f"{version['label']}: {verdict['state']} ({version['state']}); "
            "no verdict yet (--wait waits for it)\n"
        )
        return FAILURE
    return _print_verdict(api, version["id"], verdict, out)


def compare(api, args, out):
    detector = find_detector(api, args.detector)
    reference = find_version(api, detector, args.version_a)
    candidate = find_version(api, detector, args.version_b)
    comparison = api.get("comparisons/", reference=reference["id"], candidate=candidate["id"])
    out.write(render.compare_table(comparison) + "\n")
    return OK


def report(api, args, out):
    detector = find_detector(api, args.detector)
    version = find_version(api, detector, args.version)
    text = api.get_text(f"versions/{version['id']}/evidence/", format=args.format)
    if args.output:
        with open(args.output, "w", encoding="utf-8") as f:
            f.write(text)
        out.write(f"evidence report of {detector['name']} {version['label']} → {args.output}\n")
    else:
        out.write(text if text.endswith("\n") else text + "\n")
    return OK


def rescore(api, args, out):
    """Leads only (the server refuses others). Idempotent: a version already on the
    revision is skipped with the reason. ``--wait`` waits for the new evaluations and
    prints how many detections each dropped (images the revision no longer holds)."""
    detector = find_detector(api, args.detector)
    split = find_split(api, args.split)
    payload = {"split": split["id"]}
    if args.versions:
        payload["versions"] = [find_version(api, detector, label)["id"] for label in args.versions]
    result = api.post_json(f"detectors/{detector['id']}/rescore/", payload)
    rows = [
        [v["label"], v["status"], v["from_split"] or "", v["reason"] or ""]
        for v in result["versions"]
    ]
    if rows:
        out.write(render.table(["version", "status", "from", "reason"], rows) + "\n")
    target = f"{split['name']} rev {split['revision']}"
    out.write(
        f"{detector['name']} on {target}: {result['rescored']} re-scored, "
        f"{result['skipped']} skipped\n"
    )
    sets = {v["prediction_set"] for v in result["versions"] if v["status"] == "rescored"}
    if not args.wait or not sets:
        return OK
    return _wait_for_rescore(api, detector, sets, args, out)


def _wait_for_rescore(api, detector, sets, args, out):
    """Poll the detector's re-scored sets until each evaluation of ``sets`` finished."""
    deadline = time.monotonic() + args.wait_timeout
    progress = render.Progress()
    while True:
        listed = api.get(f"detectors/{detector['id']}/rescore/")["rescored"]
        mine = [row for row in listed if row["prediction_set"] in sets]
        evaluations = [e for row in mine for e in row["evaluations"]]
        done = sum(e["state"] in ("done", "failed") for e in evaluations)
        if evaluations and done == len(evaluations):
            break
        progress.show(done / max(len(evaluations), 1), f"{done}/{len(evaluations)} scored")
        _wait_or_give_up(deadline, progress, args, f"{done}/{len(evaluations)} scored")
    progress.show(1.0, "scored")
    progress.done()
    rows = [
        [row["version"]["label"], e["protocol"], e["state"], _dropped(e), e["error"][:60]]
        for row in mine
        for e in row["evaluations"]
    ]
    out.write(render.table(["version", "protocol", "state", "dropped", "error"], rows) + "\n")
    return BAD_INPUT if any(e["state"] == "failed" for e in evaluations) else OK


def _dropped(evaluation):
    return "" if evaluation["dropped"] is None else str(evaluation["dropped"])


COMMANDS = {
    "submit": submit,
    "status": status,
    "compare": compare,
    "report": report,
    "rescore": rescore,
}


def main(argv=None, out=None):
    out = out or sys.stdout
    parser = _parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as e:  # argparse: 2 for a usage error, as for any bad input
        return BAD_INPUT if e.code else OK
    try:
        if not args.url or not args.token:
            raise ClientError(
                "--url and --token (or BENCHBOOK_URL, BENCHBOOK_TOKEN) are needed", BAD_INPUT
            )
        api = Api(args.url, args.token, timeout=args.timeout, retries=args.retries)
        return COMMANDS[args.command](api, args, out)
    except ClientError as e:
        print(f"error: {e}", file=sys.stderr)
        return e.exit_code
    except KeyboardInterrupt:
        return FAILURE
    except Exception as e:  # a server answering nonsense is a failure, not a crash
        print(f"error: {type(e).__name__}: {e}", file=sys.stderr)
        return FAILURE


if __name__ == "__main__":
    sys.exit(main())
