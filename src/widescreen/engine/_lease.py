"""The lock of a run folder on object storage: a lease held in one object, ``RUN/.lease``.

Object storage has no lock that ends with its holder (a local run folder uses ``flock``, which the
kernel drops when the process dies). The lease replaces it:

- **Taking it** is a create-if-absent PUT of ``.lease`` (S3's ``If-None-Match: *``). The server
  decides atomically, so of two processes starting at once exactly one gets it; the other reads who
  holds it and is refused, naming the holder.
- **Holding it** means renewing it: every ``seconds / 4`` the holder replaces the object with a new
  expiry time by a replace-if-unchanged PUT (``If-Match`` on the ETag of its own last write). A
  renewal that fails because the object changed means another process took the lease over: the
  holder has lost it.
- **A killed holder** stops renewing, so its lease expires ``seconds`` after its last renewal (by the
  expiry it wrote, plus a skew allowance, `CLOCK_SKEW`, for clocks that differ between machines). Another process then
  takes it over with a replace-if-unchanged PUT on the ETag it read; two takers cannot both win. On the
  holder's own host a lease whose process is gone is taken over at once.
- **The holder writes only while its lease is valid**: until `seconds - MARGIN` after the start of its
  last successful renewal, on its monotonic clock. A holder paused longer than that (or cut off from
  the storage) stops writing before any other process may take over, so two processes never write
  to the folder at once as long as the machines' clocks agree within `CLOCK_SKEW + MARGIN`.

Where it cannot hold, a run folder is refused: protocols without conditional writes
(`widescreen.store.check_conditional`), and a server that accepts the headers but ignores them (the
probe in `Lease.acquire`: a second create of the held lease must fail).
"""

from __future__ import annotations

import json
import os
import socket
import threading
import time
import uuid
from dataclasses import dataclass, field

from ..schema import RunFolderError
from ..store import (
    RemotePath,
    StoreError,
    check_conditional,
    create_object,
    delete_object,
    read_object,
    replace_object,
)
from ._runfolder import pid_alive

#: Lifetime of a lease without renewal, in seconds.
LEASE_SECONDS = 60.0
#: A lease is taken over only this long after the expiry its holder wrote (clocks differ).
CLOCK_SKEW = 10.0
#: The holder stops writing this long before its lease could expire.
MARGIN = 10.0


class LeaseLost(RunFolderError):
    """The run folder's lease expired or was taken over: this process may no longer write there."""


