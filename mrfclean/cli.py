"""Command line: ``mrfclean clean``, ``mrfclean score`` and ``mrfclean report``.

A thin layer: it parses arguments, merges them with a config file
(:mod:`mrfclean.config`), calls :func:`mrfclean.batch.run_batch`,
:func:`mrfclean.batch.score_folders` or :func:`mrfclean.report.batch_report`,
and prints.  Problems with a file are printed as ``path: what went wrong`` on
stderr, one line each, and make the exit status non-zero; ``--debug`` shows
tracebacks too.
"""

from __future__ import annotations

import argparse
import signal
import sys

from . import __version__, io
from .clean import KINDS, METHODS, PRIORS
from .schedules import SCHEDULES

EXIT_OK, EXIT_FAILED, EXIT_USAGE, EXIT_INTERRUPTED = 0, 1, 2, 130

CLEAN_EPILOG = """\
examples:
  mrfclean clean sample_images/colony_noisy.png -o cleaned/
  mrfclean clean scans/ -o cleaned/ --recursive --workers 4
  mrfclean clean 'scans/**/*.tif' -o cleaned/ --recursive --reference refs/ --report
  mrfclean clean scans/ -o cleaned/ --config run.toml --coupling 0.9
  mrfclean clean scans/ -o cleaned/ --scheduler tcp://10.0.0.5:8786

Folders give their TIFF and PNG files; the output folder mirrors the input tree.
Everything not given is estimated from each image. Inputs are never modified;
existing outputs are not replaced unless --overwrite is given. OUTDIR gets a
manifest (manifest.jsonl) and a summary (summary.csv); running the same command
again skips the images already done and does the rest.
"""

SCORE_EPILOG = """\
examples:
  mrfclean score cleaned/colony_noisy.png sample_images/colony_clean.png
  mrfclean score cleaned/ refs/ --recursive --csv scores.csv

Folders are matched by relative path (or by a unique file name).
"""

REPORT_EPILOG = """\
example:
  mrfclean report cleaned/            # writes cleaned/report.html
"""

#: Command-line names of the BatchOptions fields.  An option whose ``dest`` is the
#: name of a Settings field (e.g. ``--coupling`` -> ``coupling``) sets that field;
#: adding a setting to the command line needs nothing more than its ``add_argument``.
BATCH_FLAGS = ("workers", "threads", "recursive", "maps", "colour", "max_pixels", "overwrite",
               "redo", "seed", "reference", "data_range", "report", "progress", "sweep_bar",
               "scheduler", "local_cluster")


# ---------------------------------------------------------------------------
# argument types
# ---------------------------------------------------------------------------
def _auto_or_float(text):
    if text == "auto":
        return "auto"
    try:
        return float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number or 'auto', got {text!r}") from None


def _whole_number_at_least(low, words):
    def parse(text):
        try:
            v = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
        if v < low:
            raise argparse.ArgumentTypeError(f"expected {words}, got {v}")
        return v
    return parse


_positive_int = _whole_number_at_least(1, "a positive whole number")
_count = _whole_number_at_least(0, "zero or more")


def _positive_float(text):
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not v > 0:
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}")
    return v


