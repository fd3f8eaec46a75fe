"""A real S3-compatible server on loopback for the object-store tests.

moto's server mode (PyPI ``moto[server]``) answers the S3 REST API over HTTP: the tests
talk to it through s3fs and botocore exactly as to a hosted store, configured only by
the standard environment variables (``AWS_ACCESS_KEY_ID``, ``AWS_SECRET_ACCESS_KEY``,
``AWS_DEFAULT_REGION``, and ``AWS_ENDPOINT_URL_S3`` for the endpoint). The server runs
in its own process, started by :func:`start` and stopped when the tests end.
"""

from __future__ import annotations

import contextlib
import json
import os
import socket
import struct
import subprocess
import sys
import threading
import time
import urllib.request
from collections.abc import Iterator
from contextlib import contextmanager

CREDENTIALS = {"AWS_ACCESS_KEY_ID": "timbrel-test", "AWS_SECRET_ACCESS_KEY": "timbrel-test",
               "AWS_DEFAULT_REGION": "us-east-1"}


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _die_with_parent() -> None:
    """In the server's process: ask Linux to kill it when the test process dies, so a
    test run killed mid-way leaves no server behind (``prctl(PR_SET_PDEATHSIG)``)."""
    if sys.platform.startswith("linux"):
        import ctypes
        import signal

        ctypes.CDLL(None, use_errno=True).prctl(1, signal.SIGKILL)


@contextmanager
def start(*, unchecked_requests: int | None = None) -> Iterator[dict[str, str]]:
    """Start a moto S3 server on a free loopback port; yield the environment that points
    the AWS libraries at it (credentials and endpoint); stop it at the end.

    With ``unchecked_requests``, the server checks every request after the first that
    many against its IAM users and policies (moto's ``INITIAL_NO_AUTH_ACTION_COUNT``),
    so a user whose policy denies a write is refused as by a hosted store.
    """
    port = _free_port()
    env = dict(os.environ)
    if unchecked_requests is not None:
        env["INITIAL_NO_AUTH_ACTION_COUNT"] = str(unchecked_requests)
    proc = subprocess.Popen([sys.executable, "-m", "moto.server", "-H", "127.0.0.1",
                             "-p", str(port)], stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL, env=env, preexec_fn=_die_with_parent)
    endpoint = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 30
        while True:
            try:
                urllib.request.urlopen(f"{endpoint}/moto-api/", timeout=1).close()
                break
            except OSError:
                if proc.poll() is not None or time.monotonic() > deadline:
                    raise RuntimeError("the moto S3 server did not start") from None
                time.sleep(0.1)
        yield {**CREDENTIALS, "AWS_ENDPOINT_URL_S3": endpoint}
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()


def _client(env: dict[str, str], service: str = "s3"):
    import boto3

    return boto3.client(service, endpoint_url=env["AWS_ENDPOINT_URL_S3"],
                        aws_access_key_id=env["AWS_ACCESS_KEY_ID"],
                        aws_secret_access_key=env["AWS_SECRET_ACCESS_KEY"],
                        region_name=env["AWS_DEFAULT_REGION"])


def make_bucket(env: dict[str, str], name: str) -> None:
    """Create a bucket on the server (with botocore, outside the code under test)."""
    _client(env).create_bucket(Bucket=name)


#: Requests :func:`read_only_user` makes (for ``start(unchecked_requests=...)``).
READ_ONLY_SETUP_REQUESTS = 4


def read_only_user(env: dict[str, str], bucket: str) -> dict[str, str]:
    """Make ``bucket`` and an IAM user that may read it but not write; return the
    environment with that user's keys. Takes :data:`READ_ONLY_SETUP_REQUESTS` requests."""
    make_bucket(env, bucket)
    iam = _client(env, "iam")
    iam.create_user(UserName="reader")
    key = iam.create_access_key(UserName="reader")["AccessKey"]
    policy = {"Version": "2012-10-17", "Statement": [{
        "Effect": "Allow", "Resource": "*",
        "Action": ["s3:GetObject", "s3:ListBucket", "s3:GetBucketLocation"]}]}
    iam.put_user_policy(UserName="reader", PolicyName="read-only",
                        PolicyDocument=json.dumps(policy))
    return {**env, "AWS_ACCESS_KEY_ID": key["AccessKeyId"],
            "AWS_SECRET_ACCESS_KEY": key["SecretAccessKey"]}


class CuttableLink:
    """A loopback TCP relay in front of the server, whose link can be cut and restored:
    a network drop, as the client sees one (connections reset, new ones refused)."""

    def __init__(self, target_port: int) -> None:
        self.target = ("127.0.0.1", target_port)
        self.port = _free_port()
        self._conns: list[socket.socket] = []
        self._lock = threading.Lock()
        self._listener: socket.socket | None = None
        self.restore()

    def restore(self) -> None:
        """Accept connections again."""
        listener = socket.socket()
        listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        listener.bind(("127.0.0.1", self.port))
        listener.listen(64)
        self._listener = listener
        threading.Thread(target=self._accept, args=(listener,), daemon=True).start()

    def cut(self) -> None:
        """Reset every open connection and refuse new ones."""
        if self._listener is not None:
            self._listener.close()
            self._listener = None
        with self._lock:
            for conn in self._conns:
                with contextlib.suppress(OSError):
                    conn.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER,
                                    struct.pack("ii", 1, 0))
                    conn.close()
            self._conns.clear()

    def _accept(self, listener: socket.socket) -> None:
        while True:
            try:
                client, _ = listener.accept()
            except OSError:
                return
            try:
                upstream = socket.create_connection(self.target)
            except OSError:
                client.close()
                continue
            with self._lock:
                self._conns += [client, upstream]
            for a, b in ((client, upstream), (upstream, client)):
                threading.Thread(target=self._pipe, args=(a, b), daemon=True).start()

    @staticmethod
    def _pipe(src: socket.socket, dst: socket.socket) -> None:
        try:
            while data := src.recv(65536):
                dst.sendall(data)
        except OSError:
            pass
        finally:
            for s in (src, dst):
                with contextlib.suppress(OSError):
                    s.shutdown(socket.SHUT_RDWR)


def upload_folder(env: dict[str, str], folder: str, url: str) -> None:
    """Copy a local folder's files under an ``s3://bucket/prefix`` URL (with boto3)."""
    client = _client(env)
    bucket, _, prefix = url[len("s3://"):].partition("/")
    for root, _dirs, files in os.walk(folder):
        for name in files:
            path = os.path.join(root, name)
            key = "/".join(p for p in (prefix.rstrip("/"),
                                       os.path.relpath(path, folder).replace(os.sep, "/")) if p)
            client.upload_file(path, bucket, key)


def object_bytes(env: dict[str, str], url: str) -> dict[str, bytes]:
    """Every object under an ``s3://bucket/prefix`` URL, by key relative to the prefix."""
    client = _client(env)
    bucket, _, prefix = url[len("s3://"):].partition("/")
    prefix = prefix.rstrip("/") + "/"
    out = {}
    for page in client.get_paginator("list_objects_v2").paginate(Bucket=bucket, Prefix=prefix):
        for obj in page.get("Contents", []):
            body = client.get_object(Bucket=bucket, Key=obj["Key"])["Body"].read()
            out[obj["Key"][len(prefix):]] = body
    return out
