"""Clean many images: collect inputs, mirror the tree, run in parallel, keep a manifest.

:func:`collect_inputs` turns files, folders and glob patterns into a sorted
list of :class:`InputItem` (path and path relative to what was given);
:func:`run_batch` cleans them into an output folder that mirrors the input
tree, on a pool of worker processes (or a Dask cluster), and records every
image in the folder's manifest (:mod:`mrfclean.manifest`).

Nothing lost, nothing redone:

* outputs are written atomically by :func:`mrfclean.clean.clean_file`;
* each image gets a ``started`` line before it runs and a ``done``/``failed``
  line when it ends, so a killed run can be resumed;
* a rerun skips an image when a ``done`` entry has the same key (input
  content, settings, seed, options) and its outputs are present with the
  recorded hashes;
* each image's seed is derived from the run's seed and its relative path
  (:func:`image_seed`), so results are bit-identical whatever the number of
  workers or the order in which they finish.
"""

from __future__ import annotations

import csv
import dataclasses
import functools
import glob
import hashlib
import io as _io
import math
import os
import socket
import time
import traceback
import warnings
from dataclasses import asdict, dataclass, field
from pathlib import Path, PurePosixPath

import numpy as np

from . import __version__, io
from .clean import Settings, clean_file, output_paths, tiles_automatically
from .diagnostics import ChainsDisagree
from .manifest import (MANIFEST_NAME, Manifest, ManifestIndex, entry_key, file_hash, jsonable,
                       latest_by_image)
from .pool import InProcess, WorkerLost, cpu_count, make_executor

SUMMARY_NAME = "summary.csv"
REPORT_NAME = "report.html"

#: Points kept per chain of the energy trace recorded in the manifest.
TRACE_POINTS = 200

_MAGIC = set("*?[")


@dataclass(frozen=True)
class BatchOptions:
    """How a batch runs (everything that is not a model or sampler setting).

    Attributes
    ----------
    workers : int or None
        Local worker processes; ``None``: every core; 1: in this process.
    threads : int or None
        Numba threads per worker; ``None``: the cores shared out between workers.
    recursive : bool
        Descend into sub-folders of input folders (and let ``**`` match in patterns).
    maps : bool or None
        Write uncertainty maps (``None``: grey yes, binary no; on with ``report``).
    colour : str or None
        Conversion of colour images to one channel (refused without it).
    max_pixels : int
        Refuse larger images (decompression-bomb guard).
    overwrite : bool
        Replace existing outputs that the manifest does not account for.
    redo : bool
        Clean again even images the manifest shows as done.
    seed : int
        Run seed; each image's seed is derived from it and its relative path.
    reference : str or None
        Folder of clean references, matched by relative path (or unique name).
    data_range : float or None
        Intensity range for PSNR/SSIM of float images.
    report : bool
        Write ``report.html`` in the output folder.
    progress : bool
        Progress bar over images.
    sweep_bar : bool
        Inner progress bar over sweeps (only when the images run in this process).
    scheduler : str or None
        Dask scheduler address; the batch runs as tasks on that cluster.
    local_cluster : int or None
        Start a local Dask cluster with this many workers.
    """

    workers: int | None = None
    threads: int | None = None
    recursive: bool = False
    maps: bool | None = None
    colour: str | None = None
    max_pixels: int = io.DEFAULT_MAX_PIXELS
    overwrite: bool = False
    redo: bool = False
    seed: int = 0
    reference: str | None = None
    data_range: float | None = None
    report: bool = False
    progress: bool = True
    sweep_bar: bool = False
    scheduler: str | None = None
    local_cluster: int | None = None

    def replace(self, **changes) -> "BatchOptions":
        return dataclasses.replace(self, **changes)


# ---------------------------------------------------------------------------
# inputs
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class InputItem:
    """One input file and its path relative to the folder or pattern base it came from."""

    path: Path
    relpath: str  # POSIX style, used for outputs, seeds and manifest keys


@dataclass
class Collected:
    items: list
    problems: list  # (what was given, message)


def _is_image_name(name: str) -> bool:
    return name.lower().endswith(io.IMAGE_SUFFIXES) and not name.startswith(".")


