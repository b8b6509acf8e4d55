"""Benchmark: one large evaluation scored end to end by one worker, then in image shards.

    nice python bench/sharded.py [--scale 1] [--shard-images 5000] [--runs whole,one,redis2,fs2]
                                 [--upload]

A seeded split of 100,000 images, ~750,000 boxes, 80 classes and 10,000,000 detections
(``--scale 0.1``: a tenth of each) is generated to bench/out/sharded-<scale>/ (not in
the repository). Each run stores the predictions file, requests its ``coco`` evaluation
and waits for the stored result (upload → stored result), with fresh worker processes:

    whole   one worker, sharding off (the one-process path)
    one     one worker, in shards of --shard-images images
    redis2  two workers on the Redis broker, in shards
    fs2     two workers on the embedded filesystem broker (file results), in shards

With ``--upload`` the sharded runs go through the upload check
(``services.received_predictions``, as ``submit_predictions`` does): the file is
streamed into per-shard pieces at upload, stored with it, and the workers read only
those (``evaluation/pieces.py``); the upload's own peak RSS and CPU time are printed.

It prints wall time, the peak RSS (VmHWM) and CPU time of every worker, the ratio to
``whole``,
whether the numbers are identical (SHA-256 of the stored result), the per-shard cost,
the merge step's cost (last shard stored → result stored) and, from those, a table on
paper for N machines. Then the peak RSS of one process that loads one shard's piece and
matches it (a shard's memory, whatever the split's size), of one that reads the
whole predictions file (what the run that splits the file held before pieces were
made at upload), and of one that streams the file into pieces
(``engine.pieces.stream_pieces``, what the upload does). Database: PostgreSQL
(``--database-url``, a throw-away database it drops and creates); Redis at
``--redis-url``. Report the load average printed beside the numbers: the machine may
be shared.
"""

import argparse
import hashlib
import json
import math
import os
import pathlib
import secrets
import shutil
import subprocess
import sys
import tempfile
import time
import uuid

import numpy as np

ROOT = pathlib.Path(__file__).resolve().parent.parent
OUT = ROOT / "bench" / "out"

sys.path.insert(0, str(ROOT))
# The data and the process measures live beside; bench/upload_check.py reads them here too.
from bench.process_watch import Watch, peak_mb  # noqa: E402
from bench.sharded_data import generate  # noqa: E402

# Processes -------------------------------------------------------------------------


def python(args, env, **kwargs):
    return subprocess.run([sys.executable, *args], env=env, cwd=ROOT, check=True, **kwargs)


def database(url):
    """Drop and create the throw-away database named by ``url``."""
    import psycopg

    name = url.rsplit("/", 1)[1]
    admin = url.rsplit("/", 1)[0] + "/postgres"
    with psycopg.connect(admin, autocommit=True) as conn:
        conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
        conn.execute(f'CREATE DATABASE "{name}"')


def run(name, workers, broker, env, shard_images, dt_path, via_upload=False):
    """Start ``workers`` fresh worker processes, drive one evaluation, stop them."""
    queue = f"bench-{uuid.uuid4().hex[:8]}"
    run_env = {**env, "CELERY_BROKER_URL": broker, "BENCHBOOK_QUEUE": queue}
    run_env["BENCHBOOK_SHARD_ABOVE"] = "1e30" if name == "whole" else "0"
    run_env["BENCHBOOK_SHARD_IMAGES"] = str(shard_images)
    run_env.pop("CELERY_RESULT_BACKEND", None)
    shutil.rmtree(pathlib.Path(env["BENCHBOOK_VAR"]) / "engine-cache", ignore_errors=True)  # cold
    args = ["-m", "celery", "-A", "benchbook", "worker", "--pool=solo", "-Q", queue]
    args += ["--without-gossip", "--without-mingle", "--without-heartbeat", "-l", "info"]
    processes = [
        subprocess.Popen(
            [sys.executable, *args],
            env=run_env,
            cwd=ROOT,
            stdout=subprocess.DEVNULL,
            stderr=open(env["BENCHBOOK_VAR"] + f"/{name}-{k}.log", "w"),  # noqa: SIM115
        )
        for k in range(workers)
    ]
    time.sleep(4)  # let the workers connect
    watch = Watch(processes)
    try:
        drive_args = [__file__, "--drive", name, "--predictions", str(dt_path)]
        out = python(
            drive_args + (["--upload"] if via_upload and name != "whole" else []),
            run_env,
            capture_output=True,
            text=True,
        )
    finally:
        peaks = watch.stop()
        for p in processes:
            p.terminate()
        for p in processes:
            p.wait(30)
    result = json.loads(out.stdout.strip().splitlines()[-1])
    result["peaks"], result["cpu"] = peaks, watch.cpu
    for k in range(workers):  # each step's time, CPU and the worker's peak so far
        with open(env["BENCHBOOK_VAR"] + f"/{name}-{k}.log") as f:
            steps = [line.split("evaluation ", 1)[1].strip() for line in f if "peak RSS" in line]
        print(f"  {name} worker {k}: " + "\n  ".join(steps), flush=True)
    return result


