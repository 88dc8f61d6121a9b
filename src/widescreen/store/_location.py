"""Where a store lives: a local folder or an object-storage URL, in one place.

`place` turns what a user gave (a path or a URL such as ``s3://bucket/geno.zarr``, ``gs://...``,
``az://...``, ``https://...``) into either a `pathlib.Path` or a `RemotePath`. A `RemotePath` offers the
few `Path` operations the store code uses (``/``, ``name``, ``parent``, ``exists``, ``is_file``,
``is_dir``, ``read_text``) plus what object storage needs: a zarr store (`zarr_store`, zarr 3's
`FsspecStore`), whole-object reads of many keys at once (`cat_many`, concurrent through fsspec's async
``cat``; `cat_many_later` requests them and returns at once, a `PendingObjects`), the tails of objects (`tails`, ranged reads) and the sizes of every object under a prefix in
one listing (`sizes`). No other module parses URLs.

Credentials and endpoints come only from the storage libraries' own environment variables and
configuration files (for S3: ``AWS_ACCESS_KEY_ID`` / ``AWS_SECRET_ACCESS_KEY``, ``AWS_PROFILE`` and
``~/.aws/credentials``, ``AWS_ENDPOINT_URL``; for any protocol fsspec's ``FSSPEC_<PROTOCOL>_<OPTION>``
variables, e.g. ``FSSPEC_S3_ENDPOINT_URL``), never from the command line: the URL is written to the run's
manifest, so a URL carrying a user name or a secret (``s3://KEY:SECRET@bucket``) is refused.
"""

from __future__ import annotations

import asyncio
import re
from pathlib import Path, PurePosixPath

from ._errors import StoreError

_URL = re.compile(r"^([A-Za-z][A-Za-z0-9+.\-]*)://(.*)$")
#: Protocols served read-only (no writes, no listing): stores may be read there, never written.
READ_ONLY = frozenset({"http", "https"})
#: Where each protocol's library looks for credentials, for the message when it finds none.
CREDENTIAL_HINTS = {
    "s3": "AWS_ACCESS_KEY_ID and AWS_SECRET_ACCESS_KEY, AWS_PROFILE or ~/.aws/credentials",
    "gs": "GOOGLE_APPLICATION_CREDENTIALS or gcloud's application-default login",
    "gcs": "GOOGLE_APPLICATION_CREDENTIALS or gcloud's application-default login",
    "az": "AZURE_STORAGE_CONNECTION_STRING or AZURE_STORAGE_ACCOUNT_NAME with a key",
    "abfs": "AZURE_STORAGE_CONNECTION_STRING or AZURE_STORAGE_ACCOUNT_NAME with a key",
}
#: The package fsspec needs for each protocol, for the message when it is not installed.
PACKAGES = {"s3": "s3fs", "gs": "gcsfs", "gcs": "gcsfs", "az": "adlfs", "abfs": "adlfs"}
#: Options of every file system made here: no cached listings, since the objects of a store change
#: under other handles (an import writes through zarr's own handle; a copy may be replaced).
FS_OPTIONS = {"use_listings_cache": False}
#: Options of one protocol's file systems besides `FS_OPTIONS`. s3fs asks for the size of every whole
#: object it reads (a HEAD request before the GET) so as to split objects above its block size into
#: concurrent ranged reads; a store's objects are a chunk each (about 16 MiB at most), so that only
#: doubled the requests and the waiting for each object (measured: a screen over 25 chunk columns
#: made 39 HEAD requests beside 64 GETs).
PROTOCOL_OPTIONS = {"s3": {"max_concurrency": 1}}


def fs_options(protocol: str) -> dict:
    """The options every file system of ``protocol`` is made with."""
    return {**FS_OPTIONS, **PROTOCOL_OPTIONS.get(protocol, {})}


def is_url(target) -> bool:
    """Whether ``target`` is a URL of another file system than the local one (``file://`` is local)."""
    if not isinstance(target, str | RemotePath):
        return False
    m = _URL.match(str(target))
    return m is not None and m.group(1).lower() != "file"


def place(target) -> Path | RemotePath:
    """A local `Path` or a `RemotePath` for a path or URL given by a user or read from a manifest."""
    if isinstance(target, RemotePath):
        return target
    if isinstance(target, str):
        m = _URL.match(target)
        if m is not None:
            if m.group(1).lower() == "file":
                return Path(m.group(2))
            return RemotePath(target)
    return Path(target)