def _pattern_base(pattern: str) -> Path:
    """The leading part of a glob pattern without wildcards (relative paths start there)."""
    parts = Path(pattern).parts
    base = []
    for part in parts:
        if _MAGIC & set(part):
            break
        base.append(part)
    return Path(*base) if base else Path(".")


def _inside(path: Path, folder: Path | None) -> bool:
    if folder is None:
        return False
    try:
        path.resolve().relative_to(folder)
        return True
    except ValueError:
        return False


def collect_inputs(specs, *, recursive=False, exclude=None) -> Collected:
    """Expand files, folders and glob patterns into input items.

    Parameters
    ----------
    specs : iterable of str or Path
        A file is taken as given (relative path: its name).  A folder gives its
        TIFF and PNG files (with ``recursive``, those of its sub-folders too),
        relative to the folder.  A pattern with ``*``, ``?`` or ``[`` gives the
        matching image files, relative to the pattern's leading folder; ``**``
        matches across folders when ``recursive``.
    recursive : bool
    exclude : path, optional
        A folder whose files are never inputs (the output folder).

    Returns
    -------
    Collected
        ``items`` sorted by relative path, and ``problems``: one
        ``(spec, message)`` for each spec that gave nothing or collided.

    Examples
    --------
    >>> c = collect_inputs(["no/such/folder"])
    >>> c.items, c.problems
    ([], [('no/such/folder', 'no such file or folder')])
    """
    exclude = Path(exclude).resolve() if exclude is not None else None
    items: dict[str, InputItem] = {}
    seen: dict[Path, str] = {}
    problems = []

    def add(path: Path, rel: str, spec):
        real = path.resolve()
        if real in seen:
            return
        if rel in items:
            problems.append((str(path), f"same relative path {rel!r} as {items[rel].path}; "
                                        "outputs would collide (give the folders separately)"))
            return
        seen[real] = rel
        items[rel] = InputItem(path, rel)

    for spec in specs:
        text = str(spec)
        p = Path(text)
        if p.is_dir():
            walker = p.rglob("*") if recursive else p.glob("*")
            found = 0
            for f in sorted(walker):
                if not f.is_file() or not _is_image_name(f.name) or _inside(f, exclude):
                    continue
                if any(part.startswith(".") for part in f.relative_to(p).parts):
                    continue  # hidden folders and our own temporary files
                add(f, PurePosixPath(*f.relative_to(p).parts).as_posix(), text)
                found += 1
            if not found:
                problems.append((text, "folder holds no TIFF or PNG images"
                                       + ("" if recursive else " (add --recursive for sub-folders)")))
        elif p.exists():
            add(p, p.name, text)
        elif _MAGIC & set(text):
            base = _pattern_base(text)
            found = 0
            for m in sorted(glob.glob(text, recursive=recursive)):
                f = Path(m)
                if not f.is_file() or not _is_image_name(f.name) or _inside(f, exclude):
                    continue
                add(f, PurePosixPath(*f.relative_to(base).parts).as_posix(), text)
                found += 1
            if not found:
                problems.append((text, "no TIFF or PNG files match this pattern"))
        else:
            problems.append((text, "no such file or folder"))
    return Collected([items[k] for k in sorted(items)], problems)


def image_seed(run_seed: int, relpath: str) -> int:
    """Seed of one image: a hash of the run seed and its relative path (63 bits).

    Independent of the number of workers, the order of the inputs and the
    folder the run starts from.

    >>> image_seed(0, "a/b.png") == image_seed(0, "a/b.png") != image_seed(1, "a/b.png")
    True
    """
    digest = hashlib.blake2b(f"{int(run_seed)}\x00{relpath}".encode(), digest_size=8).digest()
    return int.from_bytes(digest, "little") & (2**63 - 1)


def find_reference(reference_dir, relpath: str, *, names: dict | None = None) -> Path | None:
    """The reference for an input: same relative path, else same name with any image suffix,
    else the only file in the reference tree with that stem.

    ``names`` (from :func:`reference_names`) saves walking the tree for every image.
    """
    root = Path(reference_dir)
    rel = PurePosixPath(relpath)
    direct = root.joinpath(*rel.parts)
    if direct.is_file():
        return direct
    for suffix in io.IMAGE_SUFFIXES:
        cand = direct.with_suffix(suffix)
        if cand.is_file():
            return cand
    if names is None:
        names = reference_names(root)
    found = names.get(rel.stem, [])
    return found[0] if len(found) == 1 else None