def drive(name, predictions_path, via_upload=False):
    """In a process of its own (the web side): store the file (``via_upload``: through
    the upload check, which streams it into pieces), request the evaluation, wait for
    its stored result; print timings, and the upload's peak RSS and CPU time, as
    JSON."""
    import django

    django.setup()
    from evaluation import services
    from evaluation.models import BenchmarkSplit, Evaluation, EvaluationClassGroup, EvaluationShard

    split = BenchmarkSplit.objects.get(name="sharded")
    from django.core.files import File
    from django.db import transaction

    began, cpu_began = time.time(), time.process_time()
    with open(predictions_path, "rb") as f:
        if via_upload:
            with services.received_predictions(File(f, name="predictions.json"), split) as got:
                with transaction.atomic():
                    prediction_file = got.store()
        else:
            prediction_file = services.store_predictions(f)
    upload_cpu, upload_peak = time.process_time() - cpu_began, peak_mb(os.getpid())

    with transaction.atomic():
        (evaluation,) = services.request_evaluations(split, prediction_file, ["coco"], scope=name)
    stored = time.time()
    while True:
        evaluation.refresh_from_db()
        if evaluation.finished:
            break
        time.sleep(0.2)
    ended = time.time()
    if evaluation.state != "done":
        raise SystemExit(f"{name}: {evaluation.state}: {evaluation.error}")
    shards = list(EvaluationShard.objects.filter(evaluation=evaluation).order_by("index"))
    card = Evaluation.objects.get(pk=evaluation.pk).scorecard
    report = {
        "wall": ended - began,
        "upload": stored - began,
        "upload_cpu": upload_cpu,
        "upload_peak": upload_peak,
        "result_sha256": hashlib.sha256(
            json.dumps(card.result, sort_keys=True).encode()
        ).hexdigest(),
        "ap": card.summary["AP"],
        "detections": card.result["counts"]["scored_predictions"],
        "shards": [s.seconds for s in shards],
    }
    if shards:
        started = evaluation.started_at.timestamp()
        first = min(s.finished_at.timestamp() - s.seconds for s in shards)
        last = max(s.finished_at.timestamp() for s in shards)
        report["prepare"] = first - started
        report["merge"] = evaluation.finished_at.timestamp() - last
        groups = list(EvaluationClassGroup.objects.filter(evaluation=evaluation))
        report["groups"] = [g.seconds for g in groups]
        if groups:
            last_group = max(g.finished_at.timestamp() for g in groups)
            report["finish"] = evaluation.finished_at.timestamp() - last_group
    print(json.dumps(report))