@dataclass
class Lease:
    """An exclusive, renewed lease on a run folder on object storage.

    Parameters
    ----------
    where : the lease object (``RUN/.lease``)
    seconds : lifetime without renewal; renewed every ``seconds / 4`` by a background thread
    margin : the holder stops writing this long before its lease could expire
    skew : another process takes an unrenewed lease over only this long after its written expiry
    """

    where: RemotePath
    seconds: float = LEASE_SECONDS
    margin: float = MARGIN
    skew: float = CLOCK_SKEW
    owner: str = field(default_factory=lambda: uuid.uuid4().hex, init=False)
    _etag: str | None = field(default=None, init=False, repr=False)
    _renewed: float = field(default=0.0, init=False, repr=False)  # monotonic start of last renewal
    _lost: str | None = field(default=None, init=False, repr=False)
    _stop: threading.Event = field(default_factory=threading.Event, init=False, repr=False)
    _thread: threading.Thread | None = field(default=None, init=False, repr=False)
    _mutex: threading.Lock = field(default_factory=threading.Lock, init=False, repr=False)

    def __post_init__(self) -> None:
        if not (
            self.margin >= 0 and self.skew >= 0 and self.seconds - self.margin > self.seconds / 4
        ):
            raise ValueError(
                f"a lease must outlive its renewal interval by its margin; got {self.seconds} s "
                f"with a margin of {self.margin} s"
            )

    @property
    def folder(self) -> RemotePath:
        return self.where.parent

    def _record(self) -> bytes:
        now = time.time()
        return json.dumps(
            {
                "owner": self.owner,
                "host": socket.gethostname(),
                "pid": os.getpid(),
                "renewed": now,
                "expires": now + self.seconds,
            },
            sort_keys=True,
        ).encode()

    # -- taking and leaving -----------------------------------------------------------------------

    def acquire(self) -> None:
        """Take the lease, or raise a `RunFolderError` naming its holder."""
        check_conditional(self.where, "a run folder")
        for _ in range(3):
            started = time.monotonic()
            etag = create_object(self.where, body := self._record())
            if etag is None:
                etag = self._take_over()
                if etag is None:
                    continue  # the lease vanished between our create and our read: try again
                body = None
            self._etag, self._renewed = etag, started
            if body is not None:
                self._probe(body)
            self._start()
            return
        raise RunFolderError(f"{self.folder}: could not take the run folder's lease")

    def _probe(self, body: bytes) -> None:
        """A second create of the object we hold must be refused; a server that accepts it ignores
        the condition, and no lock can hold there. (The probe writes the same bytes, so even an
        ignoring server leaves our lease as it was.)"""
        if create_object(self.where, body) is not None:
            delete_object(self.where)
            raise RunFolderError(
                f"{self.folder}: this storage ignores conditional writes (a second create of the "
                "lease object succeeded), so a lock cannot hold there; use a local or shared folder"
            )

    def _take_over(self) -> str | None:
        got = read_object(self.where)
        if got is None:
            return None
        data, etag = got
        try:
            holder = json.loads(data)
            expires = float(holder["expires"])
        except (ValueError, KeyError, TypeError):
            holder, expires = {}, 0.0  # not a lease we can read: treated as expired
        same_host_dead = holder.get("host") == socket.gethostname() and not pid_alive(
            int(holder.get("pid", -1))
        )
        if not same_host_dead and time.time() < expires + self.skew:
            raise self._busy(holder, expires)
        new = replace_object(self.where, self._record(), etag)
        if new is None:
            raise self._busy({}, None)  # another process took it over first
        return new

    def _busy(self, holder: dict, expires: float | None) -> RunFolderError:
        who = f"pid {holder.get('pid')} on {holder.get('host')}" if holder else "another process"
        left = (
            ""
            if expires is None
            else f" (its lease runs {max(0, expires - time.time()):.0f} s more unless renewed)"
        )
        return RunFolderError(
            f"{self.folder}: in use by {who}{left}; wait for it to finish or use another folder"
        )

    def release(self) -> None:
        """Stop renewing and remove the lease if it is still ours."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join()
            self._thread = None
        with self._mutex:
            if self._etag is None:
                return
            etag, self._etag = self._etag, None
        if self._lost is None:
            got = read_object(self.where)
            if got is not None and got[1] == etag:
                delete_object(self.where)

    # -- holding -----------------------------------------------------------------------------

    def _start(self) -> None:
        self._stop.clear()
        self._thread = threading.Thread(
            target=self._renew_loop, name="widescreen-lease", daemon=True
        )
        self._thread.start()

    def _renew_loop(self) -> None:
        while not self._stop.wait(self.seconds / 4):
            if self._lost is not None:
                return
            self.renew()

    def renew(self) -> None:
        """Extend the lease; marks it lost if another process replaced it (errors of the storage
        are retried at the next renewal, while the lease is still valid)."""
        started = time.monotonic()
        with self._mutex:
            etag = self._etag
        if etag is None:
            return
        try:
            new = replace_object(self.where, self._record(), etag)
        except (OSError, StoreError):
            return  # unreachable for now: `valid` turns false if this lasts
        with self._mutex:
            if new is None:
                self._lost = "another process took the run folder's lease over"
            elif self._etag is not None:
                self._etag, self._renewed = new, started

    def valid(self) -> bool:
        """Whether this process may still write: held, not lost, and renewed recently enough."""
        return (
            self._etag is not None
            and self._lost is None
            and time.monotonic() - self._renewed < self.seconds - self.margin
        )

    def check(self) -> None:
        """Raise `LeaseLost` unless `valid`."""
        if self.valid():
            return
        reason = self._lost or (
            "the lease was not released and not renewed for too long (storage unreachable?)"
            if self._etag is not None
            else "the lease is not held"
        )
        raise LeaseLost(f"{self.folder}: {reason}; this process stops writing there")

    def __enter__(self) -> Lease:
        self.acquire()
        return self

    def __exit__(self, *exc) -> None:
        self.release()


__all__ = ["CLOCK_SKEW", "LEASE_SECONDS", "MARGIN", "Lease", "LeaseLost"]