def reference_names(reference_dir) -> dict[str, list[Path]]:
    """Image files under a reference folder, by stem."""
    out: dict[str, list[Path]] = {}
    for f in sorted(Path(reference_dir).rglob("*")):
        if f.is_file() and _is_image_name(f.name):
            out.setdefault(f.stem, []).append(f)
    return out


# ---------------------------------------------------------------------------
# one task (runs in a worker)
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class Task:
    """Everything a worker needs to clean one image (picklable)."""

    path: str
    relpath: str
    outroot: str
    settings: Settings
    seed: int
    maps: bool | None
    colour: str | None
    max_pixels: int
    overwrite: bool
    reference: str | None
    data_range: float | None
    progress: bool = False
    #: None of the outputs existed when the run planned this task, so any found
    #: later were written during this run (see :func:`_same_as_earlier_attempt`).
    fresh: bool = False


def _trace(energy, temperatures, points=TRACE_POINTS):
    e = np.asarray(energy, dtype=np.float64)
    if e.ndim != 2 or e.shape[1] == 0:
        return None
    n = e.shape[1]
    idx = np.unique(np.linspace(0, n - 1, min(points, n)).round().astype(int))
    t = np.asarray(temperatures, dtype=np.float64)
    return {"sweep": (idx + 1).tolist(), "energy": e[:, idx].tolist(),
            "temperature": t[idx].tolist() if t.shape == (n,) else None}


def _one_line(exc) -> str:
    return " ".join(str(exc).split())


def exception_line(exc) -> str:
    """One line for an exception that came back from an executor instead of a result."""
    if isinstance(exc, WorkerLost):
        return _one_line(exc)
    return f"{type(exc).__name__}: {_one_line(exc)}"


def _same_as_earlier_attempt(task: Task, outdir: Path, run):
    """Outputs of a task that an earlier attempt in this run wrote before its worker died.

    A task is retried when its worker process dies, and the worker may have
    died after writing the outputs but before its result came back.  The
    retry cleans again into a scratch folder beside them.  The same seed gives
    the same bytes, so if every output already there is byte-identical to the
    retry's, the outputs are this task's own and the outcome points at them.
    Outputs the earlier attempt had not written yet are moved into place
    without replacing anything.  If any existing file differs, it is not this
    task's and nothing is touched (returns None; the caller reports the
    clash).
    """
    import shutil
    import tempfile

    scratch = Path(tempfile.mkdtemp(prefix=".retry-", dir=outdir))
    try:
        again = run(scratch)
        made = {"image": again.output, **again.maps}
        if any((outdir / p.name).exists() and (outdir / p.name).read_bytes() != p.read_bytes()
               for p in made.values()):
            return None
        for p in made.values():
            if not (outdir / p.name).exists():
                os.link(p, outdir / p.name)  # never replaces: fails if the name was taken
        return dataclasses.replace(again, output=outdir / again.output.name,
                                   maps={k: outdir / Path(v).name for k, v in again.maps.items()})
    finally:
        shutil.rmtree(scratch, ignore_errors=True)


def _tiles_automatically(task: Task) -> bool:
    """:func:`mrfclean.clean.tiles_automatically` for a task; False where the file has a
    problem (its task then reports it)."""
    try:
        return tiles_automatically(task.path, task.settings, colour=task.colour,
                                   max_pixels=task.max_pixels)
    except io.InputError:
        return False