def piece_peak(mode, gt_path, dt_path, shard_images, cache):
    """In a process of its own: the peak RSS of matching one shard from its piece
    (``piece``), or of reading the whole predictions file (``whole-read``)."""
    sys.path.insert(0, str(ROOT))
    from evaluation.engine import load_predictions, load_truth, shards

    truth = load_truth(gt_path, cache_dir=cache)
    path = pathlib.Path(cache) / f"piece-{shard_images}.npz"
    if mode == "write-piece":
        predictions = load_predictions(dt_path, truth, cache_dir=cache)
        ranges = shards.plan(truth.n_images, shard_images)
        shards.save_piece(path, *next(shards.pieces(truth, predictions, ranges[:1])))
    elif mode == "whole-read":
        del truth
        truth = load_truth(gt_path)  # from the file, as a worker without the cache entry
        load_predictions(dt_path, truth)
    elif mode == "stream":
        from evaluation.engine.pieces import stream_pieces

        with tempfile.TemporaryDirectory(dir=cache) as work:
            stream_pieces(dt_path, truth, shards.plan(truth.n_images, shard_images), work)
    else:
        del truth
        shards.match_shard(*shards.load_piece(path), "coco")
    print(json.dumps({"peak": peak_mb(os.getpid()), "cpu": time.process_time()}))


def table(results):
    base = results.get("whole") or next(iter(results.values()))
    print(f"{'run':8} {'workers':>7} {'wall s':>8} {'ratio':>6} {'peak RSS MB per worker':>24}")
    for name, r in results.items():
        peaks = " / ".join(f"{p:.0f}" for p in r["peaks"])
        ratio = r["wall"] / base["wall"]
        print(f"{name:8} {len(r['peaks']):7} {r['wall']:8.1f} {ratio:6.2f} {peaks:>24}")
    digests = {r["result_sha256"] for r in results.values()}
    print(f"numbers identical across runs: {len(digests) == 1} (AP {base['ap']!r})")


def measure(runs, args, env, gt_path, dt_path):
    database(args.database_url)
    python(["manage.py", "migrate", "-v0"], env)
    load = (
        "from evaluation import services as s\n"
        f"s.load_split(name='sharded', revision=1, truth=open({str(gt_path)!r}, 'rb'))"
    )
    python(["manage.py", "shell", "-v0", "-c", load], {**env, "CELERY_BROKER_URL": args.redis_url})

    brokers = {"whole": (1, args.redis_url), "one": (1, args.redis_url)}
    brokers.update(redis2=(2, args.redis_url), fs2=(2, "filesystem://"))
    results = {}
    for name in runs:
        workers, broker = brokers[name]
        results[name] = run(
            name, workers, broker, env, args.shard_images, dt_path, via_upload=args.upload
        )
        r = results[name]
        detail = (
            f"; {len(r['shards'])} shards, mean {np.mean(r['shards']):.2f} s, read + pieces "
            f"{r['prepare']:.1f} s, merge + score + store {r['merge']:.1f} s"
            if r["shards"]
            else ""
        )
        if r.get("groups"):
            detail += (
                f" ({len(r['groups'])} class groups, mean {np.mean(r['groups']):.2f} s, "
                f"max {np.max(r['groups']):.2f} s; assemble + records file + store "
                f"{r['finish']:.1f} s)"
            )
        print(
            f"{name}: {r['wall']:.1f} s, peaks {[round(p) for p in r['peaks']]} MB, "
            f"cpu {[round(c, 1) for c in r['cpu']]} s, upload {r['upload']:.1f} s "
            f"({r['upload_cpu']:.1f} s CPU, peak {r['upload_peak']:.0f} MB), "
            f"result {r['result_sha256'][:12]}{detail}",
            flush=True,
        )

    print(f"\nload average during the runs: {os.getloadavg()}, cores: {os.cpu_count()}")
    table(results)
    sharded = [r for r in results.values() if r["shards"]]
    if sharded:
        r = min(sharded, key=lambda r: r["wall"])
        costs = np.array(r["shards"])
        upload, prepare, merge = r["upload"], r["prepare"], r["merge"]
        print(
            f"\nper shard ({len(costs)} of {args.shard_images} images): mean {costs.mean():.2f} s, "
            f"max {costs.max():.2f} s; upload {upload:.1f} s, read + pieces {prepare:.1f} s, "
            f"merge + score + store {merge:.1f} s"
        )
        groups = np.array(r.get("groups") or [0.0])
        finish = r.get("finish", merge)
        print(
            f"class groups: {len(groups)}, mean {groups.mean():.2f} s, max {groups.max():.2f} s; "
            f"assemble + records file + store {finish:.1f} s"
        )
        print(f"{'machines':>8} {'wall s (paper)':>15}")
        for n in (1, 2, 4, 8, 16, 32):
            waves = math.ceil(len(costs) / n) * costs.mean()
            group_waves = math.ceil(len(groups) / n) * groups.mean()
            print(f"{n:8} {upload + prepare + waves + group_waves + finish:15.1f}")


