"""Generate the demo's invented data sets (seeded, so the files are reproducible).

Both scenarios are INVENTED for this demo; no animal, greenhouse or compound is real.

* ``vx17_rabbits.csv``: "VX-17", a made-up oral compound, given once (30 mg) to twelve
  invented rabbits; 5 to 9 blood draws each at irregular times over 48 h; plasma
  concentrations simulated with the shipped ``two-comp-oral`` template, per-animal
  parameters varying log-normally around a typical animal, 12 % log-normal noise; values
  below the 0.05 mg/L quantification limit written as ``<0.05``.
* ``greenhouse_counts.csv``: aphids (prey) and ladybirds (predators) counted in one
  invented greenhouse over 40 days; aphids on most visits, ladybirds only on some; counts
  simulated with the shipped ``predator-prey`` template and 12 % log-normal noise, rounded
  to whole insects. Long layout: one row per count, the ``observable`` column saying which
  species was counted.

Run ``python demo/make_data.py`` to rewrite the files (``--out DIR`` to write elsewhere).
"""

from __future__ import annotations

import argparse
import io
from pathlib import Path

import numpy as np

from compartments import Dose, load_template
from compartments.model import compiled
from compartments.simulate import simulate

SEED = 20240517
HERE = Path(__file__).resolve().parent

#: Typical animal (two-comp-oral parameters) and the spread between animals (SD of log).
RABBIT_TYPICAL = {"ka": 1.1, "k10": 0.38, "k12": 0.35, "k21": 0.18, "V1": 3.0}
RABBIT_SPREAD = {"ka": 0.30, "k10": 0.20, "k12": 0.25, "k21": 0.20, "V1": 0.15}
RABBIT_DOSE_MG = 30.0
LLOQ = 0.05
NOISE_SD_LOG = 0.12
SCHEDULE_H = (0.25, 0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 24.0, 36.0, 48.0)
RABBITS = ("Clover", "Bramble", "Juniper", "Thistle", "Hazel", "Sorrel",
           "Pip", "Marigold", "Fennel", "Tansy", "Burdock", "Yarrow")

#: The greenhouse: prey growth, predation, conversion, predator death (per day), starts.
GREENHOUSE_TRUTH = {"alpha": 0.8, "beta": 0.04, "delta": 0.01, "gamma": 0.5, "prey0": 30.0, "predator0": 6.0}


def _sig(x: float, digits: int = 3) -> str:
    """A value rounded to ``digits`` significant figures, written plainly."""
    if x == 0:
        return "0"
    return f"{float(f'{x:.{digits}g}'):g}"


def rabbits_csv(rng: np.random.Generator) -> str:
    """The VX-17 study as CSV text."""
    model = compiled(load_template("two-comp-oral"))
    out = io.StringIO()
    out.write("animal,sex,weight (kg),dose (mg),time (h),conc (mg/L)\n")
    for i, name in enumerate(RABBITS):
        sex = "F" if i % 2 == 0 else "M"
        weight = round(float(rng.uniform(2.6, 4.2)), 2)
        theta = {k: v * float(np.exp(RABBIT_SPREAD[k] * rng.standard_normal())) for k, v in RABBIT_TYPICAL.items()}
        theta["V1"] *= weight / 3.4
        n = int(rng.integers(5, 10))
        picks = np.sort(rng.choice(len(SCHEDULE_H), size=n, replace=False))
        times = np.array([SCHEDULE_H[j] for j in picks]) * rng.uniform(0.9, 1.12, size=n)
        times = np.round(times, 2)
        conc = simulate(model, theta, [Dose(0.0, RABBIT_DOSE_MG, "oral")], times).observable()
        noisy = conc * np.exp(NOISE_SD_LOG * rng.standard_normal(n))
        for t, c in zip(times, noisy, strict=True):
            value = f"<{LLOQ:g}" if c < LLOQ else _sig(c)
            out.write(f"{name},{sex},{weight:.2f},{RABBIT_DOSE_MG:g},{t:.2f},{value}\n")
    return out.getvalue()


def greenhouse_csv(rng: np.random.Generator) -> str:
    """The greenhouse counts as CSV text (long layout)."""
    model = compiled(load_template("predator-prey"))
    visits = np.sort(rng.choice(np.arange(0, 41), size=24, replace=False)).astype(float)
    visits[0] = 0.0
    ladybird_days = set(rng.choice(visits, size=11, replace=False).tolist()) | {0.0}
    sim = simulate(model, GREENHOUSE_TRUTH, [], visits)
    prey, predator = sim.observable("prey"), sim.observable("predator")
    out = io.StringIO()
    out.write("greenhouse,time (day),observable,count\n")
    for t, a, b in zip(visits, prey, predator, strict=True):
        a_obs = int(round(a * float(np.exp(NOISE_SD_LOG * rng.standard_normal()))))
        out.write(f"North bay,{t:g},prey,{a_obs}\n")
        if t in ladybird_days:
            b_obs = int(round(b * float(np.exp(NOISE_SD_LOG * rng.standard_normal()))))
            out.write(f"North bay,{t:g},predator,{b_obs}\n")
    return out.getvalue()


def generate(out_dir: Path = HERE) -> list[Path]:
    """Write both files into ``out_dir``; return their paths."""
    rng = np.random.default_rng(SEED)
    files = {"vx17_rabbits.csv": rabbits_csv(rng), "greenhouse_counts.csv": greenhouse_csv(rng)}
    paths = []
    for name, text in files.items():
        path = Path(out_dir) / name
        path.write_text(text, encoding="utf-8", newline="\n")
        paths.append(path)
    return paths


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=HERE, help="folder to write the files into")
    args = parser.parse_args()
    for p in generate(args.out):
        print(f"wrote {p}")


if __name__ == "__main__":
    main()