class RemotePath:
    """An object-storage location (a URL), with the `Path` operations the store code uses.

    The file system is made on first use from the URL alone, so a pickled `RemotePath` (sent to a
    cluster worker) finds its credentials in the worker's own environment.
    """

    def __init__(self, url: str) -> None:
        m = _URL.match(url)
        if m is None:
            raise StoreError(f"{url}: not a URL")
        self.protocol = m.group(1).lower()
        rest = m.group(2).strip("/")
        bucket = rest.split("/", 1)[0]
        if "@" in bucket and self.protocol not in READ_ONLY:
            raise StoreError(
                f"{self.protocol}://{bucket.rsplit('@', 1)[1]}/...: the URL carries credentials, which "
                "would be written to the run's manifest; give them through the environment "
                f"({CREDENTIAL_HINTS.get(self.protocol, 'the storage library configuration')})"
            )
        self.url = f"{self.protocol}://{rest}"
        self._fs = None

    # -- Path-like ----------------------------------------------------------------------------

    def __str__(self) -> str:
        return self.url

    def __repr__(self) -> str:
        return f"RemotePath({self.url!r})"

    def __eq__(self, other) -> bool:
        return isinstance(other, RemotePath) and other.url == self.url

    def __hash__(self) -> int:
        return hash(self.url)

    def __truediv__(self, other) -> RemotePath:
        out = RemotePath(f"{self.url}/{str(other).strip('/')}")
        out._fs = self._fs
        return out

    def joinpath(self, *parts) -> RemotePath:
        out = self
        for p in parts:
            out = out / p
        return out

    @property
    def name(self) -> str:
        return self.url.rsplit("/", 1)[1] if "/" in self.url.split("://", 1)[1] else ""

    @property
    def parent(self) -> RemotePath:
        head = self.url.rsplit("/", 1)[0]
        out = RemotePath(head if "://" in head and head.split("://", 1)[1] else self.url)
        out._fs = self._fs
        return out

    @property
    def bucket(self) -> str:
        return self.key.split("/", 1)[0]

    def relative_to(self, other) -> PurePosixPath:
        base = str(other).rstrip("/") + "/"
        if not self.url.startswith(base):
            raise ValueError(f"{self.url} is not under {other}")
        return PurePosixPath(self.url[len(base) :])

    def is_absolute(self) -> bool:
        return True

    def resolve(self) -> RemotePath:
        return self

    def __getstate__(self) -> dict:
        return {"protocol": self.protocol, "url": self.url, "_fs": None}  # no cached stores

    def __setstate__(self, state: dict) -> None:
        self.__dict__.update(state)

    # -- the file system ----------------------------------------------------------------------

    @property
    def key(self) -> str:
        """The path inside the file system (the URL without its protocol)."""
        return self.url.split("://", 1)[1]

    @property
    def fs(self):
        """The fsspec file system (synchronous calls; fsspec runs the requests on its own loop)."""
        if self._fs is None:
            with storage_errors(self):
                import fsspec

                self._fs = fsspec.filesystem(self.protocol, **fs_options(self.protocol))
        return self._fs

    @property
    def read_only(self) -> bool:
        return self.protocol in READ_ONLY

    def _path(self) -> str:
        return self.url if self.protocol in READ_ONLY else self.key

    def exists(self) -> bool:
        with storage_errors(self):
            return bool(self.fs.exists(self._path()))

    def is_file(self) -> bool:
        with storage_errors(self):
            return bool(self.fs.isfile(self._path()))

    def is_dir(self) -> bool:
        if self.read_only:  # no listing over HTTP: a store is a folder when its zarr.json exists
            return (self / "zarr.json").is_file()
        with storage_errors(self):
            return bool(self.fs.isdir(self._path()))

    def read_bytes(self) -> bytes:
        with storage_errors(self):
            return self.fs.cat_file(self._path())

    def read_text(self, encoding: str = "utf-8") -> str:
        return self.read_bytes().decode(encoding)

    def write_bytes(self, data: bytes) -> None:
        self.check_writable()
        with storage_errors(self):
            self.fs.pipe_file(self._path(), data)

    def check_writable(self) -> None:
        if self.read_only:
            raise StoreError(
                f"{self.url}: {self.protocol}:// is read-only; stores can only be read there"
            )

    def remove_tree(self) -> None:
        """Remove every object under this prefix (a store being replaced)."""
        self.check_writable()
        with storage_errors(self):
            if self.fs.exists(self.key):
                self.fs.rm(self.key, recursive=True)

    def check_bucket(self) -> None:
        """Raise a `StoreError` naming the URL when its bucket does not exist."""
        if self.read_only:
            return
        with storage_errors(self):
            found = self.fs.exists(self.bucket)
        if not found:
            raise StoreError(f"{self.url}: no such bucket {self.bucket!r} at {self.protocol}://")

    def zarr_store(self, *, read_only: bool):
        """Zarr 3's fsspec store at this location (an asynchronous file system of the same protocol)."""
        from zarr.storage import FsspecStore

        if not read_only:
            self.check_writable()
        cache = self.__dict__.setdefault("_zarr_stores", {})
        if read_only not in cache:
            with storage_errors(self):
                cache[read_only] = FsspecStore.from_url(
                    self.url, storage_options=fs_options(self.protocol), read_only=read_only
                )
        return cache[read_only]

    def cat_many(self, paths: list[RemotePath]) -> list[bytes | BaseException]:
        """The whole content of each object, requested concurrently (fsspec's async ``cat``).

        An object that cannot be read gives its exception in its place.
        """
        keys = [p._path() for p in paths]
        with storage_errors(self):
            got = self.fs.cat(keys, on_error="return")
        if not isinstance(got, dict):  # a single key comes back as its bytes
            got = {keys[0]: got}
        return [got.get(k, FileNotFoundError(k)) for k in keys]

    def cat_many_later(self, paths: list[RemotePath]) -> PendingObjects:
        """Request every object now; `PendingObjects.result` waits and gives what `cat_many` gives.

        On an asynchronous file system (s3fs, gcsfs, adlfs, http: every protocol fsspec reaches
        remotely) the requests run on fsspec's own event loop beside the caller's work, with no thread
        of their own; on another one they are made when the result is asked for.
        """
        return PendingObjects(self, paths)

    def tails(self, paths: list[RemotePath], n: int = 4) -> list[bytes | BaseException]:
        """The last ``n`` bytes of each object, by concurrent ranged reads."""
        keys = [p._path() for p in paths]
        if not keys:
            return []
        with storage_errors(self):
            return list(
                self.fs.cat_ranges(keys, [-n] * len(keys), [None] * len(keys), on_error="return")
            )

    def sizes(self, paths: list[RemotePath]) -> dict[str, int]:
        """Size of each existing object among ``paths`` (one listing of this prefix where the storage
        lists; a request per object where it does not)."""
        with storage_errors(self):
            if not self.read_only:
                found = self.fs.find(self.key, detail=True)
                return {
                    f"{self.protocol}://{k.strip('/')}": int(v["size"]) for k, v in found.items()
                }
            out = {}
            for p in paths:
                try:
                    out[p.url] = int(self.fs.info(p._path())["size"])
                except FileNotFoundError:
                    continue
            return out


