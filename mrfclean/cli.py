"""Command line: ``mrfclean clean`` and ``mrfclean score``.

A thin layer: it parses arguments, calls :func:`mrfclean.clean.clean_file` and
:func:`mrfclean.metrics.score`, and reports one line per file.  Problems with a
file are printed as ``path: what went wrong`` on stderr and make the exit
status non-zero; ``--debug`` shows the traceback instead.
"""

from __future__ import annotations

import argparse
import sys
import warnings
from pathlib import Path

from . import __version__, io
from .diagnostics import ChainsDisagree
from .clean import KINDS, METHODS, Settings, clean_file
from .schedules import SCHEDULES

EXIT_OK, EXIT_FAILED, EXIT_USAGE = 0, 1, 2

CLEAN_EPILOG = """\
examples:
  mrfclean clean sample_images/colony_noisy.png -o cleaned/
  mrfclean clean scan.tif -o out/ --estimate map --certify --seed 7
  mrfclean clean scan.tif -o out/ --coupling 0.9 --flip-rate 0.1 --maps

Everything not given is estimated from the image. Inputs are never modified;
existing outputs are not replaced unless --overwrite is given.
"""

SCORE_EPILOG = """\
example:
  mrfclean score cleaned/colony_noisy.png sample_images/colony_clean.png
"""


def _auto_or_float(text):
    if text == "auto":
        return "auto"
    try:
        return float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number or 'auto', got {text!r}") from None


def _positive_int(text):
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if v < 1:
        raise argparse.ArgumentTypeError(f"expected a positive whole number, got {v}")
    return v


def _count(text):
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if v < 0:
        raise argparse.ArgumentTypeError(f"expected zero or more, got {v}")
    return v


def add_model_options(p):
    """Options shared by every command that cleans (model, sampler, seed)."""
    m = p.add_argument_group("model")
    m.add_argument("--kind", choices=KINDS, default="auto",
                   help="binary or grey model (default: binary for two-level images)")
    m.add_argument("--estimate", dest="method", choices=METHODS, default="auto",
                   help="map: most probable image; mpm: each pixel's most probable level; "
                        "mean: posterior mean (default: mpm for binary, mean for grey)")
    m.add_argument("--noise", default="auto",
                   choices=("auto", "flip", "gaussian", "poisson-gaussian"),
                   help="noise model (default: flip for two-level images, gaussian otherwise)")
    m.add_argument("--coupling", type=_auto_or_float, default="auto", metavar="BETA",
                   help="pixel coupling of the binary prior (default: estimated)")
    m.add_argument("--coupling-z", type=_auto_or_float, default="auto", metavar="BETA",
                   help="coupling between planes of a stack (default: estimated)")
    m.add_argument("--flip-rate", type=_auto_or_float, default="auto", metavar="P",
                   help="probability that a pixel was flipped (binary, default: estimated)")
    m.add_argument("--levels", type=float, nargs=3, metavar=("LOW", "HIGH", "SIGMA"),
                   help="two-level Gaussian data term for grey scans of bi-level specimens")
    m.add_argument("--sigma", type=_auto_or_float, default="auto",
                   help="grey: noise standard deviation in image units (default: estimated)")
    m.add_argument("--strength", type=_auto_or_float, default="auto",
                   help="grey: prior strength multiplier (default: chosen by SURE)")
    m.add_argument("--boundary", choices=("free", "periodic"), default="free")
    s = p.add_argument_group("sampler")
    s.add_argument("--schedule", choices=sorted(SCHEDULES), default="geometric",
                   help="annealing schedule for --estimate map")
    s.add_argument("--t-start", type=float, default=3.0, metavar="T", help="start temperature")
    s.add_argument("--t-end", type=float, default=0.05, metavar="T", help="end temperature")
    s.add_argument("--sweeps", type=_positive_int, help="annealing sweeps per chain")
    s.add_argument("--burn-in", type=_count, help="sweeps discarded per temperature-1 chain")
    s.add_argument("--samples", type=_positive_int, help="sweeps kept per temperature-1 chain")
    s.add_argument("--chains", type=_positive_int, default=2, help="independent chains (default 2)")
    s.add_argument("--seed", type=int, default=0, help="random seed (default 0: runs repeat exactly)")
    s.add_argument("--certify", action="store_true",
                   help="binary MAP: compute the exact MAP energy by minimum cut and report the gap")