# ---------------------------------------------------------------------------
# option groups (defaults are None: "not given", so a config file can set them)
# ---------------------------------------------------------------------------
def add_model_options(p):
    """Options shared by every command that cleans (model, sampler, seed).

    An option whose ``dest`` is a :class:`~mrfclean.clean.Settings` field sets that
    field (flags override the config file); give it ``default=None``.
    """
    m = p.add_argument_group("model")
    m.add_argument("--kind", choices=KINDS,
                   help="binary or grey model (default auto: binary for two-level images)")
    m.add_argument("--estimate", dest="method", choices=METHODS,
                   help="map: most probable image; mpm: each pixel's most probable level; "
                        "mean: posterior mean (default: mpm for binary, mean for grey)")
    m.add_argument("--noise", choices=("auto", "flip", "gaussian", "poisson-gaussian"),
                   help="noise model (default: flip for two-level images, gaussian otherwise)")
    m.add_argument("--coupling", type=_auto_or_float, metavar="BETA",
                   help="pixel coupling of the binary prior (default: estimated)")
    m.add_argument("--coupling-z", type=_auto_or_float, metavar="BETA",
                   help="coupling between planes of a stack (default: estimated)")
    m.add_argument("--flip-rate", type=_auto_or_float, metavar="P",
                   help="probability that a pixel was flipped (binary, default: estimated)")
    m.add_argument("--levels", type=float, nargs=3, metavar=("LOW", "HIGH", "SIGMA"),
                   help="two-level Gaussian data term for grey scans of bi-level specimens")
    m.add_argument("--sigma", type=_auto_or_float,
                   help="grey: noise standard deviation in image units (default: estimated)")
    m.add_argument("--gain", type=_auto_or_float, metavar="A",
                   help="grey, Poisson-Gaussian noise: variance = A * signal + B (default: estimated)")
    m.add_argument("--read-variance", type=_auto_or_float, metavar="B",
                   help="grey, Poisson-Gaussian noise: the signal-independent variance B")
    m.add_argument("--strength", type=_auto_or_float,
                   help="grey: prior strength multiplier (default: chosen by SURE)")
    m.add_argument("--curvature", type=_auto_or_float,
                   help="grey: weight of the smooth-ramp (second-difference) term "
                        "(default: chosen by SURE with the smooth prior, 0 when it does not help "
                        "and with the textured and blocks priors)")
    m.add_argument("--prior", choices=PRIORS,
                   help="grey: smooth (flat or slowly varying regions between edges: cells, "
                        "phantoms; SURE may add the smooth-ramp term), blocks (potentials on "
                        "2 x 2 blocks: texture and fine detail; 2-D only) or textured (the "
                        "pairwise prior tuned for texture) (default auto: smooth or, for an "
                        "image no smoother than the training images, blocks (textured for a "
                        "volume), and blocks after all when SURE prefers them to smooth without "
                        "the ramp term; smooth when --strength or --curvature is set)")
    m.add_argument("--boundary", choices=("free", "periodic"), help="lattice boundary (default free)")
    m.add_argument("--stack", choices=("volume", "planes"),
                   help="a stack of planes is one 3-D volume, z coupling from the voxel size "
                        "(default), or planes cleaned one by one")
    m.add_argument("--tile", type=_positive_int, metavar="SIZE",
                   help="clean in tiles of SIZE pixels, reading and writing uncompressed TIFF band "
                        "by band (memory bounded; binary: same result as untiled; grey: tiles "
                        "with a margin, equal to untiled within Monte-Carlo error; the tiles of a single "
                        "grey image run on the workers); without it, grey images whose planes have more "
                        "than 2^25 pixels are tiled at 1024")
    s = p.add_argument_group("sampler")
    s.add_argument("--schedule", choices=sorted(SCHEDULES),
                   help="annealing schedule for --estimate map (default geometric)")
    s.add_argument("--t-start", type=float, metavar="T", help="start temperature (default 3.0)")
    s.add_argument("--t-end", type=float, metavar="T", help="end temperature (default 0.05)")
    s.add_argument("--sweeps", type=_positive_int, help="annealing sweeps per chain")
    s.add_argument("--burn-in", type=_count, help="sweeps discarded per temperature-1 chain")
    s.add_argument("--samples", type=_positive_int, help="sweeps kept per temperature-1 chain")
    s.add_argument("--chains", type=_positive_int,
                   help="independent chains (default 2; greyscale: 5 temperature-1 chains, "
                        "2 annealing chains)")
    s.add_argument("--seed", type=_count,
                   help="run seed; each image's seed is derived from it and the image's relative "
                        "path (default 0: runs repeat exactly)")
    s.add_argument("--certify", action="store_true", default=None,
                   help="binary MAP: compute the exact MAP energy by minimum cut and report the gap")


