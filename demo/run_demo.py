"""``make demo``: fit the two invented scenarios and write the results under demo/out/.

1. VX-17 in twelve invented rabbits (``vx17_rabbits.csv``): every animal with
   ``one-comp-oral``, ``two-comp-oral`` and ``transit-oral``, proportional error, the
   report with the per-animal model comparison; JSON, CSV tables, plots and a Markdown
   report in ``demo/out/vx17/``.
2. Aphids and ladybirds in one invented greenhouse (``greenhouse_counts.csv``): the
   ``predator-prey`` template; the same files in ``demo/out/greenhouse/``.

Each run replaces the demo's own previous output. The data are invented (see
``demo/README.md``); the report says so in its title.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

from compartments.cli import main

HERE = Path(__file__).resolve().parent
OUT = HERE / "out"

#: Exit codes that end a demo step normally: all fits ok, or some failed (and reported).
FINISHED = (0, 3)

PK_TITLE = ("INVENTED DATA: VX-17, a made-up oral compound, 30 mg once to twelve invented rabbits "
            "(demo only; not a real study)")
COUNTS_TITLE = ("INVENTED DATA: aphids and ladybirds counted in an invented greenhouse over 40 days "
                "(demo only; not a real survey)")


def step(args: list[str]) -> None:
    """Run one ``compartments`` command; stop the demo if it did not finish."""
    print(f"\n$ compartments {' '.join(a if ' ' not in a else repr(a) for a in args)}\n", flush=True)
    try:
        main(args)
    except SystemExit as exc:
        if exc.code not in FINISHED:
            raise
    else:
        return


def rel(path: Path) -> str:
    try:
        return str(path.relative_to(Path.cwd()))
    except ValueError:
        return str(path)


def run() -> None:
    OUT.mkdir(exist_ok=True)
    start = time.perf_counter()
    pk = OUT / "vx17"
    step(["fit", rel(HERE / "vx17_rabbits.csv"), "--model", "one-comp-oral", "--model", "two-comp-oral",
          "--model", "transit-oral", "--route", "oral", "--error", "proportional", "--seed", "17",
          "--title", PK_TITLE,
          "--out", rel(pk), "--json", rel(pk / "fit.json"), "--report", rel(pk / "report.md"), "--overwrite"])
    counts = OUT / "greenhouse"
    step(["fit", rel(HERE / "greenhouse_counts.csv"), "--model", "predator-prey", "--map", "subject=greenhouse",
          "--error", "proportional", "--seed", "17", "--title", COUNTS_TITLE,
          "--out", rel(counts), "--json", rel(counts / "fit.json"), "--report", rel(counts / "report.md"),
          "--overwrite"])
    print(f"\ndemo finished in {time.perf_counter() - start:.0f} s; results in {rel(OUT)}/", flush=True)


if __name__ == "__main__":
    sys.exit(run())
