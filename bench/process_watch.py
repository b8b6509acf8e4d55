"""Peak RSS (VmHWM) and CPU time of processes, read from ``/proc`` (Linux): of one
process (``peak_mb``, ``cpu_seconds``), or polled for several until stopped (``Watch``).
Used by ``bench/sharded.py`` and ``bench/upload_check.py``."""

import os
import threading


def peak_mb(pid):
    try:
        with open(f"/proc/{pid}/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024
    except (FileNotFoundError, ProcessLookupError):
        pass
    return 0.0


def cpu_seconds(pid):
    """User + system CPU seconds of a live process (/proc/<pid>/stat)."""
    try:
        with open(f"/proc/{pid}/stat") as f:
            fields = f.read().rsplit(")", 1)[1].split()
        return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
    except (FileNotFoundError, ProcessLookupError):
        return 0.0


class Watch:
    """Polls the peak RSS and CPU time of processes until stopped (both are gone once
    they exit)."""

    def __init__(self, processes):
        self.processes, self.peaks = processes, [0.0] * len(processes)
        self.cpu = [0.0] * len(processes)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self):
        while not self._stop.wait(0.2):
            for k, p in enumerate(self.processes):
                self.peaks[k] = max(self.peaks[k], peak_mb(p.pid))
                self.cpu[k] = max(self.cpu[k], cpu_seconds(p.pid))

    def stop(self):
        self._stop.set()
        self._thread.join()
        return self.peaks
