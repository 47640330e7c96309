"""One job at a time in a worker thread of its own, for the page's Sweep and Pick tabs.

A new job stops the one running and bumps a generation counter, so results of
a superseded job are dropped; `stop` is the running job's flag (None when idle).
"""

from __future__ import annotations

import threading
from concurrent.futures import ThreadPoolExecutor


class BackgroundJob:
    def __init__(self, thread_name: str):
        self.generation = 0
        self.stop: threading.Event | None = None  # set to stop the running job
        self.pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix=thread_name)

    def _new_job(self) -> threading.Event:
        """Stop the running job; the new job's generation is self.generation, its stop flag returned."""
        self._stop_running()
        self.generation += 1
        self.stop = threading.Event()
        return self.stop

    def _ask_stop(self) -> bool:
        """Ask the running job to stop (it finishes what is in progress); False when none runs."""
        if self.stop is None:
            return False
        self.stop.set()
        return True

    def _stop_running(self):
        if self._ask_stop():
            self.stop = None

    def close(self):
        """The session has ended: stop the work."""
        self._stop_running()
        self.generation += 1
        self.pool.shutdown(wait=False, cancel_futures=True)
