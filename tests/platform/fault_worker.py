"""A Celery worker with faults injected from the environment; for test_faults.py only.

``python -m tests.platform.fault_worker <celery arguments>``, with
``BENCHBOOK_FAULT_SLOW_MATCH=<seconds>`` (matching waits that long first: time to kill
the worker or cut the database mid-scoring) and/or ``BENCHBOOK_FAULT_RAISE=<builtin
exception name>`` (matching raises it: an error the engine does not expect), and
``BENCHBOOK_FAULT_SLOW_SHARD=<seconds>`` (every image shard this worker matches waits
that long first: time to kill it mid-shard; with ``BENCHBOOK_FAULT_SHARD_LOG=<file>``
it first appends ``<evaluation id> <shard index>`` there, so a test knows which shard
it holds).
"""

import builtins
import os
import sys
import time


def install_faults():
    from evaluation import engine

    match = engine.match
    slow = float(os.environ.get("BENCHBOOK_FAULT_SLOW_MATCH", 0))
    error = os.environ.get("BENCHBOOK_FAULT_RAISE", "")

    def faulty_match(*args, **kwargs):
        if error:
            raise getattr(builtins, error)("Python int too large to convert to C long")
        time.sleep(slow)
        return match(*args, **kwargs)

    engine.match = faulty_match

    from celery.signals import task_prerun

    from evaluation.engine import shards

    match_shard = shards.match_shard
    slow_shard = float(os.environ.get("BENCHBOOK_FAULT_SLOW_SHARD", 0))
    shard_log = os.environ.get("BENCHBOOK_FAULT_SHARD_LOG", "")
    current = []

    def remember_shard(sender=None, args=(), **extra):
        """``score_shard(evaluation_id, claim, index)``: the shard about to be matched."""
        if sender is not None and sender.name.endswith(".score_shard"):
            current[:] = [args[0], args[2]]

    task_prerun.connect(remember_shard, weak=False)

    def slow_match_shard(*args, **kwargs):
        if shard_log and current:
            with open(shard_log, "a") as f:
                f.write(f"{current[0]} {current[1]}\n")
        time.sleep(slow_shard)
        return match_shard(*args, **kwargs)

    shards.match_shard = slow_match_shard


if __name__ == "__main__":
    install_faults()
    from celery.__main__ import main

    sys.argv = ["celery", *sys.argv[1:]]
    sys.exit(main())
