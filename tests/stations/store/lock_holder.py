"""Hold a store's writer lock from another thread, as a second writer would.

One process shares one lock per store folder, re-entrant for the thread that holds it
(``stations.store.lock.shared_lock``); a writer in another thread (or process) has to wait.
"""

from __future__ import annotations

import threading
from collections.abc import Iterator
from contextlib import contextmanager

from stations.store import StationMagnitudeStore


@contextmanager
def held_by_another_thread(store: StationMagnitudeStore) -> Iterator[None]:
    """Hold ``store``'s writer lock in a helper thread for the duration of the block."""
    taken, done = threading.Event(), threading.Event()

    def hold() -> None:
        with store.write_lock():
            taken.set()
            done.wait()

    thread = threading.Thread(target=hold)
    thread.start()
    taken.wait()
    try:
        yield
    finally:
        done.set()
        thread.join()
