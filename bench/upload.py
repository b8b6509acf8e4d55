"""Benchmark: memory of an upload through the pipeline client, against reading it whole.

    python bench/upload.py [--sizes 20 200]   (megabytes)

Starts a throw-away server (its own BENCHBOOK_VAR, SQLite, no worker: the upload is
stored and left queued), then for each size uploads a predictions file with
``python -m releases.client submit`` and reads the peak resident memory (VmHWM) of
the client and of the server process. Side by side, the reference: a process that
reads the file whole, as a naive client would (``f.read()``). A streamed upload's
growth stays flat as the file grows; the reference's grows with it. Fails (exit 1) if
the client's or the server's growth exceeds a quarter of the largest file.
"""

import argparse
import json
import os
import pathlib
import secrets
import socket
import subprocess
import sys
import tempfile
import time

ROOT = pathlib.Path(__file__).resolve().parent.parent
MB = 1024 * 1024


def peak_kb(pid):
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1])
    raise RuntimeError("no VmHWM")


def run_measured(args, env):
    """Run a command, polling its peak memory until it exits: (exit code, peak MB)."""
    process = subprocess.Popen(args, env=env, cwd=ROOT, stdout=subprocess.PIPE, text=True)
    peak = 0
    while process.poll() is None:
        try:
            peak = max(peak, peak_kb(process.pid))
        except (FileNotFoundError, ProcessLookupError, RuntimeError):
            pass
        time.sleep(0.01)
    output = process.stdout.read()
    return process.returncode, peak / 1024, output


def write_predictions(path, megabytes):
    """A syntactically valid detections list of about ``megabytes`` (never scored)."""
    record = json.dumps({"image_id": 1, "category_id": 1, "bbox": [1, 2, 3, 4], "score": 0.5})
    count = megabytes * MB // (len(record) + 2)
    with open(path, "w") as f:
        f.write("[")
        f.write(",\n".join([record] * count))
        f.write("]")
    return os.path.getsize(path)


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[20, 200])
    args = parser.parse_args()

    work = pathlib.Path(tempfile.mkdtemp(prefix="benchbook-upload-"))
    env = {k: v for k, v in os.environ.items() if k not in ("DATABASE_URL", "CELERY_BROKER_URL")}
    env.update(
        BENCHBOOK_VAR=str(work),
        DJANGO_SETTINGS_MODULE="benchbook.settings",
        BENCHBOOK_MAX_UPLOAD_BYTES=str(4 * max(args.sizes) * MB),
    )
    env.setdefault("SECRET_KEY", secrets.token_urlsafe(32))  # a throw-away server
    python = sys.executable
    subprocess.run([python, "manage.py", "migrate", "-v0"], env=env, cwd=ROOT, check=True)
    setup = """
from releases import services, tokens
from evaluation import services as ev
from django.contrib.auth import get_user_model
from django.core.files.base import ContentFile
import json
u = get_user_model().objects.create_user("bench")
team = services.create_team("Bench", [(u, "engineer")])
services.create_detector(team, "Bench camera", ["car"])
truth = {"images": [{"id": 1, "width": 100, "height": 100}],
         "annotations": [{"id": 1, "image_id": 1, "category_id": 1, "bbox": [1, 2, 3, 4],
                          "area": 12, "iscrowd": 0}],
         "categories": [{"id": 1, "name": "car"}]}
ev.load_split(name="bench", revision=1,
              truth=ContentFile(json.dumps(truth).encode(), name="t.json"))
print(tokens.create_token(u, "bench")[1])
"""
    token = subprocess.run(
        [python, "manage.py", "shell", "-v0", "-c", setup],
        env=env,
        cwd=ROOT,
        capture_output=True,
        text=True,
    )
    if token.returncode:
        raise SystemExit(token.stderr)
    token = token.stdout.split()[-1]
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    server = subprocess.Popen(
        [python, "manage.py", "runserver", f"127.0.0.1:{port}", "--noreload", "--nothreading"],
        env=env,
        cwd=ROOT,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    try:
        time.sleep(3)
        print(f"{'file MB':>8} {'client MB':>10} {'server +MB':>11} {'read-whole MB':>14}")
        rows = []
        for size in args.sizes:
            path = work / f"predictions-{size}.json"
            real = write_predictions(path, size) / MB
            server_before = peak_kb(server.pid) / 1024
            code, client_peak, output = run_measured(
                [
                    python,
                    "-m",
                    "releases.client",
                    "submit",
                    "--url",
                    f"http://127.0.0.1:{port}",
                    "--token",
                    token,
                    "--detector",
                    "Bench camera",
                    "--version",
                    f"v{size}",
                    "--split",
                    "bench",
                    "--predictions",
                    str(path),
                ],
                env,
            )
            if code != 0:
                raise SystemExit(f"upload failed ({code}): {output}")
            server_growth = peak_kb(server.pid) / 1024 - server_before
            _, whole_peak, _ = run_measured(
                [python, "-c", f"f = open({str(path)!r}, 'rb'); data = f.read()"], env
            )
            rows.append((real, client_peak, server_growth, whole_peak))
            print(f"{real:8.0f} {client_peak:10.1f} {server_growth:11.1f} {whole_peak:14.1f}")
            path.unlink()
    finally:
        server.terminate()
        server.wait(10)
    (small, client_small, _, whole_small), (big, client_big, server_big, whole_big) = (
        rows[0],
        rows[-1],
    )
    client_growth = client_big - client_small
    reference_growth = whole_big - whole_small
    print(
        f"growth from {small:.0f} to {big:.0f} MB: client {client_growth:+.1f} MB, "
        f"reference (read whole) {reference_growth:+.1f} MB, "
        f"ratio {client_growth / reference_growth:.3f}; server {server_big:+.1f} MB"
    )
    limit = big / 4
    if client_growth > limit or server_big > limit:
        print(f"FAIL: memory grows with the file (limit {limit:.0f} MB)")
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