def clean_task(task: Task, tile_executor=None) -> dict:
    """Clean one image and say what happened; never raises for a problem with the image.

    ``tile_executor``: where the tiles of a tiled greyscale image run.
    Returns a JSON-ready dict with ``status`` ``"done"`` or ``"failed"``.
    """
    t0 = time.perf_counter()
    outroot = Path(task.outroot)
    rel = PurePosixPath(task.relpath)
    outdir = outroot.joinpath(*rel.parts[:-1])
    base = {"worker": f"{socket.gethostname()}:{os.getpid()}"}
    def run(target_dir):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ChainsDisagree)  # recorded in the diagnostics
            return clean_file(task.path, target_dir, settings=task.settings, rng=task.seed,
                              maps=task.maps, colour=task.colour, overwrite=task.overwrite,
                              max_pixels=task.max_pixels, progress=task.progress,
                              tile_executor=tile_executor)

    try:
        try:
            outcome = run(outdir)
        except io.OutputExists:
            outcome = _same_as_earlier_attempt(task, outdir, run) if task.fresh else None
            if outcome is None:
                raise
    except io.InputError as exc:
        return {**base, "status": "failed", "error": exc.message,
                "seconds": time.perf_counter() - t0}
    except FileExistsError as exc:
        msg = _one_line(exc)
        prefix = f"{task.path}: "
        return {**base, "status": "failed", "error": msg[len(prefix):] if msg.startswith(prefix) else msg,
                "seconds": time.perf_counter() - t0}
    except MemoryError:
        return {**base, "status": "failed", "error": "out of memory while cleaning",
                "seconds": time.perf_counter() - t0}
    except Exception as exc:  # a bug or an unexpected failure: one line, traceback kept
        return {**base, "status": "failed", "error": f"{type(exc).__name__}: {_one_line(exc)}",
                "traceback": traceback.format_exc(), "seconds": time.perf_counter() - t0}
    r = outcome.result
    files = {"image": outcome.output, **outcome.maps}
    outputs = {k: Path(v).relative_to(outroot).as_posix() for k, v in files.items()}
    entry = {**base, "status": "done", "outputs": outputs,
             "output_hashes": {k: file_hash(v) for k, v in files.items()},
             "kind": r.kind, "method": r.method, "params": jsonable(r.params),
             "diagnostics": jsonable(asdict(r.diagnostics)),
             "energy_trace": jsonable(_trace(r.energy, r.temperatures)),
             "shape": list(r.estimate.shape), "dtype": str(r.estimate.dtype)}
    if task.reference is not None:
        try:
            entry["metrics"] = score_output(outcome.output, task.reference, colour=task.colour,
                                            max_pixels=task.max_pixels, data_range=task.data_range)
        except (io.InputError, ValueError, TypeError) as exc:
            entry["metrics_error"] = _one_line(exc)
    entry["seconds"] = time.perf_counter() - t0
    return entry


# ---------------------------------------------------------------------------
# the batch
# ---------------------------------------------------------------------------
@dataclass
class BatchSummary:
    """What a batch did.

    ``entries`` holds the settled manifest entry of every image of this run
    (done, skipped or failed), in input order; ``failures`` the
    ``(path, message)`` of every failed image or input spec.
    """

    outdir: Path
    done: int = 0
    skipped: int = 0
    failed: int = 0
    interrupted: bool = False
    seconds: float = 0.0
    entries: list = field(default_factory=list)
    failures: list = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return self.failed == 0 and not self.interrupted

    def table(self) -> str:
        from .metrics import format_table

        row = {"done": self.done, "skipped": self.skipped, "failed": self.failed,
               "time (s)": round(self.seconds, 1)}
        if self.interrupted:
            row["interrupted"] = "yes"
        return format_table([row])


def _options_key(task: Task) -> dict:
    """The options that change what is written for an image (part of its key).

    The reference is not among them: it changes the metrics, not the outputs,
    so a finished image is re-scored rather than cleaned again.
    """
    return {"maps": task.maps, "colour": task.colour, "max_pixels": task.max_pixels,
            "relpath": task.relpath}


def score_output(output, reference, *, colour=None, max_pixels=io.DEFAULT_MAX_PIXELS,
                 data_range=None) -> dict:
    """Metrics of a written result against its reference (:func:`mrfclean.metrics.score`).

    Raises
    ------
    InputError, ValueError, TypeError
        Unreadable reference, different shapes, or float data without ``data_range``.
    """
    from .metrics import score

    ref = io.read_image(reference, colour=colour, max_pixels=max_pixels).array
    out = io.read_image(output, max_pixels=max_pixels).array
    if ref.shape != out.shape:
        raise ValueError(f"shape {ref.shape} differs from the reference's {out.shape}")
    return jsonable(score(ref, out, data_range=data_range))


def _candidate_outputs(item: InputItem, outroot: Path) -> dict:
    rel = PurePosixPath(item.relpath)
    outdir = outroot.joinpath(*rel.parts[:-1])
    out, maps = output_paths(item.path, outdir, kind="binary")  # binary: every map grey has too
    files = {"image": out, **maps}
    return {k: Path(v).relative_to(outroot).as_posix() for k, v in files.items()}


