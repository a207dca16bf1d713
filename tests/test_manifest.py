"""The manifest: whole lines only, a torn last line tolerated, keys that change with the job.

References used here: the JSON-lines convention (one JSON value per line), and
POSIX ``write(2)`` with ``O_APPEND`` (each write's data is appended as one
unit, so concurrent appenders never interleave inside a line); the check with
several processes below is what would fail if lines were written in pieces.
"""

from __future__ import annotations

import hashlib
import json
import math
import multiprocessing

import numpy as np
import pytest

from mrfclean.manifest import (Manifest, ManifestIndex, entry_key, file_hash, jsonable,
                               outputs_valid, read_manifest)


def test_append_and_read_round_trip(tmp_path):
    m = Manifest(tmp_path / "out")
    m.append({"type": "image", "relpath": "a.png", "status": "done", "x": np.float32(0.5)})
    m.append({"type": "image", "relpath": "b.png", "status": "failed", "n": np.int64(3)})
    entries = m.read()
    assert [e["relpath"] for e in entries] == ["a.png", "b.png"]
    assert entries[0]["x"] == 0.5 and entries[1]["n"] == 3
    assert all("time" in e for e in entries)
    # every line is one JSON object (the JSON-lines convention)
    lines = m.path.read_bytes().split(b"\n")
    assert lines[-1] == b"" and all(isinstance(json.loads(x), dict) for x in lines[:-1])


def test_torn_last_line_is_ignored_and_next_entry_starts_fresh(tmp_path):
    m = Manifest(tmp_path)
    m.append({"type": "image", "relpath": "a.png", "status": "done"})
    whole = json.dumps({"type": "image", "relpath": "b.png", "status": "done"}).encode()
    with open(m.path, "ab") as fh:  # what a run killed inside a write would leave
        fh.write(whole[: len(whole) // 2])
    assert [e["relpath"] for e in m.read()] == ["a.png"]
    m.append({"type": "image", "relpath": "c.png", "status": "done"})
    assert [e["relpath"] for e in m.read()] == ["a.png", "c.png"]


def test_missing_manifest_reads_empty(tmp_path):
    assert read_manifest(tmp_path / "nothing.jsonl") == []


def _append_many(folder, tag, n):
    m = Manifest(folder)
    for i in range(n):
        # lines of very different lengths, to make torn or interleaved writes visible
        m.append({"type": "image", "relpath": f"{tag}-{i}", "status": "done", "pad": "x" * (i * 37 % 5000)})


def test_concurrent_appenders_never_interleave(tmp_path):
    ctx = multiprocessing.get_context("spawn")
    procs = [ctx.Process(target=_append_many, args=(str(tmp_path), t, 60)) for t in range(3)]
    for p in procs:
        p.start()
    for p in procs:
        p.join(60)
        assert p.exitcode == 0
    raw = [x for x in tmp_path.joinpath("manifest.jsonl").read_bytes().split(b"\n") if x]
    assert len(raw) == 180
    parsed = [json.loads(x) for x in raw]  # raises if any line was interleaved
    assert sorted(e["relpath"] for e in parsed) == sorted(f"{t}-{i}" for t in range(3) for i in range(60))


def test_jsonable_non_finite_and_arrays():
    out = jsonable({"a": np.array([1.0, np.nan]), "b": (np.inf, -np.inf), "c": np.bool_(True)})
    assert out == {"a": [1.0, "nan"], "b": ["inf", "-inf"], "c": True}
    json.dumps(out, allow_nan=False)  # strictly valid JSON


def test_file_hash_is_sha256_of_the_bytes(tmp_path):
    p = tmp_path / "f.bin"
    data = bytes(range(256)) * 5000
    p.write_bytes(data)
    assert file_hash(p) == "sha256:" + hashlib.sha256(data).hexdigest()  # hashlib as reference


def test_entry_key_changes_with_every_ingredient():
    base = dict(input_hash="sha256:aa", settings={"coupling": 0.8}, seed=1, options={"maps": None})
    k = entry_key(**base)
    assert k == entry_key(**base)
    for change in ({"input_hash": "sha256:ab"}, {"settings": {"coupling": 0.9}}, {"seed": 2},
                   {"options": {"maps": True}}):
        assert entry_key(**{**base, **change}) != k, change


def test_outputs_valid_checks_presence_and_hash(tmp_path):
    out = tmp_path / "r.png"
    out.write_bytes(b"result")
    entry = {"outputs": {"image": "r.png"}, "output_hashes": {"image": file_hash(out)}}
    assert outputs_valid(entry, tmp_path)
    out.write_bytes(b"resulT")
    assert not outputs_valid(entry, tmp_path)
    out.unlink()
    assert not outputs_valid(entry, tmp_path)
    assert not outputs_valid({"outputs": {}, "output_hashes": {}}, tmp_path)


def test_index_finds_done_and_claims(tmp_path):
    (tmp_path / "a.png").write_bytes(b"A")
    entries = [
        {"type": "image", "relpath": "a.png", "key": "k1", "status": "started", "outputs": {"image": "a.png"}},
        {"type": "image", "relpath": "a.png", "key": "k1", "status": "done", "outputs": {"image": "a.png"},
         "output_hashes": {"image": file_hash(tmp_path / "a.png")}},
        {"type": "image", "relpath": "b.png", "key": "k2", "status": "started", "outputs": {"image": "b.png"}},
    ]
    idx = ManifestIndex(entries, tmp_path)
    assert idx.finished("k1")["status"] == "done"
    assert idx.finished("k2") is None
    assert idx.may_replace("b.png", "k2") and not idx.may_replace("b.png", "k1")


@pytest.mark.parametrize("value", [float("nan"), float("inf")])
def test_append_never_writes_invalid_json(tmp_path, value):
    m = Manifest(tmp_path)
    m.append({"v": value})
    line = m.path.read_text().strip()
    assert json.loads(line)["v"] == ("nan" if math.isnan(value) else "inf")
