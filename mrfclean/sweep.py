"""Parameter sweeps: run a grid (or a list) of settings over noisy/reference pairs.

>>> import numpy as np
>>> from skimage.data import binary_blobs
>>> clean = binary_blobs(32, volume_fraction=0.4, rng=0)
>>> noisy = clean ^ (np.random.default_rng(0).random(clean.shape) < 0.1)
>>> table = run_sweep({"blobs": (noisy, clean)}, grid={"coupling": [0.5, 0.9]},
...                   base=Settings(burn_in=5, samples=10), workers=1)
>>> [r["coupling"] for r in table.means()]
[0.5, 0.9]
>>> sorted(table.best())
['dice', 'error_rate', 'iou', 'psnr', 'ssim']

Every (setting, image) run uses the image's own seed, derived from the sweep
seed and the image's name and *the same for every setting* (common random
numbers): differences between settings are then not blurred by different
random streams.  Runs go to the same executors as a batch
(:mod:`mrfclean.pool`, :mod:`mrfclean.cluster`).
"""

from __future__ import annotations

import csv
import dataclasses
import io as _io
import itertools
import json
import math
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import io
from .batch import exception_line, image_seed
from .clean import Settings, clean
from .diagnostics import ChainsDisagree
from .manifest import jsonable
from .pool import make_executor

#: Metrics where larger is better; the others (error_rate, mse) are better smaller.
HIGHER_IS_BETTER = {"psnr": True, "ssim": True, "dice": True, "iou": True,
                    "error_rate": False, "mse": False}


@dataclass(frozen=True)
class SweepTask:
    setting: int
    overrides: dict
    settings: Settings
    image: str
    noisy: object       # path or array
    reference: object   # path or array
    seed: int
    data_range: float | None
    colour: str | None


def _load(x, colour):
    if isinstance(x, (str, Path)):
        return io.read_image(x, colour=colour).array
    return np.asarray(x)


def sweep_task(task: SweepTask) -> dict:
    """Clean one image with one setting and score it; never raises for a bad run."""
    from .metrics import score

    t0 = time.perf_counter()
    row = {"setting": task.setting, **task.overrides, "image": task.image}
    try:
        noisy = _load(task.noisy, task.colour)
        ref = _load(task.reference, task.colour)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ChainsDisagree)  # recorded as chains_agree
            result = clean(noisy, settings=task.settings, rng=task.seed)
        metrics = score(ref, result.estimate, data_range=task.data_range)
    except io.InputError as exc:
        return {**row, "status": "failed", "error": exc.message, "seconds": time.perf_counter() - t0}
    except Exception as exc:  # noqa: BLE001 - one failed run must not stop the sweep
        return {**row, "status": "failed", "error": f"{type(exc).__name__}: {' '.join(str(exc).split())}",
                "seconds": time.perf_counter() - t0}
    d = result.diagnostics
    row.update({"status": "done", **metrics, "rhat": d.rhat, "chains_agree": d.chains_agree,
                "final_energy": d.final_energy, "mc_error": d.mc_error})
    for k in ("coupling", "flip_rate", "sigma", "strength", "curvature"):
        v = result.params.get(k)
        if isinstance(v, (int, float)) and k not in task.overrides:
            row[f"used_{k}"] = float(v)
    if "prior_family" in result.params and task.overrides.get("prior", "auto") == "auto":
        row["used_prior"] = result.params["prior_family"]
    row["seconds"] = time.perf_counter() - t0
    return jsonable(row)


