"""Benchmark: the upload check of a large predictions file, this checkout beside another.

    nice python bench/upload_check.py [--scale 1] [--shard-images 5000] [--runs 3]
                                      [--against /path/to/another/checkout]

The upload check is what the web process does before an upload is accepted
(``services.received_predictions`` then ``store()``, as ``submit_predictions`` does):
spool and hash the file, load the split's truth (cold: the engine cache is emptied
first), stream the file into per-shard pieces (``engine.pieces.stream_pieces``) and
store the file and its pieces. Data: ``bench/sharded.py``'s seeded split and
predictions (``--scale 1``: 100,000 images, 10,000,000 detections, ~820 MB of JSON).

Each run is a fresh process; with ``--against`` the two checkouts alternate (A B A B
...), so both see the same machine load. Printed per run: CPU seconds (user + system)
and wall seconds of the check, the process's peak RSS, and a SHA-256 of every
stored piece's arrays and fields (all but ``source``, the spooled file's temporary
path): the two checkouts must store the same pieces. Then the median of each
and the ratio. Database: PostgreSQL (``--database-url``, a throw-away database it
drops and creates). Report the load average printed beside the numbers.
"""

import argparse
import hashlib
import json
import os
import pathlib
import shutil
import statistics
import subprocess
import sys
import tempfile
import time

ROOT = pathlib.Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "bench"))

import sharded  # noqa: E402  (bench/sharded.py: the data)


def check(predictions_path):
    """In a fresh process (cwd: the checkout measured): one upload check."""
    import django

    django.setup()
    from django.core.files import File
    from django.db import transaction

    from evaluation import services
    from evaluation.models import BenchmarkSplit, PredictionPieces

    split = BenchmarkSplit.objects.get(name="upload-check")
    began, cpu_began = time.time(), time.process_time()
    with open(predictions_path, "rb") as f:
        with services.received_predictions(File(f, name="predictions.json"), split) as got:
            with transaction.atomic():
                stored = got.store()
    cpu, wall = time.process_time() - cpu_began, time.time() - began
    pieces = PredictionPieces.objects.get(predictions=stored, split=split)
    digests = [_content(p.file.path) for p in sorted(pieces.pieces.all(), key=lambda p: p.index)]
    print(
        json.dumps(
            {
                "cpu": cpu,
                "wall": wall,
                "peak": sharded.peak_mb(os.getpid()),
                "pieces": hashlib.sha256("".join(digests).encode()).hexdigest(),
                "n_pieces": len(digests),
                "file": stored.sha256,
            }
        )
    )


def _content(path):
    """SHA-256 of a piece's arrays and metadata, but for ``source`` (the spooled
    file's temporary path, which differs from upload to upload)."""
    import numpy as np

    digest = hashlib.sha256()
    with np.load(path, allow_pickle=False) as data:
        for name in sorted(data.files):
            value = data[name]
            if name.endswith("__meta__"):
                meta = json.loads(str(value))
                meta.pop("source", None)
                value = np.array(json.dumps(meta, sort_keys=True))
            digest.update(name.encode() + value.dtype.str.encode() + repr(value.shape).encode())
            digest.update(np.ascontiguousarray(value).tobytes())
    return digest.hexdigest()


def run(root, env, predictions_path):
    """One check in a fresh process of the checkout at ``root``; its stored files and
    rows are removed afterwards (the next run stores them anew)."""
    shutil.rmtree(pathlib.Path(env["BENCHBOOK_VAR"]) / "engine-cache", ignore_errors=True)
    out = subprocess.run(
        [sys.executable, __file__, "--check", str(predictions_path)],
        env={**env, "PYTHONPATH": str(root)},
        cwd=root,
        check=True,
        capture_output=True,
        text=True,
    )
    clean = (
        "from evaluation.models import PredictionFile, PredictionPieces\n"
        "PredictionPieces.objects.all().delete(); PredictionFile.objects.all().delete()"
    )
    subprocess.run(
        [sys.executable, "manage.py", "shell", "-v0", "-c", clean], env=env, cwd=ROOT, check=True
    )
    shutil.rmtree(pathlib.Path(env["BENCHBOOK_VAR"]) / "media" / "predictions", True)
    shutil.rmtree(pathlib.Path(env["BENCHBOOK_VAR"]) / "media" / "pieces", True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--scale", type=float, default=1.0)
    parser.add_argument("--shard-images", type=int, default=5000)
    parser.add_argument("--runs", type=int, default=3)
    parser.add_argument("--against", help="another checkout, measured alternately")
    parser.add_argument("--database-url", default="postgres://postgres@127.0.0.1:5432/bb_bench")
    parser.add_argument("--check", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.check:
        return check(args.check)

    gt_path, dt_path = sharded.generate(sharded.OUT / f"sharded-{args.scale:g}", args.scale)
    work = pathlib.Path(tempfile.mkdtemp(prefix="benchbook-upload-check-"))
    env = sharded.process_env(
        work,
        args.database_url,
        BENCHBOOK_SHARD_IMAGES=str(args.shard_images),
        CELERY_BROKER_URL="memory://",
    )
    env.pop("PYTHONPATH")  # each checkout imports its own code (cwd), never this one's
    sharded.database(args.database_url)
    subprocess.run([sys.executable, "manage.py", "migrate", "-v0"], env=env, cwd=ROOT, check=True)
    load = (
        "from evaluation import services as s\n"
        f"s.load_split(name='upload-check', revision=1, truth=open({str(gt_path)!r}, 'rb'))"
    )
    subprocess.run(
        [sys.executable, "manage.py", "shell", "-v0", "-c", load], env=env, cwd=ROOT, check=True
    )
    roots = {"this": ROOT}
    if args.against:
        roots["against"] = pathlib.Path(args.against).resolve()
    size = os.path.getsize(dt_path) / 2**20
    print(f"predictions: {size:.0f} MB; shards of {args.shard_images} images", flush=True)
    results = {name: [] for name in roots}
    try:
        for k in range(args.runs):
            for name, root in roots.items():
                r = run(root, env, dt_path)
                results[name].append(r)
                print(
                    f"run {k + 1} {name:8}: {r['cpu']:6.1f} s CPU, {r['wall']:6.1f} s wall, "
                    f"peak {r['peak']:5.0f} MB, {r['n_pieces']} pieces {r['pieces'][:12]}, "
                    f"load {os.getloadavg()[0]:.1f}",
                    flush=True,
                )
    finally:
        shutil.rmtree(work, ignore_errors=True)
    print(f"\nload average: {os.getloadavg()}, cores: {os.cpu_count()}")
    medians = {n: statistics.median(r["cpu"] for r in rs) for n, rs in results.items()}
    for name, rs in results.items():
        print(
            f"{name:8} median {medians[name]:.1f} s CPU, "
            f"{statistics.median(r['wall'] for r in rs):.1f} s wall ({roots[name]})"
        )
    if args.against:
        same = {r["pieces"] for rs in results.values() for r in rs}
        print(f"ratio this / against (CPU): {medians['this'] / medians['against']:.2f}")
        print("stored pieces identical across checkouts:", "yes" if len(same) == 1 else "NO")
    return 0


if __name__ == "__main__":
    sys.exit(main())