def run_batch(inputs, outdir, *, settings: Settings | None = None,
              options: BatchOptions | None = None, executor=None, log=None,
              config: dict | None = None) -> BatchSummary:
    """Clean every input into ``outdir``, mirroring the input tree, with a manifest.

    Parameters
    ----------
    inputs : iterable of str or Path, or of InputItem
        Files, folders and glob patterns (see :func:`collect_inputs`).
    outdir : path
        Output folder (created).  Holds the results, ``manifest.jsonl`` and
        ``summary.csv`` (and ``report.html`` with ``options.report``).
    settings : Settings, optional
    options : BatchOptions, optional
    executor : optional
        Where tasks run (see :mod:`mrfclean.pool`); default from ``options``.
    log : callable, optional
        ``log(message, error)`` for one line per image; ``error`` is True
        for failures (which the caller should print on stderr).
    config : dict, optional
        The effective configuration to record in the manifest's ``run`` line
        (default: ``settings`` and ``options``).

    Returns
    -------
    BatchSummary
        A run interrupted (Ctrl-C, SIGTERM in the command line) while images
        are being cleaned returns with ``interrupted=True`` after recording
        what finished; before that (while inputs are hashed) the
        ``KeyboardInterrupt`` propagates, with nothing yet written but the
        manifest's ``run`` line.

    Raises
    ------
    FolderBusy
        Another batch holds the output folder.
    """
    t0 = time.perf_counter()
    started_at = time.time()
    settings = settings or Settings()
    options = options or BatchOptions()
    if options.report and options.maps is None:
        options = options.replace(maps=True)  # the report shows the uncertainty maps
    outroot = Path(outdir)
    outroot.mkdir(parents=True, exist_ok=True)
    outroot = outroot.resolve()
    summary = BatchSummary(outroot)
    say = log or (lambda message, error: None)

    inputs = list(inputs)
    if inputs and all(isinstance(x, InputItem) for x in inputs):
        collected = Collected(inputs, [])
    else:
        collected = collect_inputs(inputs, recursive=options.recursive, exclude=outroot)
    for spec, message in collected.problems:
        summary.failures.append((spec, message))
        summary.failed += 1
        say(f"{spec}: {message}", True)

    lock = _lock_folder(outroot)  # one batch at a time per output folder
    try:
        return _run_locked(inputs, collected, outroot, summary, settings, options, executor,
                           say, config, t0, started_at)
    finally:
        lock.close()


class FolderBusy(RuntimeError):
    """Another batch is writing to the same output folder."""


def _lock_folder(outroot: Path):
    """Hold an exclusive lock on the folder's manifest for this process.

    An advisory ``flock``: it does not block the appends (which need no lock,
    see :mod:`mrfclean.manifest`), only a second batch.  The kernel releases
    it when the process ends, however it ends.
    """
    fh = open(outroot / MANIFEST_NAME, "ab")
    try:
        import fcntl

        fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
    except ImportError:  # pragma: no cover - not POSIX: no lock, as before
        return fh
    except OSError:
        fh.close()
        raise FolderBusy(f"{outroot}: another mrfclean batch is writing to this folder; "
                         "wait for it or choose another folder") from None
    return fh