class PendingObjects:
    """The whole content of some objects, requested (`RemotePath.cat_many_later`), not yet waited for."""

    def __init__(self, where: RemotePath, paths: list[RemotePath]) -> None:
        self.where = where
        self.paths = paths
        self._future = None
        with storage_errors(where):
            fs = where.fs
            if getattr(fs, "async_impl", False):
                keys = [p._path() for p in paths]
                self._future = asyncio.run_coroutine_threadsafe(
                    fs._cat(keys, on_error="return"), fs.loop
                )

    def result(self) -> list[bytes | BaseException]:
        """Each object's bytes, or the exception that reading it raised, in the order requested."""
        if self._future is None:
            return self.where.cat_many(self.paths)
        keys = [p._path() for p in self.paths]
        with storage_errors(self.where):
            got = self._future.result()
        if not isinstance(got, dict):  # a single key comes back as its bytes
            got = {keys[0]: got}
        return [got.get(k, FileNotFoundError(k)) for k in keys]

    def cancel(self) -> None:
        """Stop the requests still running (their bytes are not wanted)."""
        if self._future is not None:
            self._future.cancel()


class storage_errors:
    """Turn the storage libraries' errors into one line naming the URL (a `StoreError`).

    Missing credentials, a missing bucket, a refused access, an unreachable endpoint and a missing
    protocol package each get their own sentence; a missing object stays a `FileNotFoundError` for the
    caller to name.
    """

    def __init__(self, where) -> None:
        self.where = where

    def __enter__(self) -> storage_errors:
        return self

    def __exit__(self, kind, exc, tb) -> bool:
        if exc is None or isinstance(exc, StoreError | KeyboardInterrupt | SystemExit):
            return False
        err = describe_error(exc, self.where)
        if err is None:
            return False
        raise err from None