def process_env(work, database_url, **extra):
    """The environment of the bench's server and worker processes: this machine's, less
    its Celery and Benchbook settings, with a throw-away var dir and ``extra``."""
    env = {k: v for k, v in os.environ.items() if not k.startswith(("CELERY_", "BENCHBOOK_"))}
    env.update(
        BENCHBOOK_VAR=str(work),
        DATABASE_URL=database_url,
        DJANGO_SETTINGS_MODULE="benchbook.settings",
        SECRET_KEY=secrets.token_urlsafe(32),
        BENCHBOOK_MAX_UPLOAD_BYTES=str(8 * 2**30),
        PYTHONPATH=str(ROOT),
        **extra,
    )
    env.pop("DEBUG", None)
    return env


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--scale", type=float, default=1.0)
    parser.add_argument("--shard-images", type=int, default=5000)
    parser.add_argument("--runs", default="whole,one,redis2,fs2")
    parser.add_argument("--database-url", default="postgres://postgres@127.0.0.1:5432/bb_bench")
    parser.add_argument("--redis-url", default="redis://127.0.0.1:6379/6")
    parser.add_argument("--upload", action="store_true", help="sharded runs through the upload")
    parser.add_argument("--drive", help=argparse.SUPPRESS)
    parser.add_argument("--predictions", help=argparse.SUPPRESS)
    parser.add_argument("--piece", nargs=4, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.drive:
        return drive(args.drive, args.predictions, args.upload)
    if args.piece:
        mode, gt, dt, cache = args.piece
        return piece_peak(mode, gt, dt, args.shard_images, cache)

    began = time.time()
    gt_path, dt_path = generate(OUT / f"sharded-{args.scale:g}", args.scale)
    print(
        f"data: {os.path.getsize(gt_path) / 2**20:.0f} MB truth, "
        f"{os.path.getsize(dt_path) / 2**20:.0f} MB predictions ({time.time() - began:.0f} s)"
    )
    work = pathlib.Path(tempfile.mkdtemp(prefix="benchbook-sharded-"))
    env = process_env(work, args.database_url, BENCHBOOK_LEASE_SECONDS="120")
    runs = [name for name in args.runs.split(",") if name]
    if runs:
        measure(runs, args, env, gt_path, dt_path)
    cache = work / "piece-cache"
    cache.mkdir()
    common = [str(gt_path), str(dt_path), str(cache)]
    extra = ["--shard-images", str(args.shard_images)]
    python([__file__, "--piece", "write-piece", *common, *extra], env, capture_output=True)
    peaks = {}
    for mode in ("piece", "whole-read", "stream"):
        began = time.time()
        out = python([__file__, "--piece", mode, *common, *extra], env, capture_output=True)
        peaks[mode] = json.loads(out.stdout.decode().strip().splitlines()[-1])
        peaks[mode]["wall"] = time.time() - began
    print(f"\none process each (load average {os.getloadavg()[0]:.1f}):")
    for mode, what in (
        ("piece", f"load one piece + match it ({args.shard_images} images)"),
        ("whole-read", "read the whole predictions file"),
        ("stream", "stream the file into pieces (the upload)"),
    ):
        m = peaks[mode]
        print(f"  {what}: peak {m['peak']:.0f} MB, {m['cpu']:.1f} s CPU, {m['wall']:.1f} s wall")
    return 0


if __name__ == "__main__":
    sys.exit(main())