def add_batch_options(p):
    """Where inputs come from, where results go, and how the work is spread."""
    b = p.add_argument_group("inputs and outputs")
    b.add_argument("-o", "--output", required=True, metavar="OUTDIR", help="folder for the results")
    b.add_argument("-c", "--config", metavar="TOML",
                   help="config file with [settings] and [batch] tables; flags override it")
    b.add_argument("-r", "--recursive", action="store_true", default=None,
                   help="descend into sub-folders (and let ** match folders in patterns)")
    b.add_argument("--maps", action=argparse.BooleanOptionalAction,
                   help="write uncertainty maps as float32 TIFF beside each result: P(on) and "
                        "std for binary, std for grey (default: grey only; on with --report)")
    b.add_argument("--colour", choices=io.COLOUR_CHOICES,
                   help="how to turn a colour image into one channel (colour images are refused without it)")
    b.add_argument("--overwrite", action="store_true", default=None,
                   help="replace existing results in OUTDIR")
    b.add_argument("--redo", action="store_true", default=None,
                   help="clean again the images the manifest shows as done")
    b.add_argument("--max-pixels", type=_positive_int,
                   help=f"refuse images larger than this (default {io.DEFAULT_MAX_PIXELS})")
    b.add_argument("--reference", metavar="DIR",
                   help="folder of clean references (same relative path or name): adds PSNR, SSIM "
                        "and, for binary, error rate / Dice / IoU to the manifest and summary.csv")
    b.add_argument("--data-range", type=_positive_float, metavar="R",
                   help="intensity range for PSNR/SSIM of float images")
    b.add_argument("--report", action="store_true", default=None,
                   help="write OUTDIR/report.html: images, uncertainty maps, energy traces, metrics")
    w = p.add_argument_group("workers")
    w.add_argument("-j", "--workers", type=_positive_int,
                   help="worker processes on this machine (default: every core; 1: in this process)")
    w.add_argument("--threads", type=_positive_int,
                   help="numba threads per worker (default: the cores shared out between workers)")
    w.add_argument("--scheduler", metavar="ADDRESS",
                   help="run the images as tasks on the Dask cluster at ADDRESS (tcp://host:8786)")
    w.add_argument("--local-cluster", type=_positive_int, metavar="N",
                   help="start a local Dask cluster of N worker processes for this run")
    o = p.add_argument_group("display")
    o.add_argument("--progress", action=argparse.BooleanOptionalAction,
                   help="progress bar over images (default: when stderr is a terminal)")
    o.add_argument("--sweep-bar", action="store_true", default=None,
                   help="also show a bar over sweeps (with --workers 1)")
    o.add_argument("-q", "--quiet", action="store_true", help="no line per finished image")
    o.add_argument("--debug", action="store_true", help="show tracebacks")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="mrfclean",
        description="Clean binary and greyscale microscopy scans by sampling a Markov random field posterior.")
    parser.add_argument("--version", action="version", version=f"mrfclean {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    c = sub.add_parser("clean", help="clean images, folders or patterns", epilog=CLEAN_EPILOG,
                       formatter_class=argparse.RawDescriptionHelpFormatter,
                       description="Clean images; results go to OUTDIR under the same relative paths.")
    c.add_argument("inputs", nargs="+", metavar="INPUT",
                   help="TIFF or PNG images, folders, or glob patterns (quote them)")
    add_batch_options(c)
    add_model_options(c)

    s = sub.add_parser("score", help="compare cleaned images with references", epilog=SCORE_EPILOG,
                       formatter_class=argparse.RawDescriptionHelpFormatter,
                       description="Print PSNR, SSIM and, for binary images, error rate, Dice and IoU.")
    s.add_argument("cleaned", metavar="CLEANED", help="an image or a folder")
    s.add_argument("reference", metavar="REFERENCE", help="an image or a folder")
    s.add_argument("-r", "--recursive", action="store_true", help="descend into sub-folders")
    s.add_argument("--csv", metavar="PATH", help="also write the table as CSV")
    s.add_argument("--data-range", type=_positive_float, help="intensity range for PSNR/SSIM (float images)")
    s.add_argument("--debug", action="store_true", help="show tracebacks")

    r = sub.add_parser("report", help="write the HTML report of a finished batch", epilog=REPORT_EPILOG,
                       formatter_class=argparse.RawDescriptionHelpFormatter,
                       description="Write OUTDIR/report.html from OUTDIR's manifest and results.")
    r.add_argument("outdir", metavar="OUTDIR")
    r.add_argument("--output", metavar="HTML", help="where to write the report (default OUTDIR/report.html)")
    r.add_argument("--debug", action="store_true", help="show tracebacks")
    return parser


# ---------------------------------------------------------------------------
# commands
# ---------------------------------------------------------------------------
def _err(message):
    from tqdm import tqdm

    tqdm.write(message, file=sys.stderr)