def _run_locked(inputs, collected, outroot, summary, settings, options, executor, say, config,
                t0, started_at):
    manifest = Manifest(outroot)
    index = ManifestIndex(manifest.read(), outroot)
    manifest.append({"type": "run", "version": __version__,
                     "config": jsonable(config if config is not None else
                                        {"settings": settings.as_dict(), "batch": asdict(options)}),
                     "inputs": [str(x) for x in inputs], "images": len(collected.items)})
    settings_dict = jsonable(settings.as_dict())

    # Plan: hash inputs, skip finished images, decide what may be replaced.
    plan = []  # (item, task, key, started-entry)
    settled: dict[str, dict] = {}
    ref_root = Path(options.reference) if options.reference else None
    ref_names = None
    for item in collected.items:
        seed = image_seed(options.seed, item.relpath)
        common = {"type": "image", "relpath": item.relpath, "input": str(item.path),
                  "seed": options.seed, "image_seed": seed, "settings": settings_dict}
        try:
            input_hash = file_hash(item.path)
        except OSError as exc:
            entry = {**common, "status": "failed", "error": f"cannot read ({exc.strerror or exc})"}
            manifest.append(entry)
            settled[item.relpath] = entry
            continue
        if ref_root is not None and ref_names is None:
            ref_names = reference_names(ref_root)
        reference = find_reference(ref_root, item.relpath, names=ref_names) if ref_root else None
        ref_hash = file_hash(reference) if reference is not None else None
        task = Task(str(item.path), item.relpath, str(outroot), settings, seed, options.maps,
                    options.colour, options.max_pixels, options.overwrite,
                    str(reference) if reference is not None else None, options.data_range)
        opts = _options_key(task)
        key = entry_key(input_hash, settings_dict, seed, opts)
        common.update(input_hash=input_hash, key=key, options=opts,
                      reference=task.reference, reference_hash=ref_hash)
        if ref_root is not None and reference is None:
            common["metrics_error"] = f"no reference found in {ref_root}"
        finished = None if options.redo else index.finished(key)
        if finished is not None:
            entry = {**finished, "status": "skipped", "done_at": finished.get("time"),
                     "input": str(item.path), "reference": task.reference,
                     "reference_hash": ref_hash}
            entry.pop("time", None)
            entry.pop("metrics_error", None)
            if reference is None:
                entry.pop("metrics", None)
                if "metrics_error" in common:
                    entry["metrics_error"] = common["metrics_error"]
            elif finished.get("reference_hash") != ref_hash or "metrics" not in finished:
                try:  # a new reference: score the finished result, do not clean it again
                    entry["metrics"] = score_output(outroot / finished["outputs"]["image"], reference,
                                                    colour=options.colour, max_pixels=options.max_pixels,
                                                    data_range=options.data_range)
                except (io.InputError, ValueError, TypeError) as exc:
                    entry.pop("metrics", None)
                    entry["metrics_error"] = _one_line(exc)
            manifest.append(entry)
            settled[item.relpath] = entry
            continue
        candidates = _candidate_outputs(item, outroot)
        existing = [rel for rel in candidates.values() if (outroot / rel).exists()]
        # Files left by an earlier attempt at this very job (same key) would be
        # rewritten bit-identically: replace them without asking.
        replace = options.overwrite or bool(existing) and all(
            index.may_replace(rel, key) for rel in existing)
        task = dataclasses.replace(task, overwrite=replace, fresh=not existing)
        plan.append((item, task, key, {**common, "status": "started", "outputs": candidates}))

    def on_start(i):
        manifest.append(plan[i][3])

    own_executor = executor is None
    task_fn = clean_task
    tile_executor = None
    if executor is None and len(plan) == 1 and settings.kind != "binary" and (
            settings.tile is not None or _tiles_automatically(plan[0][1])):
        # one tiled image: read and written here; greyscale tiles share the workers (binary
        # tiles are swept in order, so a binary image leaves the pool unused -- it starts lazily)
        tile_executor = make_executor(options.workers, options.threads,
                                      scheduler=options.scheduler,
                                      local_cluster=options.local_cluster)
        task_fn = functools.partial(clean_task, tile_executor=tile_executor)
        executor = InProcess(threads=options.threads)
    elif executor is None:
        # no more local workers than images: a single image runs here, on every core
        workers = min(options.workers or cpu_count(), max(1, len(plan)))
        executor = make_executor(workers, options.threads, scheduler=options.scheduler,
                                 local_cluster=options.local_cluster)
    if options.sweep_bar and isinstance(executor, InProcess):
        plan = [(item, dataclasses.replace(task, progress=True), key, started)
                for item, task, key, started in plan]
    from .progress import progress_bar

    total = len(collected.items)
    try:
        with progress_bar(total=total, enabled=options.progress and total > 0,
                          desc="images", unit="img") as bar:
            bar.update(len(settled))
            try:
                for i, value in executor.run(task_fn, [p[1] for p in plan], on_start=on_start):
                    item, task, key, started = plan[i]
                    if isinstance(value, BaseException):
                        value = {"status": "failed", "error": exception_line(value)}
                    entry = {**started, **value}
                    if "metrics_error" in started and "metrics" not in value:
                        entry["metrics_error"] = started["metrics_error"]
                    if entry["status"] != "done":
                        entry["outputs"] = {}
                    manifest.append(entry)
                    settled[item.relpath] = entry
                    bar.update(1)
                    if entry["status"] == "done":
                        say(_describe(entry, outroot), False)
                        if entry.get("metrics_error"):
                            say(f"{item.path}: reference: {entry['metrics_error']}", True)
                    else:
                        say(f"{item.path}: {entry.get('error', 'failed')}", True)
            except KeyboardInterrupt:
                summary.interrupted = True
                say("interrupted: finished images are recorded; run the same command "
                    "again to do the rest", True)
    finally:
        if own_executor:
            executor.close()
        if tile_executor is not None:
            tile_executor.close()

    for item in collected.items:
        e = settled.get(item.relpath)
        if e is None:
            continue
        summary.entries.append(e)
        if e["status"] == "done":
            summary.done += 1
        elif e["status"] == "skipped":
            summary.skipped += 1
        else:
            summary.failed += 1
            summary.failures.append((str(item.path), e.get("error", "failed")))
    if not summary.interrupted:
        remove_stale_parts(outroot, older_than=started_at)
    write_summary_csv(outroot / SUMMARY_NAME, summary.entries)
    summary.seconds = time.perf_counter() - t0
    if options.report and summary.entries:
        from .report import batch_report

        batch_report(outroot, entries=summary.entries, path=outroot / REPORT_NAME)
    return summary


