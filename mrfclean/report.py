"""Self-contained HTML reports for a batch or a sweep.

One file, no external resources: images and figures are embedded as PNG
``data:`` URIs, styles are inline, and a Content-Security-Policy forbids the
page from fetching anything else.  For a batch, each image gets its input,
its cleaned result and its uncertainty map side by side, the energy trace of
every chain, its parameters and metrics, and a warning when the chains
disagreed.  For a sweep, each metric is plotted against each swept parameter.

Figures are drawn with matplotlib's object-oriented API on an Agg canvas (no
pyplot, so the caller's backend is never touched).
"""

from __future__ import annotations

import base64
import html
import io as _io
import math
import time
from pathlib import Path

import numpy as np

from . import __version__, io
from .manifest import Manifest, latest_by_image

#: Longest side of an embedded image, in pixels.
THUMB = 320
#: Images shown in full in a batch report (the table lists all of them).
MAX_IMAGES = 200

_CSP = ("default-src 'none'; img-src data:; style-src 'unsafe-inline'; "
        "base-uri 'none'; form-action 'none'")

_STYLE = """
body{font:14px/1.4 system-ui,sans-serif;margin:1.5em;color:#222;background:#fafafa}
h1{font-size:1.5em}h2{font-size:1.2em;margin-top:1.6em}
table{border-collapse:collapse;margin:.5em 0;font-variant-numeric:tabular-nums}
th,td{border:1px solid #ccc;padding:2px 8px;text-align:right}th{background:#eee}
td.t,th.t{text-align:left}
.card{background:#fff;border:1px solid #ddd;border-radius:6px;padding:.8em;margin:1em 0}
.row{display:flex;flex-wrap:wrap;gap:12px;align-items:flex-start}
figure{margin:0}figcaption{font-size:12px;color:#555;text-align:center}
img.px{image-rendering:pixelated;border:1px solid #ccc}
.warn{background:#fff3cd;border:1px solid #e0c060;padding:.4em .7em;border-radius:4px;margin:.3em 0}
.fail{background:#f8d7da;border:1px solid #d08080;padding:.4em .7em;border-radius:4px;margin:.3em 0}
.muted{color:#777}
"""