def _out(message):
    from tqdm import tqdm

    tqdm.write(message, file=sys.stdout)


def _on_sigterm(signum, frame):
    raise KeyboardInterrupt


def run_clean(args) -> int:
    from .batch import FolderBusy, run_batch
    from .config import ConfigError, resolve
    from .pool import ExecutorError

    import dataclasses

    from .clean import Settings

    names = [f.name for f in dataclasses.fields(Settings)] + list(BATCH_FLAGS)
    flags = {name: getattr(args, name) for name in names if hasattr(args, name)}
    if flags.get("levels") is not None:
        flags["levels"] = tuple(flags["levels"])
    if flags["progress"] is None and not (args.config and _config_sets(args.config, "progress")):
        flags["progress"] = sys.stderr.isatty()
    if flags["scheduler"] is not None and flags["local_cluster"] is not None:
        print("mrfclean clean: give --scheduler or --local-cluster, not both", file=sys.stderr)
        return EXIT_USAGE
    try:
        resolved = resolve(flags, args.config)
    except (ConfigError, ValueError) as exc:
        print(str(exc), file=sys.stderr)
        return EXIT_USAGE

    def log(message, error):
        if error:
            _err(message)
        elif not args.quiet:
            _out(message)

    old = signal.signal(signal.SIGTERM, _on_sigterm)
    try:
        summary = run_batch(args.inputs, args.output, settings=resolved.settings,
                            options=resolved.options, log=log, config=resolved.effective())
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except (ExecutorError, FolderBusy) as exc:  # no scheduler there; another run in OUTDIR
        if args.debug:
            raise
        print(str(exc), file=sys.stderr)
        return EXIT_FAILED
    except OSError as exc:  # the output folder itself cannot be written
        if args.debug:
            raise
        print(f"{args.output}: {exc.strerror or exc}", file=sys.stderr)
        return EXIT_FAILED
    finally:
        signal.signal(signal.SIGTERM, old)
    if args.debug:
        for e in summary.entries:
            if e.get("traceback"):
                print(f"{e['input']}:\n{e['traceback']}", file=sys.stderr)
    print(summary.table())
    if summary.interrupted:
        return EXIT_INTERRUPTED
    return EXIT_OK if summary.ok else EXIT_FAILED


def _config_sets(path, key) -> bool:
    from .config import ConfigError, load_config

    try:
        return key in load_config(path)["batch"]
    except ConfigError:
        return False  # resolve() reports it


def run_score(args) -> int:
    from .batch import score_folders
    from .metrics import format_table

    rows, failures = score_folders(args.cleaned, args.reference, recursive=args.recursive,
                                   data_range=args.data_range, debug=args.debug)
    for path, message in failures:
        print(f"{path}: {message}", file=sys.stderr)
    if rows:
        print(format_table(rows))
        if args.csv:
            from .batch import write_rows_csv

            try:
                write_rows_csv(args.csv, rows)
            except OSError as exc:
                print(f"{args.csv}: {exc.strerror or exc}", file=sys.stderr)
                return EXIT_FAILED
    return EXIT_FAILED if failures or not rows else EXIT_OK


def run_report(args) -> int:
    from .report import batch_report

    try:
        path = batch_report(args.outdir, path=args.output)
    except (OSError, ValueError) as exc:
        if args.debug:
            raise
        print(f"{args.outdir}: {' '.join(str(exc).split())}", file=sys.stderr)
        return EXIT_FAILED
    print(path)
    return EXIT_OK


def main(argv=None) -> int:
    """Entry point of the ``mrfclean`` command; returns the exit status.

    When whatever reads the standard output goes away before the summary is
    printed (``mrfclean clean ... | head -1``), the results are already written;
    the command then stops quietly with status 1, as the Python documentation's
    note on SIGPIPE (module ``signal``) recommends, instead of a traceback.
    """
    try:
        status = _main(argv)
        sys.stdout.flush()  # a reader that went away shows here, not at exit
        return status
    except BrokenPipeError:
        import os

        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())  # so the exit's flush of stdout stays quiet
        return EXIT_FAILED


def _main(argv):
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help(sys.stderr)
        return EXIT_USAGE
    if args.command == "clean":
        return run_clean(args)
    if args.command == "score":
        return run_score(args)
    return run_report(args)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
