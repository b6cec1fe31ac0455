"""Shipping decoded telemetry batches from the gateways to central object storage."""

from __future__ import annotations

import asyncio
import gzip
import json
import logging
import random
import time
from pathlib import Path
from typing import List, Optional, Protocol

log = logging.getLogger(__name__)


class StorageClient(Protocol):
    async def put_object(self, bucket: str, key: str, body: bytes) -> None:
        """Store ``body`` under ``key`` in the given bucket."""
        ...


class TransientStorageError(Exception):
    """The storage endpoint timed out or answered with a 5xx status."""


def batch_key(gateway_id: str, started_at: float) -> str:
    """Build the object key a telemetry batch is stored under, partitioned by day."""
    day = time.strftime("%Y/%m/%d", time.gmtime(started_at))
    return f"telemetry/{day}/{gateway_id}-{int(started_at)}.json.gz"


def encode_batch(records: List[dict]) -> bytes:
    """Serialise a list of dock status records as gzip-compressed JSON lines."""
    lines = "\n".join(json.dumps(r, separators=(",", ":")) for r in records)
    return gzip.compress(lines.encode("utf-8"))


async def push_batch_with_backoff(
    client: StorageClient,
    bucket: str,
    key: str,
    body: bytes,
    max_attempts: int = 5,
    base_delay: float = 0.5,
) -> int:
    """Send one telemetry batch to the storage bucket, trying again if the upload fails.

    Between attempts it sleeps for an exponentially growing delay with a bit
    of random jitter, so that many gateways recovering from an outage do not
    all hammer storage at once. Returns the number of attempts used and
    re-raises the last error when every attempt failed.
    """
    for attempt in range(1, max_attempts + 1):
        try:
            await client.put_object(bucket, key, body)
            return attempt
        except TransientStorageError as exc:
            if attempt == max_attempts:
                log.error("giving up on %s after %d attempts", key, attempt)
                raise
            delay = base_delay * (2 ** (attempt - 1)) * (1 + random.random() * 0.2)
            log.warning("upload of %s failed (%s), next try in %.1fs", key, exc, delay)
            await asyncio.sleep(delay)
    raise AssertionError("unreachable")


async def drain_upload_queue(client: StorageClient, bucket: str, spool: "BatchSpool", parallel: int = 4) -> int:
    """Ship every batch waiting in the local spool, a few at a time, deleting each once stored."""
    gate = asyncio.Semaphore(parallel)

    async def ship(path: Path) -> bool:
        """Send a single spooled file once a slot is free and delete it when done."""
        async with gate:
            try:
                await push_batch_with_backoff(client, bucket, path.name, path.read_bytes())
            except TransientStorageError:
                return False
            path.unlink()
            return True

    results = await asyncio.gather(*(ship(p) for p in spool.pending()))
    return sum(results)


class BatchSpool:
    """Local on-disk buffer so telemetry is not lost while storage is unreachable."""

    def __init__(self, directory: Path, max_files: int = 10_000):
        """Use ``directory`` as the spool, creating it if needed."""
        self.directory = directory
        self.max_files = max_files
        self.directory.mkdir(parents=True, exist_ok=True)

    def write(self, key: str, body: bytes) -> Path:
        """Save a batch to the spool directory, dropping the oldest file if the spool is full."""
        existing = self.pending()
        if len(existing) >= self.max_files:
            log.warning("spool full, discarding %s", existing[0].name)
            existing[0].unlink()
        path = self.directory / key.replace("/", "_")
        path.write_bytes(body)
        return path

    def pending(self) -> List[Path]:
        return sorted(self.directory.glob("*.json.gz"), key=lambda p: p.stat().st_mtime)

    def oldest_age(self, now: Optional[float] = None) -> Optional[float]:
        """Return how old, in seconds, the oldest unsent batch is."""
        files = self.pending()
        if not files:
            return None
        now = time.time() if now is None else now
        return now - files[0].stat().st_mtime