@dataclass
class SweepTable:
    """The result of a sweep: one row per (setting, image) run.

    Attributes
    ----------
    rows : list of dict
        ``setting`` (index), the swept parameters, ``image``, ``status``,
        the metrics, ``rhat``, ``chains_agree``, ``final_energy``, ``mc_error``
        (greyscale; see :class:`mrfclean.estimates.Diagnostics`), the values
        used for estimated parameters (``used_coupling`` ...), ``seconds``.
    settings : list of dict
        The overrides of each setting, by index.
    swept : list of str
        Parameters that vary between settings.
    metrics : list of str
        Metric columns present.
    """

    rows: list
    settings: list
    swept: list
    metrics: list = field(default_factory=list)

    def means(self) -> list[dict]:
        """One row per setting: its parameters and the mean of each metric over images.

        A setting with a failed run has ``failed`` > 0 and means over the rest.
        """
        out = []
        for i, overrides in enumerate(self.settings):
            rows = [r for r in self.rows if r["setting"] == i]
            done = [r for r in rows if r.get("status") == "done"]
            m = {"setting": i, **overrides, "images": len(done), "failed": len(rows) - len(done)}
            for k in self.metrics + ["rhat", "mc_error", "seconds"]:
                vals = [r[k] for r in done if isinstance(r.get(k), float) and math.isfinite(r[k])]
                m[k] = float(np.mean(vals)) if vals else None
            m["chains_agree"] = all(r.get("chains_agree") is not False for r in done) if done else None
            out.append(m)
        return out

    def best(self, metrics=None) -> dict:
        """Best setting per metric (by the mean over images): ``{metric: {"index", "setting", "value"}}``.

        Larger is better for PSNR, SSIM, Dice and IoU; smaller for error rate
        and MSE.  Settings with failed runs are not eligible.
        """
        means = [m for m in self.means() if m["failed"] == 0 and m["images"] > 0]
        out = {}
        for k in metrics or self.metrics:
            cand = [m for m in means if isinstance(m.get(k), float)]
            if not cand:
                continue
            pick = max if HIGHER_IS_BETTER.get(k, True) else min
            b = pick(cand, key=lambda m: m[k])
            out[k] = {"index": b["setting"], "setting": dict(self.settings[b["setting"]]),
                      "value": b[k]}
        return out

    def columns(self) -> list[str]:
        cols = []
        for r in self.rows:
            cols.extend(k for k in r if k not in cols)
        return cols

    def to_csv(self, path) -> Path:
        """Every run as CSV (written atomically)."""
        cols = self.columns()
        buf = _io.StringIO()
        w = csv.DictWriter(buf, fieldnames=cols, lineterminator="\n")
        w.writeheader()
        for r in self.rows:
            w.writerow({k: ("" if r.get(k) is None else _csv_value(r.get(k))) for k in cols})
        with io.atomic_output(path, overwrite=True) as tmp:
            Path(tmp).write_text(buf.getvalue())
        return Path(path)

    def to_json(self, path) -> Path:
        """Runs, settings, means and best settings as one JSON document (written atomically)."""
        doc = jsonable({"swept": self.swept, "metrics": self.metrics, "settings": self.settings,
                        "rows": self.rows, "means": self.means(), "best": self.best()})
        with io.atomic_output(path, overwrite=True) as tmp:
            Path(tmp).write_text(json.dumps(doc, indent=1, allow_nan=False))
        return Path(path)

    @classmethod
    def from_json(cls, path) -> "SweepTable":
        doc = json.loads(Path(path).read_text())
        return cls(doc["rows"], doc["settings"], doc["swept"], doc["metrics"])


def _csv_value(v):
    if isinstance(v, (list, tuple)):
        return " ".join(str(x) for x in v)
    return v


def expand_grid(grid: dict) -> list[dict]:
    """Every combination of a grid ``{param: [values]}``, first parameter slowest.

    >>> expand_grid({"coupling": [0.5, 1.0], "method": ["map", "mpm"]})[1]
    {'coupling': 0.5, 'method': 'mpm'}
    """
    if not grid:
        return [{}]
    names = list(grid)
    for n in names:
        if isinstance(grid[n], (str, bytes)) or not hasattr(grid[n], "__iter__"):
            raise ValueError(f"grid values for {n!r} must be a list, got {grid[n]!r}")
    return [dict(zip(names, combo)) for combo in itertools.product(*(list(grid[n]) for n in names))]


def _settings_for(base: Settings, overrides: dict) -> Settings:
    fields = {f.name for f in dataclasses.fields(Settings)}
    unknown = set(overrides) - fields
    if unknown:
        raise ValueError(f"unknown setting(s) {', '.join(sorted(unknown))}; known: {', '.join(sorted(fields))}")
    o = {k: (tuple(v) if isinstance(v, list) else v) for k, v in overrides.items()}
    return base.replace(**o)