def remove_stale_parts(outroot, *, older_than: float) -> int:
    """Delete temporary files left in ``outroot`` by a killed run; return how many.

    They are the hidden ``.NAME.XXXX.partSUFFIX`` files of
    :func:`mrfclean.io.atomic_output`; only those last modified before
    ``older_than`` (the start of this batch, so none of its own) are removed.
    """
    removed = 0
    for p in Path(outroot).rglob(".*.part*"):
        try:
            if p.is_file() and ".part" in p.name and p.stat().st_mtime < older_than:
                p.unlink()
                removed += 1
        except OSError:
            pass
    return removed


def _describe(entry, outroot) -> str:
    p, d = entry.get("params") or {}, entry.get("diagnostics") or {}
    bits = [f"{entry.get('kind')} {str(entry.get('method', '')).upper()}"]
    if "coupling" in p:
        bits.append(f"coupling {p['coupling']:.3g}")
    if "flip_rate" in p:
        bits.append(f"flip rate {p['flip_rate']:.3g}")
    if isinstance(p.get("tile"), list):
        bits.append(f"tiles of {p['tile'][0]} px")
    rhat = d.get("rhat")
    if isinstance(rhat, float):
        bits.append(f"R-hat {rhat:.3f}")
    mc = mc_error_of(d)
    if mc is not None:
        bits.append(f"Monte-Carlo error {mc:.2f} of posterior sd")
    for name, value in (entry.get("metrics") or {}).items():
        if isinstance(value, float):
            bits.append(f"{name} {value:.4g}")
    bits.append(f"{entry.get('seconds', 0):.1f} s")
    outputs = {k: outroot / v for k, v in entry["outputs"].items()}
    extra = "".join(f"\n  {k}: {v}" for k, v in outputs.items() if k != "image")
    return f"{entry['input']} -> {outputs.get('image')} ({', '.join(bits)}){extra}"


# ---------------------------------------------------------------------------
# CSV summary
# ---------------------------------------------------------------------------
def mc_error_of(diagnostics: dict) -> float | None:
    """A manifest entry's ``mc_error`` (greyscale means only), or None where it was not
    estimated (nan, stored as the string "nan", or absent in older entries)."""
    mc = diagnostics.get("mc_error")
    return mc if isinstance(mc, float) and math.isfinite(mc) else None


SUMMARY_COLUMNS = ("relpath", "status", "kind", "method", "coupling", "flip_rate", "sigma",
                   "strength", "curvature", "rhat", "chains_agree", "final_energy", "psnr", "ssim",
                   "error_rate", "dice", "iou", "seconds", "output", "error", "mc_error",
                   "prior")


