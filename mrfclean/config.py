"""Run configuration from a TOML file, with command-line flags on top.

A config file has up to two tables; every key is optional::

    [settings]            # model and sampler: the fields of mrfclean.clean.Settings
    coupling = 0.9        # a number, or "auto" to estimate it
    method = "map"
    sweeps = 300

    [batch]               # how the batch runs: the fields of mrfclean.batch.BatchOptions
    workers = 4
    recursive = true
    seed = 7
    reference = "refs/"

:func:`resolve` merges, in increasing priority, the built-in defaults, the
file and the flags that were given, and says where each value came from
(:attr:`Resolved.sources`); :meth:`Resolved.effective` is what a batch records
in its manifest.
"""

from __future__ import annotations

import dataclasses
import numbers
from dataclasses import dataclass, field
from pathlib import Path

try:  # Python 3.11+
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib

from .batch import BatchOptions
from .clean import KINDS, METHODS, PRIORS, Settings
from .schedules import SCHEDULES


class ConfigError(ValueError):
    """A problem in a config file, printed as ``path: what is wrong``."""

    def __init__(self, path, message):
        self.path = str(path)
        self.message = " ".join(str(message).split())
        super().__init__(f"{self.path}: {self.message}")


# -- value checks: each returns the clean value or raises ValueError(message) ----------
def _number(v):
    if isinstance(v, bool) or not isinstance(v, numbers.Real):
        raise ValueError(f"expected a number, got {v!r}")
    return float(v)


def _number_or_auto(v):
    if v == "auto":
        return "auto"
    try:
        return _number(v)
    except ValueError:
        raise ValueError(f"expected a number or \"auto\", got {v!r}") from None


def _int(minimum):
    def check(v):
        if isinstance(v, bool) or not isinstance(v, numbers.Integral):
            raise ValueError(f"expected a whole number, got {v!r}")
        if v < minimum:
            raise ValueError(f"expected at least {minimum}, got {v}")
        return int(v)
    return check


def _optional(check):
    def inner(v):
        return None if v is None else check(v)
    return inner


def _bool(v):
    if not isinstance(v, bool):
        raise ValueError(f"expected true or false, got {v!r}")
    return v


def _choice(options):
    def check(v):
        if v not in options:
            raise ValueError(f"expected one of {', '.join(map(str, options))}, got {v!r}")
        return v
    return check


def _text(v):
    if not isinstance(v, str):
        raise ValueError(f"expected a string, got {v!r}")
    return v


def _levels(v):
    if v == "auto":
        return "auto"
    if not isinstance(v, (list, tuple)) or len(v) != 3:
        raise ValueError(f"expected [low, high, sigma] or \"auto\", got {v!r}")
    return tuple(_number(x) for x in v)


def _maps(v):
    return None if v in (None, "auto") else _bool(v)


SETTINGS_CHECKS = {
    "kind": _choice(KINDS), "method": _choice(METHODS),
    "noise": _choice(("auto", "flip", "gaussian", "poisson-gaussian")),
    "coupling": _number_or_auto, "coupling_z": _number_or_auto, "flip_rate": _number_or_auto,
    "levels": _levels, "sigma": _number_or_auto, "strength": _number_or_auto,
    "curvature": _number_or_auto, "prior": _choice(PRIORS),
    "schedule": _choice(sorted(SCHEDULES)), "t_start": _number, "t_end": _number,
    "sweeps": _optional(_int(1)), "burn_in": _optional(_int(0)), "samples": _optional(_int(1)),
    "chains": _int(1), "boundary": _choice(("free", "periodic")),
    "uncertainty": _bool, "certify": _bool,
}

BATCH_CHECKS = {
    "workers": _optional(_int(1)), "threads": _optional(_int(1)), "recursive": _bool,
    "maps": _maps, "colour": _optional(_text), "max_pixels": _int(1), "overwrite": _bool,
    "redo": _bool, "seed": _int(0), "reference": _optional(_text),
    "data_range": _optional(_number), "report": _bool, "progress": _bool, "sweep_bar": _bool,
    "scheduler": _optional(_text), "local_cluster": _optional(_int(1)),
}