def _named_pairs(pairs) -> list[tuple[str, object, object]]:
    if isinstance(pairs, dict):
        return [(str(k), v[0], v[1]) for k, v in pairs.items()]
    out, seen = [], set()
    for i, (noisy, ref) in enumerate(pairs):
        name = Path(noisy).name if isinstance(noisy, (str, Path)) else f"pair{i}"
        if name in seen:
            name = f"{name}#{i}"
        seen.add(name)
        out.append((name, noisy, ref))
    return out


def run_sweep(pairs, *, grid: dict | None = None, settings=None, base: Settings | None = None,
              seed: int = 0, workers=None, threads=None, scheduler=None, local_cluster=None,
              executor=None, data_range=None, colour=None, progress=False) -> SweepTable:
    """Clean every pair with every setting, in parallel, and score against the references.

    Parameters
    ----------
    pairs : dict name -> (noisy, reference), or iterable of (noisy, reference)
        Paths or arrays.
    grid : dict, optional
        ``{setting: [values]}``; every combination is run (:func:`expand_grid`).
    settings : list of dict, optional
        An explicit list of overrides instead of a grid.
    base : Settings, optional
        What the overrides apply to (default ``Settings()``).
    seed : int
        Sweep seed; each image's seed is derived from it and the image's name.
    workers, threads, scheduler, local_cluster, executor
        Where the runs go, as for :func:`mrfclean.batch.run_batch`.
    data_range : float, optional
        For PSNR/SSIM of float images.
    colour : str, optional
        Conversion of colour files to one channel.
    progress : bool
        Progress bar over runs.

    Returns
    -------
    SweepTable
    """
    if grid is not None and settings is not None:
        raise ValueError("give a grid or a list of settings, not both")
    base = base or Settings()
    overrides = expand_grid(grid) if grid is not None else [dict(s) for s in (settings or [{}])]
    resolved = [_settings_for(base, o) for o in overrides]
    named = _named_pairs(pairs)
    if not named:
        raise ValueError("no image pairs to sweep over")
    swept = []
    for o in overrides:
        swept.extend(k for k in o if k not in swept)
    swept = [k for k in swept if len({json.dumps(jsonable(o.get(k))) for o in overrides}) > 1] or swept
    tasks = [SweepTask(i, jsonable(o), s, name, noisy, ref, image_seed(seed, name), data_range, colour)
             for i, (o, s) in enumerate(zip(overrides, resolved)) for name, noisy, ref in named]
    own_executor = executor is None
    if executor is None:
        n = min(workers or _cores(), len(tasks))
        executor = make_executor(n, threads, scheduler=scheduler, local_cluster=local_cluster)
    from .progress import progress_bar

    rows = [None] * len(tasks)
    try:
        with progress_bar(total=len(tasks), enabled=progress, desc="runs", unit="run") as bar:
            for i, value in executor.run(sweep_task, tasks):
                if isinstance(value, BaseException):
                    t = tasks[i]
                    value = {"setting": t.setting, **t.overrides, "image": t.image,
                             "status": "failed", "error": exception_line(value)}
                rows[i] = value
                bar.update(1)
    finally:
        if own_executor:
            executor.close()
    metrics = [k for k in ("psnr", "ssim", "error_rate", "dice", "iou")
               if any(k in r for r in rows)]
    return SweepTable(rows, [jsonable(o) for o in overrides], swept, metrics)


def _cores():
    from .pool import cpu_count

    return cpu_count()


# ---------------------------------------------------------------------------
# sweep specs (TOML)
# ---------------------------------------------------------------------------
SPEC_KEYS = {"seed", "workers", "threads", "scheduler", "local_cluster", "output", "data_range",
             "colour", "base", "grid", "settings", "pairs"}


@dataclass
class SweepSpec:
    """A sweep read from TOML (see :func:`load_spec`)."""

    pairs: list
    base: Settings
    grid: dict | None = None
    settings: list | None = None
    seed: int = 0
    workers: int | None = None
    threads: int | None = None
    scheduler: str | None = None
    local_cluster: int | None = None
    output: Path = Path("sweep_out")
    data_range: float | None = None
    colour: str | None = None

    def run(self, *, progress=False) -> SweepTable:
        return run_sweep(self.pairs, grid=self.grid, settings=self.settings, base=self.base,
                         seed=self.seed, workers=self.workers, threads=self.threads,
                         scheduler=self.scheduler, local_cluster=self.local_cluster,
                         data_range=self.data_range, colour=self.colour, progress=progress)


