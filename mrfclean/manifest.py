"""The run manifest: one JSON object per line in the output folder.

Every image a batch touches gets lines in ``OUTDIR/manifest.jsonl``: a
``"started"`` line when it is handed to a worker and a ``"done"``,
``"failed"`` or ``"skipped"`` line when it is settled.  A ``"run"`` line at the
start of every batch records the effective configuration.

Writing is crash-safe: each line is encoded first and written with a single
``os.write`` on a descriptor opened with ``O_APPEND``, then ``fsync``-ed, so a
line is either in the file whole or (if the machine dies inside the write) is
the torn last line, which :func:`read_manifest` ignores.  Only the batch's
parent process writes, so lines never interleave.

A finished image is recognised on a rerun by its *key*: a hash of the input's
content, the settings, the seed and the options that change the outputs
(:func:`entry_key`).  It is skipped only when its outputs are still there and
their recorded SHA-256 hashes still match (:func:`outputs_valid`).
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import time
from pathlib import Path

import numpy as np

MANIFEST_NAME = "manifest.jsonl"

#: Version of the line layout; bump when a field changes meaning.
FORMAT = 1

STATUSES = ("started", "done", "failed", "skipped")

_CHUNK = 1 << 20


def file_hash(path) -> str:
    """SHA-256 of a file's bytes, as ``"sha256:<hex>"``."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while True:
            block = fh.read(_CHUNK)
            if not block:
                break
            h.update(block)
    return "sha256:" + h.hexdigest()


def jsonable(value):
    """``value`` with numpy scalars and arrays, paths, tuples and non-finite floats made JSON-safe.

    Non-finite floats become the strings ``"nan"``, ``"inf"`` and ``"-inf"``
    (JSON has no such numbers); :func:`read_manifest` leaves them as strings.
    """
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return jsonable(value.tolist())
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, (np.floating, float)):
        v = float(value)
        if math.isfinite(v):
            return v
        return "nan" if math.isnan(v) else ("inf" if v > 0 else "-inf")
    if isinstance(value, Path):
        return str(value)
    return value


def entry_key(input_hash: str, settings: dict, seed: int, options: dict) -> str:
    """Hash that identifies one cleaning job: same key, same outputs.

    Parameters
    ----------
    input_hash : str
        :func:`file_hash` of the input.
    settings : dict
        ``Settings.as_dict()``.
    seed : int
        The image's own seed (derived from the run seed and its relative path).
    options : dict
        Options that change what is written (maps, colour conversion, reference).
    """
    blob = json.dumps(jsonable({"input": input_hash, "settings": settings, "seed": seed,
                                "options": options, "format": FORMAT}),
                      sort_keys=True, separators=(",", ":"))
    return "sha256:" + hashlib.sha256(blob.encode()).hexdigest()


class Manifest:
    """Append-only JSON-lines log in an output folder.

    Parameters
    ----------
    folder : path
        The batch's output folder (created if missing).
    name : str
        File name inside ``folder``.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as d:
    ...     m = Manifest(d)
    ...     m.append({"type": "image", "relpath": "a.png", "status": "done"})
    ...     [e["status"] for e in m.read()]
    ['done']
    """

    def __init__(self, folder, name=MANIFEST_NAME):
        self.folder = Path(folder)
        self.path = self.folder / name

    def append(self, entry: dict) -> None:
        """Write ``entry`` as one line: a single ``os.write`` on an ``O_APPEND`` fd, then fsync."""
        entry = dict(entry)
        entry.setdefault("time", time.strftime("%Y-%m-%dT%H:%M:%S%z"))
        line = (json.dumps(jsonable(entry), separators=(",", ":"), allow_nan=False) + "\n").encode()
        self.folder.mkdir(parents=True, exist_ok=True)
        fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o666)
        try:
            self._heal(fd)
            written = os.write(fd, line)
            if written != len(line):  # a short write on a full disk: say so, never half a line
                raise OSError(f"{self.path}: wrote {written} of {len(line)} bytes (disk full?)")
            os.fsync(fd)
        finally:
            os.close(fd)

    def _heal(self, fd) -> None:
        """After a torn last line, start the next entry on a fresh line."""
        size = os.fstat(fd).st_size
        if size == 0:
            return
        with open(self.path, "rb") as fh:
            fh.seek(size - 1)
            if fh.read(1) != b"\n":
                os.write(fd, b"\n")

    def read(self) -> list[dict]:
        """Every whole, parseable line; see :func:`read_manifest`."""
        return read_manifest(self.path)

    def exists(self) -> bool:
        return self.path.exists()


def read_manifest(path) -> list[dict]:
    """Entries of a manifest file, oldest first.

    Lines that do not parse as a JSON object (a torn last line from a run
    killed mid-write, or one cut short by a full disk) are skipped; a missing
    file reads as empty.
    """
    path = Path(path)
    if not path.exists():
        return []
    entries = []
    with open(path, "rb") as fh:
        for raw in fh:
            raw = raw.strip()
            if not raw:
                continue
            try:
                entry = json.loads(raw)
            except (ValueError, UnicodeDecodeError):
                continue
            if isinstance(entry, dict):
                entries.append(entry)
    return entries


def outputs_valid(entry: dict, folder) -> bool:
    """True when every output of a ``done`` entry exists and still has its recorded hash."""
    outputs = entry.get("outputs") or {}
    hashes = entry.get("output_hashes") or {}
    if not outputs or set(outputs) != set(hashes):
        return False
    folder = Path(folder)
    for name, rel in outputs.items():
        p = folder / rel
        try:
            if not p.is_file() or file_hash(p) != hashes[name]:
                return False
        except OSError:
            return False
    return True


class ManifestIndex:
    """What earlier runs in a folder finished and which files they wrote.

    Built once from the manifest's lines at the start of a batch.
    """

    def __init__(self, entries, folder):
        self.folder = Path(folder)
        self.done: dict[str, dict] = {}      # key -> latest done entry
        self.claimed: dict[str, set] = {}    # output relpath -> keys of attempts that may have written it
        for e in entries:
            if e.get("type") != "image":
                continue
            key = e.get("key")
            status = e.get("status")
            if key and status == "done":
                self.done[key] = e
            if key and status in ("started", "done", "failed"):
                for rel in (e.get("outputs") or {}).values():
                    self.claimed.setdefault(rel, set()).add(key)

    def finished(self, key: str) -> dict | None:
        """The done entry for ``key`` if its outputs are present and valid, else None."""
        e = self.done.get(key)
        if e is not None and outputs_valid(e, self.folder):
            return e
        return None

    def may_replace(self, output_relpath: str, key: str) -> bool:
        """True when an existing output was written by an earlier attempt at the same job.

        Such a file (left by a run killed after writing it but before recording
        it, or by an attempt whose outputs no longer check out) would be
        rewritten bit-identically, so it is safe to replace without
        ``overwrite``.
        """
        return key in self.claimed.get(output_relpath, ())


def latest_by_image(entries) -> dict[str, dict]:
    """The last settled (done/failed/skipped) entry of each image, by relative path."""
    out = {}
    for e in entries:
        if e.get("type") == "image" and e.get("status") in ("done", "failed", "skipped"):
            out[e["relpath"]] = e
    return out
