"""Store layout shared by publishing and reading: shard numbers, snapshot pointer, manifests."""
from __future__ import annotations

import hashlib
import json
import os
import shutil
import threading
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import ArtifactError

FORMAT = "labeler-store/4"  # 2: 16 KiB pages, history_len on every topic row; 3: delta layers per shard;
#                             4: size and SHA-256 of every file in the manifest
PAGE_SIZE = 16384
NEVER = np.iinfo("int64").min


def shard_of(user_id: str, shards: int) -> int:
    """Stable shard number of a user id (BLAKE2b, independent of Python's hash seed)."""
    return int.from_bytes(hashlib.blake2b(user_id.encode("utf-8", "surrogatepass"), digest_size=8).digest(),
                          "little") % shards


def shard_files(manifest: dict, shard: str) -> list[str]:
    """The files of one shard, oldest first: its base file, then its delta layers."""
    return [shard, *manifest.get("deltas", {}).get(shard, [])]


def file_record(path: Path) -> dict:
    """Size and SHA-256 of a file, as the manifest records it."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while chunk := fh.read(1 << 20):
            h.update(chunk)
    return {"bytes": path.stat().st_size, "sha256": h.hexdigest()}


_VERIFIED: dict[tuple, str] = {}  # (device, inode, size, mtime) -> SHA-256 this process has checked
_VERIFIED_LOCK = threading.Lock()


def check_file(path: Path, record: dict | None, *, content: bool = True) -> Path:
    """``path`` after checking it against its manifest record: the size on every call, and with
    ``content`` the SHA-256, once per file and process (hard links that later snapshots share are
    not read again)."""
    try:
        st = path.stat()
    except FileNotFoundError:
        raise ArtifactError(f"{path.parent}: file '{path.name}' is missing; the snapshot is damaged. "
                            "Publish again.") from None
    if record is None:
        raise ArtifactError(f"{path}: the snapshot manifest records no checksum for this file; the snapshot is "
                            "damaged. Publish again.")
    if st.st_size != record["bytes"]:
        raise ArtifactError(f"{path}: {st.st_size:,} bytes where the snapshot recorded {record['bytes']:,} "
                            "(truncated or overwritten); the snapshot is damaged. Publish a new snapshot, "
                            "e.g. `labeler run --full`, or restore the store folder from a backup.")
    if not content:
        return path
    key = (st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns)
    with _VERIFIED_LOCK:
        if _VERIFIED.get(key) == record["sha256"]:
            return path
    if file_record(path)["sha256"] != record["sha256"]:
        raise ArtifactError(f"{path}: checksum differs from the one recorded at publish; the file is damaged "
                            "and is not served. Publish a new snapshot, e.g. `labeler run --full`, or restore "
                            "the store folder from a backup.")
    with _VERIFIED_LOCK:
        _VERIFIED[key] = record["sha256"]
    return path


def user_digest(user_id: str) -> str:
    return hashlib.sha256(user_id.encode("utf-8", "surrogatepass")).hexdigest()


def to_us(ts) -> int | None:
    if ts is None or (isinstance(ts, float) and np.isnan(ts)) or ts is pd.NaT:
        return None
    return int(pd.Timestamp(ts).value // 1000)


def fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def tombstones(root: Path) -> set[str]:
    p = root / "tombstones.json"
    return set(json.loads(p.read_text())) if p.exists() else set()


def current_name(root: Path) -> str:
    try:
        return (root / "CURRENT").read_text().strip()
    except FileNotFoundError:
        raise ArtifactError(f"{root}: not a store (no CURRENT). Publish one with `labeler label --store` "
                            "or labeler.publish_store().") from None


def read_manifest(root: Path, name: str, *, any_format: bool = False) -> dict:
    p = root / "snapshots" / name / "manifest.json"
    try:
        m = json.loads(p.read_text())
    except (FileNotFoundError, json.JSONDecodeError) as exc:
        raise ArtifactError(f"{p}: snapshot manifest missing or unreadable ({exc}). The store is damaged; "
                            "publish a new snapshot.") from None
    if m.get("format") != FORMAT and not any_format:
        raise ArtifactError(f"{p}: unknown store format {m.get('format')!r}; expected {FORMAT!r}. "
                            "Publish a new snapshot with this version of labeler.")
    return m


def clean(root: Path, keep: int) -> None:
    """Remove snapshots beyond the newest ``keep`` (never the current one) and stale temp folders."""
    current = current_name(root)
    snaps = sorted((p for p in (root / "snapshots").iterdir() if p.name.startswith("snap-")), key=lambda p: p.name)
    for p in snaps[:-max(keep, 1)]:
        if p.name != current:
            shutil.rmtree(p, ignore_errors=True)
    for p in (root / "snapshots").glob(".snap-*.tmp"):
        if p.name != f".{current}.tmp":
            shutil.rmtree(p, ignore_errors=True)
