"""The committer: the thread that commits the raw lines the instrument thread reads (group
commit), then posts what the engine must hear of after them.

The instrument thread keeps each raw line in the store as it reads it and hands the committer
what it would post (samples, news); it then goes straight back to reading the port, while the
committer waits for the commit's fsync. Everything handed over while a commit runs is covered
by the next one: one transaction for all the lines that queued meanwhile, however many.

Issue 11's rules hold: a post is made only once every line kept before it was handed over is
committed (the count of posts a commit covers is taken before the commit starts); posts go out
in the order they were handed over, from this one thread; a commit that fails holds every
post, in order, and is tried again (at the latest every RETRY_S); at the stop, for as long as
the stop waits.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from typing import Any

log = logging.getLogger(__name__)

#: How often a commit that failed is tried again while nothing new asks for one, s.
RETRY_S = 0.5


class Committer:
    """Commits the kept raw lines with ``flush()`` (False: the record cannot commit, the lines
    stay kept) and then calls ``post(kind, payload)`` for what was handed over before it.

    Until :meth:`start`, every request commits at once in the caller's thread (a link never
    started, in a test); after it, in the committer's own thread.
    """

    def __init__(self, flush: Callable[[], bool], post: Callable[[str, Any], None]) -> None:
        self._flush = flush
        self._post = post
        self._cond = threading.Condition()
        self._held: list[tuple[str, Any]] = []  # posts waiting for their lines' commit, in order
        self._wanted = False  # a commit was asked for since the last one began
        self._stopping = False
        self._stop_by = 0.0  # when a stop gives up on a commit that fails (time.monotonic)
        self._thread: threading.Thread | None = None
        #: When the last commit began (time.monotonic).
        self.flushed_at = 0.0

    def start(self) -> None:
        """Commit in a thread of its own from now on."""
        self._thread = threading.Thread(target=self._run, name="committer", daemon=True)
        self._thread.start()

    def holding(self) -> bool:
        """Return whether posts wait for a commit."""
        with self._cond:
            return bool(self._held)

    def hand_over(self, kind: str, payload: Any) -> None:
        """Post ``kind`` once the raw lines kept so far are committed (held, in order, while
        they cannot be)."""
        with self._cond:
            self._held.append((kind, payload))
        self.commit_soon()

    def commit_soon(self) -> None:
        """Commit the raw lines kept so far (with whatever else is kept by then), then post
        what was handed over before."""
        if self._thread is None:
            self._commit_once()
            return
        with self._cond:
            self._wanted = True
            self._cond.notify()

    def stop(self, timeout_s: float) -> None:
        """Commit what is kept, post what that allows, and end the thread: a commit that fails
        is tried again (every RETRY_S) for at most ``timeout_s``. Lines that still cannot be
        committed then stay kept, for the daemon to set aside."""
        thread = self._thread
        if thread is None:
            self._commit_once()
            return
        with self._cond:
            self._stop_by = time.monotonic() + timeout_s
            self._stopping = True
            self._cond.notify()
        thread.join(timeout_s + RETRY_S)

    def _run(self) -> None:
        failing = False
        while True:
            with self._cond:
                if failing and self._stopping:  # tried again until the stop's wait is over
                    self._cond.wait(max(0.0, min(RETRY_S, self._stop_by - time.monotonic())))
                elif not self._wanted and not self._stopping:
                    self._cond.wait(RETRY_S if failing else None)
                stopping, self._wanted = self._stopping, False
            try:
                failing = not self._commit_once()
            except Exception:  # the thread must live on: posts would otherwise wait forever
                log.exception("could not commit the raw lines or post what followed them")
                failing = True
            if stopping and (not failing or time.monotonic() >= self._stop_by):
                return

    def _commit_once(self) -> bool:
        """Commit; if that worked, post what was handed over before it began."""
        with self._cond:
            covered = len(self._held)  # their lines were kept before this commit begins
        self.flushed_at = time.monotonic()
        if not self._flush():
            return False
        with self._cond:
            posts = self._held[:covered]
            del self._held[:covered]
        for kind, payload in posts:
            self._post(kind, payload)
        return True