def _settings_checks() -> dict:
    """A check for every Settings field; fields without a specific one pass as given
    (``Settings`` validates them itself)."""
    return {f.name: SETTINGS_CHECKS.get(f.name, _as_given) for f in dataclasses.fields(Settings)}


def _as_given(v):
    return v


def _check_table(path, table_name, table, checks):
    if not isinstance(table, dict):
        raise ConfigError(path, f"[{table_name}] must be a table")
    out = {}
    for key, value in table.items():
        name = key.replace("-", "_")
        if name not in checks:
            raise ConfigError(path, f"[{table_name}] unknown key {key!r}; known: {', '.join(sorted(checks))}")
        try:
            out[name] = checks[name](value)
        except ValueError as exc:
            raise ConfigError(path, f"[{table_name}] {key}: {exc}") from None
    return out


def load_config(path) -> dict:
    """Read and check a config file; returns ``{"settings": {...}, "batch": {...}}``.

    Relative paths in ``[batch] reference`` are taken relative to the file's folder.

    Raises
    ------
    ConfigError
        Missing or unparseable file, unknown table or key, or a value of the wrong type.
    """
    path = Path(path)
    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError:
        raise ConfigError(path, "no such config file") from None
    except OSError as exc:
        raise ConfigError(path, f"cannot read ({exc.strerror or exc})") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(path, f"not valid TOML ({exc})") from None
    unknown = set(data) - {"settings", "batch"}
    if unknown:
        raise ConfigError(path, f"unknown table or key {sorted(unknown)[0]!r}; use [settings] and [batch]")
    settings = _check_table(path, "settings", data.get("settings", {}), _settings_checks())
    batch = _check_table(path, "batch", data.get("batch", {}), BATCH_CHECKS)
    if batch.get("reference") is not None and not Path(batch["reference"]).is_absolute():
        batch["reference"] = str(path.parent / batch["reference"])
    return {"settings": settings, "batch": batch}


@dataclass
class Resolved:
    """Settings and batch options after merging defaults, a config file and flags."""

    settings: Settings
    options: BatchOptions
    config_file: str | None = None
    sources: dict = field(default_factory=dict)  # "settings.coupling" -> "default" | "file" | "flag"

    def effective(self) -> dict:
        """JSON-ready record of the configuration and where each value came from."""
        return {"settings": self.settings.as_dict(), "batch": dataclasses.asdict(self.options),
                "config_file": self.config_file, "sources": dict(self.sources)}


def resolve(flags: dict | None = None, config_file=None) -> Resolved:
    """Merge built-in defaults < config file < flags.

    Parameters
    ----------
    flags : dict
        Values given on the command line, keyed by Settings / BatchOptions
        field name; a value of ``None`` means "not given" (except that nothing
        on the command line can set a field back to ``None``).
    config_file : path, optional

    Examples
    --------
    >>> r = resolve({"coupling": 0.8, "workers": 2})
    >>> r.settings.coupling, r.options.workers, r.sources["settings.coupling"]
    (0.8, 2, 'flag')
    """
    flags = {k: v for k, v in (flags or {}).items() if v is not None}
    settings_checks = _settings_checks()
    unknown = set(flags) - set(settings_checks) - set(BATCH_CHECKS)
    if unknown:
        raise ValueError(f"unknown option(s): {', '.join(sorted(unknown))}")
    from_file = load_config(config_file) if config_file is not None else {"settings": {}, "batch": {}}
    values = {"settings": {}, "batch": {}}
    sources = {}
    for table, cls, checks in (("settings", Settings, settings_checks), ("batch", BatchOptions, BATCH_CHECKS)):
        for f in dataclasses.fields(cls):
            name = f.name
            if name in flags:
                values[table][name] = checks[name](flags[name]) if table == "settings" else flags[name]
                sources[f"{table}.{name}"] = "flag"
            elif name in from_file[table]:
                values[table][name] = from_file[table][name]
                sources[f"{table}.{name}"] = "file"
            else:
                sources[f"{table}.{name}"] = "default"
    try:
        settings = Settings(**values["settings"])
    except ValueError as exc:
        raise ConfigError(config_file or "options", str(exc)) from None
    return Resolved(settings, BatchOptions(**values["batch"]),
                    str(config_file) if config_file is not None else None, sources)
