"""Where bundles live: a folder under the registry root (the default), or an S3-compatible object
store shared by every replica.

In the object store a bundle is content-addressed and immutable: its files go under
``<prefix>/bundles/<digest>/`` where the digest is the SHA-256 of every file's relative path and
bytes, so an upload that a crash cut short is only unreferenced objects, never a half-written
version (the registry's index row, which names the digest, is written after the upload). Each
replica keeps a local copy of the bundles it serves under ``<registry>/cache/<digest>/`` (fetched on
first use into a temporary folder, then renamed into place), because a bundle's arrays are
memory-mapped.
"""
from __future__ import annotations

import hashlib
import os
import shutil
import tempfile
import threading
from pathlib import Path
from urllib.parse import urlparse

S3_PREFIX = "s3:"  # the index's path column for a bundle in the object store: "s3:<digest>"


def bundle_digest(folder: Path) -> str:
    """SHA-256 over the sorted relative paths and bytes of every file under `folder`."""
    h = hashlib.sha256()
    for path in sorted(p for p in folder.rglob("*") if p.is_file()):
        rel = path.relative_to(folder).as_posix().encode()
        h.update(len(rel).to_bytes(4, "big") + rel)
        with open(path, "rb") as f:
            for block in iter(lambda: f.read(1 << 20), b""):
                h.update(block)
    return h.hexdigest()


class ObjectStore:
    """Bundles in an S3 bucket (`url` = s3://bucket/prefix; `endpoint` for S3-compatible servers);
    credentials and region come from the usual AWS_* variables."""

    def __init__(self, url: str, *, cache: Path, endpoint: str | None = None):
        import boto3

        parsed = urlparse(url)
        if parsed.scheme != "s3" or not parsed.netloc:
            raise ValueError(f"store_url: {url!r} is not an s3://bucket/prefix URL")
        self.bucket, self.prefix = parsed.netloc, parsed.path.strip("/")
        self.cache = Path(cache)
        self._s3 = boto3.client("s3", endpoint_url=endpoint or None)
        self._fetch_lock = threading.Lock()

    def _key(self, digest: str, rel: str = "") -> str:
        return "/".join(p for p in (self.prefix, "bundles", digest, rel) if p)

    def put(self, folder: Path) -> str:
        """Upload the bundle in `folder` (skipped when that content is already stored); its index path."""
        digest = bundle_digest(folder)
        for path in sorted(p for p in folder.rglob("*") if p.is_file()):
            self._s3.upload_file(str(path), self.bucket, self._key(digest, path.relative_to(folder).as_posix()))
        return S3_PREFIX + digest

    def local(self, stored: str) -> Path:
        """The local copy of a stored bundle, fetched on first use."""
        digest = stored.removeprefix(S3_PREFIX)
        final = self.cache / digest
        if final.is_dir():
            return final
        with self._fetch_lock:
            if final.is_dir():
                return final
            self.cache.mkdir(parents=True, exist_ok=True)
            tmp = Path(tempfile.mkdtemp(prefix=f".{digest[:12]}-", dir=self.cache))
            try:
                pages = self._s3.get_paginator("list_objects_v2").paginate(Bucket=self.bucket,
                                                                            Prefix=self._key(digest) + "/")
                for page in pages:
                    for obj in page.get("Contents", []):
                        rel = obj["Key"][len(self._key(digest)) + 1:]
                        (tmp / rel).parent.mkdir(parents=True, exist_ok=True)
                        self._s3.download_file(self.bucket, obj["Key"], str(tmp / rel))
                if bundle_digest(tmp) != digest:
                    raise OSError(f"bundle {digest} in the object store is incomplete or altered")
                os.rename(tmp, final)
            finally:
                shutil.rmtree(tmp, ignore_errors=True)
        return final

    def remove(self, stored: str) -> None:
        """Delete a stored bundle's objects and the local copy (the caller checks no version uses it)."""
        digest = stored.removeprefix(S3_PREFIX)
        pages = self._s3.get_paginator("list_objects_v2").paginate(Bucket=self.bucket, Prefix=self._key(digest) + "/")
        for page in pages:
            keys = [{"Key": obj["Key"]} for obj in page.get("Contents", [])]
            if keys:
                self._s3.delete_objects(Bucket=self.bucket, Delete={"Objects": keys})
        shutil.rmtree(self.cache / digest, ignore_errors=True)
