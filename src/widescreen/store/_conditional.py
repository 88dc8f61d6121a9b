"""Conditional writes to one object: create only if absent, replace only if unchanged.

These are what a lock on object storage rests on. S3 (and the S3-compatible servers that implement
it) evaluates ``If-None-Match: *`` and ``If-Match: ETAG`` on a PUT atomically on the server: of two
concurrent creates of one key exactly one succeeds, and a replace succeeds only while the object still
has the ETag the writer read. Other protocols are refused by `check_conditional` rather than served
with a lock that would not hold; a server that accepts the headers but ignores them is caught by
`widescreen.engine.Lease`'s probe.
"""

from __future__ import annotations

from ._errors import StoreError
from ._location import RemotePath, storage_errors

#: Protocols whose fsspec file system passes S3's conditional headers to the server.
CONDITIONAL = frozenset({"s3", "s3a"})


def check_conditional(where: RemotePath, what: str) -> None:
    """Raise a `StoreError` unless ``where``'s protocol offers conditional writes."""
    if where.protocol not in CONDITIONAL:
        raise StoreError(
            f"{where}: {what} needs conditional writes (create-if-absent, replace-if-unchanged), "
            f"which widescreen uses on s3:// only; {where.protocol}:// is not supported for it"
        )


def _precondition_failed(exc: BaseException) -> bool:
    text = f"{exc} {exc.__cause__ or ''}"
    return (
        isinstance(exc, FileExistsError)
        or "PreconditionFailed" in text
        or ("pre-conditions you specified did not hold" in text)
    )


def create_object(where: RemotePath, data: bytes) -> str | None:
    """Write ``data`` only if no object exists at ``where``; its ETag, or None if one exists."""
    fs = where.fs
    try:
        with storage_errors(where):
            out = fs.pipe_file(where.key, data, mode="create")
    except OSError as exc:
        if _precondition_failed(exc):
            return None
        raise
    return _etag(out, where)


def replace_object(where: RemotePath, data: bytes, etag: str) -> str | None:
    """Write ``data`` only if the object still has ``etag``; the new ETag, or None if it changed
    (or is gone)."""
    fs = where.fs
    bucket, key = where.key.split("/", 1)
    try:
        with storage_errors(where):
            out = fs.call_s3("put_object", Bucket=bucket, Key=key, Body=data, IfMatch=etag)
    except OSError as exc:
        if _precondition_failed(exc) or isinstance(exc, FileNotFoundError):
            return None
        raise
    return _etag(out, where)


def read_object(where: RemotePath) -> tuple[bytes, str] | None:
    """The object's bytes and their ETag read in one request, or None if there is no object."""
    from fsspec.asyn import sync

    fs = where.fs
    bucket, key = where.key.split("/", 1)

    async def get():
        resp = await fs._call_s3("get_object", Bucket=bucket, Key=key)
        body = resp["Body"]
        try:
            data = await body.read()
        finally:
            body.close()
        return data, resp["ETag"]

    try:
        with storage_errors(where):
            return sync(fs.loop, get)
    except FileNotFoundError:
        return None


def delete_object(where: RemotePath) -> None:
    """Remove the object (no error if it is gone)."""
    try:
        with storage_errors(where):
            where.fs.rm_file(where.key)
    except FileNotFoundError:
        pass


def _etag(response, where: RemotePath) -> str:
    tag = response.get("ETag") if isinstance(response, dict) else None
    if not tag:
        raise StoreError(f"{where}: the storage returned no ETag for a write")
    return tag


__all__ = [
    "CONDITIONAL",
    "check_conditional",
    "create_object",
    "delete_object",
    "read_object",
    "replace_object",
]
