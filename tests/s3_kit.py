"""A moto S3 server on localhost for the tests that need object storage (one per test session).

The endpoint and dummy credentials reach the storage library through its usual environment variables
(``AWS_ENDPOINT_URL``, ``AWS_ACCESS_KEY_ID``, ...), as a user's would, and are restored afterwards.
"""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
import urllib.request

import pytest

BUCKET = "widescreen-test"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def stop_process(proc: subprocess.Popen) -> None:
    if proc.poll() is None:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


@pytest.fixture(scope="session")
def s3_server(tmp_path_factory):
    """A moto S3 server on a free port; its endpoint and dummy credentials in the environment."""
    pytest.importorskip("s3fs")
    pytest.importorskip("moto.server")
    port = free_port()
    log = open(tmp_path_factory.mktemp("moto") / "server.log", "w")
    proc = subprocess.Popen(
        [sys.executable, "-m", "moto.server", "-H", "127.0.0.1", "-p", str(port)],
        stdout=log,
        stderr=subprocess.STDOUT,
    )
    endpoint = f"http://127.0.0.1:{port}"
    env = {
        "AWS_ENDPOINT_URL": endpoint,
        "AWS_ACCESS_KEY_ID": "testing",
        "AWS_SECRET_ACCESS_KEY": "testing",
        "AWS_DEFAULT_REGION": "us-east-1",
        "AWS_EC2_METADATA_DISABLED": "true",
        "AWS_SHARED_CREDENTIALS_FILE": os.devnull,
        "AWS_CONFIG_FILE": os.devnull,
    }
    saved = {k: os.environ.get(k) for k in env}
    os.environ.update(env)
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                urllib.request.urlopen(endpoint, timeout=2).close()
                break
            except OSError:
                assert proc.poll() is None, "the S3 server did not start"
                assert time.monotonic() < deadline, "the S3 server did not answer"
                time.sleep(0.2)
        import fsspec

        fsspec.filesystem("s3").mkdir(BUCKET)
        yield endpoint
    finally:
        stop_process(proc)
        log.close()
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