def summary_rows(entries) -> list[dict]:
    """One flat row per image entry (the columns of ``summary.csv``)."""
    rows = []
    for e in entries:
        p, d, m = e.get("params") or {}, e.get("diagnostics") or {}, e.get("metrics") or {}
        row = {"relpath": e.get("relpath"), "status": e.get("status"), "kind": e.get("kind"),
               "method": e.get("method"), "seconds": e.get("seconds"),
               "output": (e.get("outputs") or {}).get("image"),
               "error": e.get("error") or e.get("metrics_error")}
        for k in ("coupling", "flip_rate", "sigma", "strength", "curvature"):
            v = p.get(k)
            row[k] = v if isinstance(v, (int, float)) else None
        for k in ("rhat", "chains_agree", "final_energy"):
            row[k] = d.get(k)
        row["mc_error"] = mc_error_of(d)
        row["prior"] = p.get("prior_family")  # grey: the shipped prior used (or "given")
        for k in ("psnr", "ssim", "error_rate", "dice", "iou"):
            row[k] = m.get(k)
        rows.append(row)
    return rows


def write_summary_csv(path, entries) -> Path:
    """Write the per-image summary as CSV, atomically (replacing an older one)."""
    return write_rows_csv(path, summary_rows(entries), SUMMARY_COLUMNS)


def batch_entries(outdir) -> list[dict]:
    """The latest settled entry of every image recorded in an output folder's manifest."""
    return list(latest_by_image(Manifest(outdir).read()).values())


# ---------------------------------------------------------------------------
# scoring folders
# ---------------------------------------------------------------------------
#: Names of the maps a batch writes beside each result; not images to score.
MAP_SUFFIXES = ("_p_on.tif", "_std.tif")


def score_folders(cleaned, reference, *, recursive=False, data_range=None,
                  debug=False) -> tuple[list[dict], list[tuple[str, str]]]:
    """Score cleaned images against references: two files, or two folders.

    Folders are matched by relative path (see :func:`find_reference`); the
    uncertainty maps a batch writes (``*_p_on.tif``, ``*_std.tif``) are left out.

    Returns
    -------
    rows : list of dict
        ``{"image", "psnr", "ssim"[, "error_rate", "dice", "iou"]}`` per image,
        then a ``"(mean)"`` row when there are several.
    failures : list of (path, message)
        One per image that could not be scored.
    """
    cleaned, reference = Path(cleaned), Path(reference)
    failures, pairs = [], []
    if cleaned.is_dir() and reference.is_dir():
        collected = collect_inputs([cleaned], recursive=recursive)
        names = reference_names(reference)
        for item in collected.items:
            if item.relpath.endswith(MAP_SUFFIXES):
                continue
            ref = find_reference(reference, item.relpath, names=names)
            if ref is None:
                failures.append((str(item.path), f"no reference in {reference}"))
            else:
                pairs.append((item.relpath, item.path, ref))
        failures.extend(collected.problems)
    elif cleaned.is_dir() or reference.is_dir():
        failures.append((str(cleaned), "give two images or two folders"))
    else:
        pairs.append((cleaned.name, cleaned, reference))
    rows = []
    for name, path, ref in pairs:
        try:
            rows.append({"image": name, **score_output(path, ref, data_range=data_range)})
        except (io.InputError, ValueError, TypeError) as exc:
            if debug:
                raise
            msg = exc.message if isinstance(exc, io.InputError) else _one_line(exc)
            where = exc.path if isinstance(exc, io.InputError) else str(path)
            failures.append((where, msg))
    if len(rows) > 1:
        keys = [k for k in rows[0] if k != "image"]
        mean = {"image": "(mean)"}
        for k in keys:
            vals = [r[k] for r in rows if isinstance(r.get(k), float)]
            mean[k] = float(np.mean(vals)) if vals else None
        rows.append(mean)
    columns = ["image", "psnr", "ssim", "error_rate", "dice", "iou"]
    rows = [{k: r.get(k) for k in columns if any(k in q for q in rows)} for r in rows]
    return rows, failures


def write_rows_csv(path, rows, columns=None) -> Path:
    """Write a list of dicts as CSV, atomically (replacing an older file)."""
    rows = list(rows)
    if columns is None:
        columns = []
        for r in rows:
            columns.extend(k for k in r if k not in columns)
    buf = _io.StringIO()
    w = csv.DictWriter(buf, fieldnames=list(columns), lineterminator="\n", extrasaction="ignore")
    w.writeheader()
    for row in rows:
        w.writerow({k: ("" if row.get(k) is None else row.get(k)) for k in columns})
    with io.atomic_output(path, overwrite=True) as tmp:
        Path(tmp).write_text(buf.getvalue())
    return Path(path)