def describe_error(exc: BaseException, where) -> StoreError | None:
    """A `StoreError` for a storage library's error, or None for errors the caller handles."""
    url = str(where)
    m = _URL.match(url)
    protocol = m.group(1).lower() if m else ""
    names = {c.__name__ for c in type(exc).__mro__}
    text = str(exc)
    if "NoCredentialsError" in names or "Unable to locate credentials" in text:
        hint = CREDENTIAL_HINTS.get(protocol, "the storage library's configuration")
        return StoreError(f"{url}: no credentials for {protocol}:// found (set {hint})")
    if isinstance(exc, ImportError):
        pkg = PACKAGES.get(protocol, f"the fsspec implementation of {protocol}://")
        return StoreError(
            f"{url}: reading {protocol}:// needs the package {pkg} (pip install {pkg})"
        )
    if isinstance(exc, ValueError) and "Protocol not known" in text:
        return StoreError(f"{url}: no file system is known for {protocol}://")
    if isinstance(exc, FileNotFoundError) and "bucket" in text.lower():
        bucket = url.split("://", 1)[-1].split("/", 1)[0]
        return StoreError(f"{url}: no such bucket {bucket!r} at {protocol}://")
    if isinstance(exc, PermissionError) or ({"ClientError"} & names and "AccessDenied" in text):
        return StoreError(f"{url}: access denied ({text}); check the credentials' permissions")
    if names & {"EndpointConnectionError", "ClientConnectorError", "ConnectTimeoutError"}:
        return StoreError(f"{url}: cannot reach the storage ({text})")
    return None


def open_group(where, mode: str):
    """The zarr group at a local folder or a URL (``mode`` as `zarr.open_group`'s)."""
    import zarr

    where = place(where)
    if isinstance(where, Path):
        return zarr.open_group(where, mode=mode)
    with storage_errors(where):
        store = where.zarr_store(read_only=mode == "r")
        return zarr.open_group(store=store, mode=mode, zarr_format=3)


def remove_tree(where) -> None:
    """Remove a store folder or every object under a store's URL (a store being replaced)."""
    import shutil

    where = place(where)
    if isinstance(where, RemotePath):
        where.remove_tree()
    else:
        shutil.rmtree(where, ignore_errors=True)


def census(files: list) -> list[tuple[int, int | None]]:
    """(size, last four bytes as a little-endian integer, or None if shorter) of each file.

    Local files: a stat and a four-byte read each. Objects: the sizes from one listing and the tails
    by concurrent ranged reads. A missing file raises `FileNotFoundError` naming it.
    """
    import os

    if not files:
        return []
    if not isinstance(files[0], RemotePath):
        out = []
        for f in files:
            with open(f, "rb", buffering=0) as fh:
                size = os.fstat(fh.fileno()).st_size
                tail = os.pread(fh.fileno(), 4, size - 4) if size >= 4 else b""
            out.append((size, int.from_bytes(tail, "little") if len(tail) == 4 else None))
        return out
    root = files[0].parent
    while root.parent != root and not all(f.url.startswith(root.url + "/") for f in files):
        root = root.parent
    sizes = root.sizes(files)
    for f in files:
        if f.url not in sizes:
            raise FileNotFoundError(f.url)
    tails = root.tails(files)
    out = []
    for f, t in zip(files, tails, strict=True):
        if isinstance(t, BaseException):
            err = describe_error(t, f)
            raise err if err is not None else t
        n = sizes[f.url]
        out.append((n, int.from_bytes(t[-4:], "little") if n >= 4 else None))
    return out