# ---------------------------------------------------------------------------
# pictures
# ---------------------------------------------------------------------------
def png_data_uri(rgb_or_grey: np.ndarray) -> str:
    """Encode a uint8 array (H, W) or (H, W, 3) as a PNG ``data:`` URI."""
    from PIL import Image

    buf = _io.BytesIO()
    Image.fromarray(np.ascontiguousarray(rgb_or_grey)).save(buf, format="PNG", optimize=True)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _plane(a: np.ndarray) -> np.ndarray:
    a = np.asarray(a)
    return a[a.shape[0] // 2] if a.ndim == 3 else a


def display_range(a: np.ndarray) -> tuple[float, float]:
    """Intensities shown as black and white: 0..255 for 8-bit images (0..1 when they
    only hold 0 and 1, and for bool), else the image's own range."""
    a = np.asarray(a)
    top = float(np.max(a)) if a.size else 0.0
    if a.dtype == np.bool_ or (a.dtype.kind in "ui" and top <= 1):
        return 0.0, 1.0
    if a.dtype == np.uint8:
        return 0.0, 255.0
    return float(np.min(a)), top


def display_uint8(a: np.ndarray, *, lo=None, hi=None) -> np.ndarray:
    """Scale an image (or a stack's middle plane) to uint8: [lo, hi] to [0, 255]
    (default :func:`display_range`)."""
    a = _plane(a)
    if lo is None or hi is None:
        lo, hi = display_range(a)
    if a.dtype == np.uint8 and (lo, hi) == (0.0, 255.0):
        return a
    w = a.astype(np.float64)
    span = hi - lo
    if not span > 0:
        return np.zeros(w.shape, np.uint8)
    return np.clip(np.round((w - lo) / span * 255.0), 0, 255).astype(np.uint8)


def colour_map(a: np.ndarray, *, lo=0.0, hi=None, cmap="magma") -> np.ndarray:
    """An uncertainty map as RGB uint8 with a matplotlib colour map."""
    from matplotlib import colormaps

    a = _plane(a).astype(np.float64)
    hi = float(np.max(a)) if hi is None else hi
    span = hi - lo
    x = np.clip((a - lo) / span, 0, 1) if span > 0 else np.zeros_like(a)
    return (colormaps[cmap](x)[..., :3] * 255).round().astype(np.uint8)


def thumbnail(a: np.ndarray, size: int = THUMB) -> np.ndarray:
    """Shrink (never enlarge) so the longest side is at most ``size``; nearest neighbour."""
    h, w = a.shape[:2]
    step = max(1, math.ceil(max(h, w) / size))
    return a[::step, ::step]


def _figure_uri(fig) -> str:
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    canvas = FigureCanvasAgg(fig)
    buf = _io.BytesIO()
    canvas.print_png(buf)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def energy_figure(trace: dict) -> str:
    """Energy against sweep for each chain (the manifest's ``energy_trace``), as a data URI."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=(4.2, 2.4), dpi=90, layout="constrained")
    ax = fig.add_subplot()
    sweeps = trace["sweep"]
    for c, energy in enumerate(trace["energy"]):
        ax.plot(sweeps, [float(e) for e in energy], lw=1, label=f"chain {c + 1}")
    ax.set_xlabel("sweep")
    ax.set_ylabel("energy")
    if len(trace["energy"]) > 1:
        ax.legend(fontsize=7, frameon=False)
    ax.tick_params(labelsize=7)
    return _figure_uri(fig)


def curve_figure(xs, series: dict, *, xlabel: str, ylabel: str, log_x=False,
                 ticklabels=None) -> str:
    """One line per series (label -> y values over ``xs``), as a data URI."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=(4.2, 2.8), dpi=90, layout="constrained")
    ax = fig.add_subplot()
    for label, ys in series.items():
        ax.plot(xs, ys, marker="o", ms=3, lw=1, label=str(label))
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    if log_x:
        ax.set_xscale("log")
    if ticklabels is not None:
        ax.set_xticks(list(xs), [str(t) for t in ticklabels])
    if len(series) > 1:
        ax.legend(fontsize=7, frameon=False)
    ax.tick_params(labelsize=7)
    return _figure_uri(fig)


# ---------------------------------------------------------------------------
# HTML pieces
# ---------------------------------------------------------------------------
def _esc(x) -> str:
    return html.escape(str(x), quote=True)


def _fmt(v) -> str:
    if v is None:
        return ""
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        if math.isnan(v) or math.isinf(v):
            return str(v)
        return f"{v:.4g}"
    return str(v)


def html_table(rows, columns=None) -> str:
    """A list of dicts as an HTML table (text columns left-aligned)."""
    rows = list(rows)
    if columns is None:
        columns = []
        for r in rows:
            columns.extend(k for k in r if k not in columns)
    text = {c for c in columns if any(isinstance(r.get(c), str) for r in rows)}
    head = "".join(f'<th class="{"t" if c in text else ""}">{_esc(c)}</th>' for c in columns)
    body = "".join(
        "<tr>" + "".join(f'<td class="{"t" if c in text else ""}">{_esc(_fmt(r.get(c)))}</td>'
                         for c in columns) + "</tr>" for r in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _img(uri, caption, *, pixelated=True, alt=None) -> str:
    cls = ' class="px"' if pixelated else ""
    return (f'<figure><img{cls} src="{uri}" alt="{_esc(alt or caption)}">'
            f"<figcaption>{_esc(caption)}</figcaption></figure>")


def _page(title, body) -> str:
    stamp = time.strftime("%Y-%m-%d %H:%M")
    return (f'<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
            f'<meta http-equiv="Content-Security-Policy" content="{_CSP}">'
            f'<meta name="viewport" content="width=device-width, initial-scale=1">'
            f"<title>{_esc(title)}</title><style>{_STYLE}</style></head><body>"
            f"<h1>{_esc(title)}</h1>{body}"
            f'<p class="muted">mrfclean {__version__}, {stamp}</p></body></html>\n')


def _write(path, text) -> Path:
    with io.atomic_output(path, overwrite=True) as tmp:
        Path(tmp).write_text(text, encoding="utf-8")
    return Path(path)


# ---------------------------------------------------------------------------
# batch report
# ---------------------------------------------------------------------------
def _chains_disagree(entry) -> bool:
    return (entry.get("diagnostics") or {}).get("chains_agree") is False


def _image_card(entry, outdir: Path) -> str:
    rel = entry["relpath"]
    figs, problems = [], []
    lo = hi = None
    try:
        src = io.read_image(entry["input"]).array
        lo, hi = display_range(src)  # input and result shown on the same scale
        figs.append(_img(png_data_uri(thumbnail(display_uint8(src, lo=lo, hi=hi))), "input"))
    except Exception as exc:  # the input may have moved since the run; say so, go on
        problems.append(f"input not shown: {' '.join(str(exc).split())}")
    outputs = entry.get("outputs") or {}
    try:
        out = io.read_image(outdir / outputs["image"]).array
        figs.append(_img(png_data_uri(thumbnail(display_uint8(out, lo=lo, hi=hi))), "cleaned"))
    except Exception as exc:
        problems.append(f"result not shown: {' '.join(str(exc).split())}")
    for name, caption, lo, hi in (("p_on", "P(on)", 0.0, 1.0), ("std", "posterior std", 0.0, None)):
        if name in outputs:
            try:
                m = io.read_image(outdir / outputs[name]).array
                figs.append(_img(png_data_uri(thumbnail(colour_map(m, lo=lo, hi=hi))),
                                 f"{caption} (max {float(np.max(m)):.3g})"))
            except Exception as exc:
                problems.append(f"{caption} not shown: {' '.join(str(exc).split())}")
    if not any(k in outputs for k in ("p_on", "std")):
        problems.append("no uncertainty map (run with --maps)")
    trace = entry.get("energy_trace")
    if trace and trace.get("energy"):
        figs.append(_img(energy_figure(trace), "energy trace", pixelated=False))
    d, p, m = entry.get("diagnostics") or {}, entry.get("params") or {}, entry.get("metrics") or {}
    facts = {"kind": entry.get("kind"), "estimate": str(entry.get("method", "")).upper()}
    for k in ("coupling", "flip_rate", "sigma", "strength", "curvature"):
        if isinstance(p.get(k), (int, float)):
            facts[k] = p[k]
    if p.get("prior_family"):
        facts["prior"] = p["prior_family"]
    facts.update({"R-hat": d.get("rhat"), "final energy": d.get("final_energy"),
                  "seconds": entry.get("seconds")})
    from .batch import mc_error_of

    mc = mc_error_of(d)
    if mc is not None:
        facts["Monte-Carlo error / posterior sd"] = mc
    facts.update(m)
    warn = ""
    if _chains_disagree(entry):
        also = (f" The mean's Monte-Carlo error is {_fmt(mc)} of its posterior sd;"
                " more kept sweeps shrink it." if mc is not None else "")
        warn += (f'<div class="warn">Chains disagree (R-hat {_fmt(d.get("rhat"))}): '
                 f"run longer or check the parameters before trusting this result.{also}</div>")
    for note in d.get("notes") or []:
        if "disagree" not in note:
            warn += f'<div class="warn">{_esc(note)}</div>'
    if entry.get("metrics_error"):
        warn += f'<div class="warn">metrics: {_esc(entry["metrics_error"])}</div>'
    for text in problems:
        warn += f'<div class="muted">{_esc(text)}</div>'
    anchor = "img-" + "".join(ch if ch.isalnum() else "-" for ch in rel)
    return (f'<div class="card" id="{_esc(anchor)}"><h2>{_esc(rel)}'
            f' <span class="muted">({_esc(entry["status"])})</span></h2>{warn}'
            f'<div class="row">{"".join(figs)}</div>{html_table([facts])}</div>')


def batch_report(outdir, *, entries=None, path=None, max_images: int = MAX_IMAGES) -> Path:
    """Write the HTML report of a batch from its output folder.

    Parameters
    ----------
    outdir : path
        The batch's output folder (with ``manifest.jsonl``).
    entries : list of dict, optional
        Image entries to show (default: the latest of each image in the manifest).
    path : path, optional
        Where to write (default ``outdir/report.html``).
    max_images : int
        Images shown with pictures; the table lists every one.

    Returns
    -------
    Path
        The report.

    Raises
    ------
    ValueError
        The folder has no manifest entries.
    """
    outdir = Path(outdir)
    if entries is None:
        entries = list(latest_by_image(Manifest(outdir).read()).values())
    if not entries:
        raise ValueError(f"no batch recorded in {outdir} (no manifest entries)")
    path = Path(path) if path is not None else outdir / "report.html"
    ok = [e for e in entries if e.get("status") in ("done", "skipped")]
    failed = [e for e in entries if e.get("status") == "failed"]
    disagree = [e for e in ok if _chains_disagree(e)]
    counts = {"images": len(entries), "done": sum(e["status"] == "done" for e in entries),
              "skipped": sum(e["status"] == "skipped" for e in entries), "failed": len(failed),
              "chains disagree": len(disagree)}
    body = [html_table([counts])]
    if disagree:
        body.append('<div class="warn">Chains did not agree for: '
                    + ", ".join(_esc(e["relpath"]) for e in disagree) + "</div>")
    for e in failed:
        body.append(f'<div class="fail">{_esc(e["relpath"])}: {_esc(e.get("error", "failed"))}</div>')
    from .batch import SUMMARY_COLUMNS, summary_rows

    rows = summary_rows(entries)
    columns = [c for c in SUMMARY_COLUMNS if any(r.get(c) not in (None, "") for r in rows)]
    body.append("<h2>All images</h2>" + html_table(rows, columns))
    metric_names = [k for k in ("psnr", "ssim", "error_rate", "dice", "iou")
                    if any(isinstance((e.get("metrics") or {}).get(k), float) for e in ok)]
    if metric_names and len(ok) > 1:
        means = {"": "mean"}
        for k in metric_names:
            vals = [e["metrics"][k] for e in ok if isinstance((e.get("metrics") or {}).get(k), float)
                    and math.isfinite(e["metrics"][k])]
            means[k] = float(np.mean(vals)) if vals else None
        body.append("<h2>Metrics</h2>" + html_table([means]))
    shown = ok[:max_images]
    if len(ok) > len(shown):
        body.append(f'<p class="muted">Pictures for the first {len(shown)} of {len(ok)} images.</p>')
    body.extend(_image_card(e, outdir) for e in shown)
    return _write(path, _page(f"mrfclean batch report: {outdir.name}", "".join(body)))


# ---------------------------------------------------------------------------
# sweep report
# ---------------------------------------------------------------------------
def sweep_report(table, path, *, title="mrfclean parameter sweep") -> Path:
    """Write the HTML report of a sweep (:class:`mrfclean.sweep.SweepTable`).

    Shows the best setting per metric, a curve of each metric (mean over
    images) against each swept parameter, and the full table.
    """
    body = []
    best = table.best()
    if best:
        body.append("<h2>Best setting per metric</h2>" + html_table(
            [{"metric": k, "best": v["value"], **v["setting"]} for k, v in best.items()]))
    for fig_uri, caption in sweep_figures(table):
        body.append(_img(fig_uri, caption, pixelated=False))
    failed = [r for r in table.rows if r.get("status") != "done"]
    for r in failed:
        body.append(f'<div class="fail">{_esc(r.get("image"))} (setting {r.get("setting")}): '
                    f'{_esc(r.get("error", "failed"))}</div>')
    disagree = [r for r in table.rows if r.get("chains_agree") is False]
    if disagree:
        body.append(f'<div class="warn">Chains disagreed in {len(disagree)} of {len(table.rows)} runs '
                    "(see the chains_agree column).</div>")
    body.append("<h2>Mean over images</h2>" + html_table(table.means()))
    body.append("<h2>Every run</h2>" + html_table(table.rows))
    return _write(path, _page(title, "".join(body)))


def sweep_figures(table) -> list[tuple[str, str]]:
    """(data URI, caption) of each metric against each swept parameter.

    With more than one swept parameter, the other parameters' values label
    the lines (one line per combination).
    """
    means = table.means()
    params = table.swept
    metrics = [m for m in table.metrics if any(isinstance(r.get(m), float) for r in means)]
    figs = []
    for p in params:
        others = [q for q in params if q != p]
        for m in metrics:
            groups: dict = {}
            for r in means:
                label = ", ".join(f"{q}={_fmt(r.get(q))}" for q in others) or m
                groups.setdefault(label, []).append((r.get(p), r.get(m)))
            series, xs_all = {}, None
            numeric = all(isinstance(x, (int, float)) for g in groups.values() for x, _ in g)
            for label, pts in groups.items():
                pts = sorted(pts, key=lambda t: t[0]) if numeric else pts
                xs = [x for x, _ in pts]
                if xs_all is None:
                    xs_all = xs
                if xs != xs_all:
                    continue
                series[label] = [y if isinstance(y, float) else float("nan") for _, y in pts]
            if not series:
                continue
            x_plot = xs_all if numeric else list(range(len(xs_all)))
            uri = curve_figure(x_plot, series, xlabel=p, ylabel=m,
                               ticklabels=None if numeric else xs_all)
            figs.append((uri, f"{m} against {p}"))
    return figs


def save_sweep_plots(table, folder) -> list[Path]:
    """Write each curve of :func:`sweep_figures` as ``METRIC_vs_PARAM.png`` in ``folder``."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    written = []
    for uri, caption in sweep_figures(table):
        metric, param = caption.split(" against ")
        safe = "".join(ch if ch.isalnum() or ch in "_-" else "_" for ch in f"{metric}_vs_{param}")
        path = folder / f"{safe}.png"
        data = base64.b64decode(uri.split(",", 1)[1])
        with io.atomic_output(path, overwrite=True) as tmp:
            Path(tmp).write_bytes(data)
        written.append(path)
    return written