def _expand_pairs(entry, folder: Path, where: str) -> list[tuple[Path, Path]]:
    import glob as _glob

    if not isinstance(entry, dict) or "noisy" not in entry or "reference" not in entry:
        raise ValueError(f"{where}: needs 'noisy' and 'reference'")
    unknown = set(entry) - {"noisy", "reference", "replace"}
    if unknown:
        raise ValueError(f"{where}: unknown key {sorted(unknown)[0]!r}")
    noisy = str(entry["noisy"])
    pattern = noisy if Path(noisy).is_absolute() else str(folder / noisy)
    replace = entry.get("replace")
    if replace is not None and (not isinstance(replace, list) or len(replace) != 2):
        raise ValueError(f"{where}: replace must be [old, new]")
    matches = sorted(_glob.glob(pattern)) if set("*?[") & set(noisy) else [pattern]
    if not matches:
        raise ValueError(f"{where}: no files match {noisy!r}")
    out = []
    for m in matches:
        p = Path(m)
        stem = p.stem.replace(*replace) if replace else p.stem
        ref = str(entry["reference"]).format(stem=stem, name=p.name, suffix=p.suffix)
        ref_path = Path(ref) if Path(ref).is_absolute() else folder / ref
        out.append((p, ref_path))
    return out


def load_spec(path) -> SweepSpec:
    """Read a sweep spec.

    Layout (paths relative to the spec file)::

        seed = 0
        workers = 2                 # or scheduler = "tcp://host:8786", or local_cluster = 2
        output = "sweep_out"

        [base]                      # Settings shared by every run
        burn_in = 100

        [grid]                      # every combination ...
        coupling = [0.6, 0.8, 1.0]
        method = ["map", "mpm"]

        # ... or an explicit list instead of [grid]:
        # [[settings]]
        # coupling = 0.8

        [[pairs]]
        noisy = "scans/colony_noisy.png"
        reference = "refs/colony_clean.png"

        [[pairs]]                   # many at once: a pattern and a reference template
        noisy = "scans/*_noisy.png"
        reference = "refs/{stem}.png"   # {stem}, {name}, {suffix} of the noisy file
        replace = ["_noisy", "_clean"]  # applied to {stem} first

    Raises
    ------
    ValueError
        With the file name and what is wrong.
    """
    from .config import ConfigError, tomllib

    path = Path(path)
    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError:
        raise ConfigError(path, "no such sweep spec") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(path, f"not valid TOML ({exc})") from None
    unknown = set(data) - SPEC_KEYS
    if unknown:
        raise ConfigError(path, f"unknown key {sorted(unknown)[0]!r}; known: {', '.join(sorted(SPEC_KEYS))}")
    if "grid" in data and "settings" in data:
        raise ConfigError(path, "give [grid] or [[settings]], not both")
    folder = path.parent
    try:
        base = _settings_for(Settings(), data.get("base", {}))
        pairs = []
        for i, entry in enumerate(data.get("pairs", [])):
            pairs.extend(_expand_pairs(entry, folder, f"pairs[{i}]"))
        if not pairs:
            raise ValueError("no [[pairs]]")
        grid = data.get("grid")
        if grid is not None:
            for o in expand_grid(grid):
                _settings_for(base, o)  # check every combination now, not in a worker
        settings = data.get("settings")
        for o in settings or []:
            _settings_for(base, o)
    except (ValueError, TypeError) as exc:
        raise ConfigError(path, str(exc)) from None
    out = Path(data.get("output", "sweep_out"))
    return SweepSpec(pairs, base, grid, settings, int(data.get("seed", 0)), data.get("workers"),
                     data.get("threads"), data.get("scheduler"), data.get("local_cluster"),
                     out if out.is_absolute() else folder / out, data.get("data_range"),
                     data.get("colour"))


def write_sweep(table: SweepTable, folder) -> dict:
    """Write ``sweep.csv``, ``sweep.json``, one PNG per curve and ``report.html`` into ``folder``."""
    from .report import save_sweep_plots, sweep_report

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    return {"csv": table.to_csv(folder / "sweep.csv"), "json": table.to_json(folder / "sweep.json"),
            "plots": save_sweep_plots(table, folder), "report": sweep_report(table, folder / "report.html")}