def settings_from_args(args) -> Settings:
    return Settings(kind=args.kind, method=args.method, noise=args.noise, coupling=args.coupling,
                    coupling_z=args.coupling_z, flip_rate=args.flip_rate,
                    levels=tuple(args.levels) if args.levels else "auto", sigma=args.sigma,
                    strength=args.strength, schedule=args.schedule, t_start=args.t_start,
                    t_end=args.t_end, sweeps=args.sweeps, burn_in=args.burn_in,
                    samples=args.samples, chains=args.chains, boundary=args.boundary,
                    certify=args.certify)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="mrfclean",
        description="Clean binary and greyscale microscopy scans by sampling a Markov random field posterior.")
    parser.add_argument("--version", action="version", version=f"mrfclean {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    c = sub.add_parser("clean", help="clean images", epilog=CLEAN_EPILOG,
                       formatter_class=argparse.RawDescriptionHelpFormatter,
                       description="Clean one or more images; results go to OUTDIR under the same names.")
    c.add_argument("inputs", nargs="+", metavar="INPUT", help="TIFF or PNG images")
    c.add_argument("-o", "--output", required=True, metavar="OUTDIR", help="folder for the results")
    c.add_argument("--maps", action=argparse.BooleanOptionalAction, default=None,
                   help="write uncertainty maps as float32 TIFF beside each result: P(on) and "
                        "std for binary, std for grey (default: grey only)")
    c.add_argument("--colour", choices=io.COLOUR_CHOICES,
                   help="how to turn a colour image into one channel (colour images are refused without it)")
    c.add_argument("--overwrite", action="store_true", help="replace existing results in OUTDIR")
    c.add_argument("--max-pixels", type=_positive_int, default=io.DEFAULT_MAX_PIXELS,
                   help="refuse images larger than this (default %(default)s)")
    c.add_argument("--progress", action="store_true", help="show a progress bar over sweeps")
    c.add_argument("--debug", action="store_true", help="show tracebacks")
    add_model_options(c)

    s = sub.add_parser("score", help="compare cleaned images with references", epilog=SCORE_EPILOG,
                       formatter_class=argparse.RawDescriptionHelpFormatter,
                       description="Print PSNR, SSIM and, for binary images, error rate, Dice and IoU.")
    s.add_argument("cleaned", metavar="CLEANED")
    s.add_argument("reference", metavar="REFERENCE")
    s.add_argument("--data-range", type=float, help="intensity range for PSNR/SSIM (float images)")
    s.add_argument("--debug", action="store_true", help="show tracebacks")
    return parser


def _describe(outcome) -> str:
    r = outcome.result
    p, d = r.params, r.diagnostics
    bits = [f"{r.kind} {r.method.upper()}"]
    if r.kind == "binary":
        bits.append(f"coupling {p['coupling']:.3g}")
        if "flip_rate" in p:
            bits.append(f"flip rate {p['flip_rate']:.3g}")
    if d.rhat == d.rhat:  # not nan
        bits.append(f"R-hat {d.rhat:.3f}")
    if d.energy_gap is not None:
        bits.append(f"energy gap to exact MAP {100 * d.energy_gap:.4f}%")
    bits.append(f"{outcome.seconds:.1f} s")
    return ", ".join(bits)


def run_clean(args) -> int:
    settings = settings_from_args(args)
    failed = 0
    for path in args.inputs:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", ChainsDisagree)  # reported as a note below
                outcome = clean_file(path, args.output, settings=settings, rng=args.seed, maps=args.maps,
                                     colour=args.colour, overwrite=args.overwrite,
                                     max_pixels=args.max_pixels, progress=args.progress)
        except (io.InputError, FileExistsError) as exc:
            if args.debug:
                raise
            print(str(exc), file=sys.stderr)
            failed += 1
            continue
        except Exception as exc:  # one line per file, the batch goes on
            if args.debug:
                raise
            print(f"{path}: {type(exc).__name__}: {' '.join(str(exc).split())}", file=sys.stderr)
            failed += 1
            continue
        extra = "".join(f"\n  {name}: {p}" for name, p in outcome.maps.items())
        print(f"{path} -> {outcome.output} ({_describe(outcome)}){extra}")
        for note in outcome.result.diagnostics.notes:
            print(f"{path}: note: {note}", file=sys.stderr)
    return EXIT_FAILED if failed else EXIT_OK


def run_score(args) -> int:
    from .metrics import format_table, score

    try:
        a = io.read_image(args.cleaned).array
        b = io.read_image(args.reference).array
        if a.shape != b.shape:
            raise io.InputError(args.cleaned, f"shape {a.shape} differs from the reference's {b.shape}")
        try:
            row = score(b, a, data_range=args.data_range)
        except ValueError as exc:
            raise io.InputError(args.cleaned, str(exc)) from None
    except io.InputError as exc:
        if args.debug:
            raise
        print(str(exc), file=sys.stderr)
        return EXIT_FAILED
    row = {"image": Path(args.cleaned).name, **row}
    print(format_table([row]))
    return EXIT_OK


def main(argv=None) -> int:
    """Entry point of the ``mrfclean`` command; returns the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help(sys.stderr)
        return EXIT_USAGE
    if args.command == "clean":
        return run_clean(args)
    return run_score(args)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
