"""Run a parameter sweep from a TOML spec and write its table, plots and report.

usage: python scripts/sweep.py SPEC.toml [--output DIR] [--workers N | --scheduler ADDRESS
                                          | --local-cluster N] [--no-progress]

The spec lists noisy/reference pairs, the base settings and a grid (or a list)
of settings; see :func:`mrfclean.sweep.load_spec` for the layout.  Writes
``sweep.csv``, ``sweep.json``, ``METRIC_vs_PARAM.png`` and ``report.html``
into the output folder and prints the mean of each metric per setting and the
best setting per metric.

example spec (sample_sweep.toml)::

    seed = 0
    output = "sweep_out"
    [base]
    burn_in = 50
    samples = 200
    [grid]
    coupling = [0.5, 0.7, 0.9, 1.1]
    [[pairs]]
    noisy = "sample_images/*_noisy.png"
    reference = "sample_images/{stem}.png"
    replace = ["_noisy", "_clean"]
"""

from __future__ import annotations

import argparse
import dataclasses
import sys

from mrfclean.config import ConfigError
from mrfclean.metrics import format_table
from mrfclean.sweep import load_spec, write_sweep


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description="Run a parameter sweep from a TOML spec.",
                                epilog="example: python scripts/sweep.py sweep.toml --workers 4",
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("spec")
    p.add_argument("-o", "--output", help="output folder (default: the spec's 'output')")
    p.add_argument("-j", "--workers", type=int)
    p.add_argument("--scheduler", metavar="ADDRESS")
    p.add_argument("--local-cluster", type=int, metavar="N")
    p.add_argument("--no-progress", action="store_true")
    args = p.parse_args(argv)
    try:
        spec = load_spec(args.spec)
    except ConfigError as exc:
        print(str(exc), file=sys.stderr)
        return 2
    changes = {k: v for k, v in (("workers", args.workers), ("scheduler", args.scheduler),
                                 ("local_cluster", args.local_cluster), ("output", args.output))
               if v is not None}
    spec = dataclasses.replace(spec, **changes)
    table = spec.run(progress=not args.no_progress and sys.stderr.isatty())
    files = write_sweep(table, spec.output)
    print(format_table(table.means()))
    print()
    print(format_table([{"metric": k, "best": v["value"], **v["setting"]} for k, v in table.best().items()]))
    for r in table.rows:
        if r.get("status") != "done":
            print(f"{r['image']} (setting {r['setting']}): {r.get('error', 'failed')}", file=sys.stderr)
    print(f"\nwrote {files['csv']}, {files['json']}, {len(files['plots'])} plots and {files['report']}")
    return 0 if all(r.get("status") == "done" for r in table.rows) else 1


if __name__ == "__main__":
    sys.exit(main())
