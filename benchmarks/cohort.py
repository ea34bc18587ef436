"""Benchmark: cohort runs — serial, a process pool and a Dask LocalCluster.

A synthetic oral study (invented): N subjects, dose 100 mg at time 0, 8 samples at random
times in 0.25–24 h, one-compartment absorption/elimination with 20 % log-normal
between-subject variation around ka 1 1/h, ke 0.1 1/h, V 20 L and 10 % proportional
noise. Every subject is fitted with one-comp-oral, two-comp-oral and transit-oral.

Each configuration runs in a fresh Python process (so its peak memory is its own):
``workers=1``, ``workers=2`` and a Dask LocalCluster with two single-threaded worker
processes on loopback (cluster start-up timed apart from the run). The speed-up is the
1-worker wall time over the 2-worker one; Dask overhead is its run time over the pool's.
Peak memory: the maximum resident set of the driving process (``resource.getrusage``) and
the high-water marks of every process below it (pool workers and the forkserver; Dask
scheduler-side nannies and workers), read from /proc. The runs must give identical numbers.

A control measures how much parallelism the machine offers at the time: a plain Python
loop in one process and in two (before and after the runs); on a shared machine the
cohort speed-up cannot beat it.

With ``--null K``: K two-arm studies of 12 subjects with the *same* ke in both arms,
fitted with one-comp-oral (nls); the Mann–Whitney p-values of ke should be roughly
uniform (fraction below 0.05 near 5 %, Kolmogorov–Smirnov against uniform).

Usage: python benchmarks/cohort.py [--quick] [--subjects N] [--strategy hybrid|nls]
                                   [--configs 1,2,dask] [--null K] [--out FILE]
"""

from __future__ import annotations

import argparse
import hashlib
import json
import math
import os
import platform
import resource
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pandas as pd

MODELS = ("one-comp-oral", "two-comp-oral", "transit-oral")
HERE = Path(__file__).resolve().parent


def bateman(t, dose, ka, ke, V):
    """One-compartment oral concentration (F = 1, no lag)."""
    return dose * ka / (V * (ka - ke)) * (np.exp(-ke * t) - np.exp(-ka * t))


def study_frame(n: int, seed: int = 0, ke_b: float | None = None, prefix: str = "") -> pd.DataFrame:
    """Rows of a synthetic study; with ``ke_b`` the second half of subjects (arm B) has that ke."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n):
        arm = "A" if i < n // 2 else "B"
        ke0 = ke_b if (ke_b is not None and arm == "B") else 0.1
        ka = 1.0 * math.exp(0.2 * rng.standard_normal())
        V = 20.0 * math.exp(0.2 * rng.standard_normal())
        ke = ke0 * math.exp(0.2 * rng.standard_normal())
        t = np.sort(rng.uniform(0.25, 24.0, 8))
        c = bateman(t, 100.0, ka, ke, V) * (1 + 0.1 * rng.standard_normal(t.size))
        rows += [{"id": f"{prefix}{i:04d}", "time": float(a), "conc": float(b), "arm": arm}
                 for a, b in zip(t, c, strict=True)]
    return pd.DataFrame(rows)


def fingerprint(cohort) -> str:
    """SHA-256 of every fit's estimates, SEs, objective and status (no timings)."""
    h = hashlib.sha256()
    for f in cohort.fits:
        h.update(repr((f.subject, f.template, f.status, f.message, sorted(f.estimates.items()),
                       sorted(f.se.items()), f.objective)).encode())
        h.update(np.ascontiguousarray(f.covariance).tobytes())
    return h.hexdigest()


class TreeMemory:
    """Peak resident set of this process and every process below it (Linux /proc).

    Pool workers are children of the forkserver and Dask workers of their nannies, so
    ``getrusage(RUSAGE_CHILDREN)`` (children waited for) does not see them; a thread reads
    each descendant's high-water mark (``VmHWM``) every quarter second instead. Elsewhere
    only this process's ``ru_maxrss`` is reported.
    """

    def __init__(self) -> None:
        self.peaks: dict[int, float] = {}
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._watch, daemon=True)

    def __enter__(self) -> TreeMemory:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._sample()
        self._stop.set()
        self._thread.join()

    def _watch(self) -> None:
        while not self._stop.wait(0.25):
            self._sample()

    def _sample(self) -> None:
        proc = Path("/proc")
        if not proc.is_dir():
            return
        parent: dict[int, int] = {}
        for d in proc.iterdir():
            if d.name.isdigit():
                try:
                    parent[int(d.name)] = int((d / "stat").read_text().rsplit(")", 1)[1].split()[1])
                except (OSError, IndexError, ValueError):
                    continue
        me = os.getpid()
        below = {me}
        grew = True
        while grew:
            new = {p for p, pp in parent.items() if pp in below and p not in below}
            below |= new
            grew = bool(new)
        for pid in below - {me}:
            try:
                for line in (proc / str(pid) / "status").read_text().splitlines():
                    if line.startswith("VmHWM:"):
                        self.peaks[pid] = max(self.peaks.get(pid, 0.0), int(line.split()[1]) / 1024)
            except (OSError, ValueError):
                continue

    def report(self) -> dict[str, float]:
        scale = 1 / 1024 if sys.platform != "darwin" else 1 / 1024 / 1024
        others = sorted(self.peaks.values(), reverse=True)
        return {"self_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * scale,
                "largest_child_mib": others[0] if others else 0.0,
                "children_total_mib": float(sum(others))}


def run_one(config: str, n: int, strategy: str) -> dict:
    """One configuration, in this process; returns timings, memory and the fingerprint."""
    from compartments import read_study

    study = read_study(study_frame(n), dose=100.0, route="oral")
    out: dict = {"config": config, "subjects": n, "fits": n * len(MODELS), "strategy": strategy}
    with TreeMemory() as memory:
        cohort = _run(config, study, strategy, out)
    out["failed"] = cohort.n_failed
    out["fingerprint"] = fingerprint(cohort)
    out["fit_cpu_s"] = float(sum(f.wall_time for f in cohort.fits))
    # fits whose network stage ended at its wall-clock budget: their numbers depend on load
    out["network_stopped"] = sum(any(s.name == "network" and s.status == "stopped" for s in f.stages)
                                 for f in cohort.fits)
    out["per_fit"] = {f"{f.subject}|{f.template}": hashlib.sha256(repr((sorted(f.estimates.items()), f.objective))
                                                                   .encode()).hexdigest()[:16] for f in cohort.fits}
    out.update(memory.report())
    return out


def _run(config: str, study, strategy: str, out: dict):
    from compartments.cohort import run_cohort

    if config == "dask":
        from distributed import LocalCluster

        t0 = time.perf_counter()
        cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                               dashboard_address=None)
        out["cluster_start_s"] = time.perf_counter() - t0
        try:
            t0 = time.perf_counter()
            cohort = run_cohort(study, list(MODELS), strategy=strategy, scheduler=cluster.scheduler_address)
            out["wall_s"] = time.perf_counter() - t0
        finally:
            cluster.close()
    else:
        t0 = time.perf_counter()
        cohort = run_cohort(study, list(MODELS), strategy=strategy, workers=int(config))
        out["wall_s"] = time.perf_counter() - t0
    return cohort


def _spin(n: int) -> int:
    total = 0
    for i in range(n):
        total += i * i % 7
    return total


def machine_parallelism(n: int = 3_000_000, k: int = 6) -> float:
    """Speed-up of a plain Python loop in 2 processes over 1, right now (a control: on a
    shared or busy machine the cohort speed-up cannot exceed it)."""
    from concurrent.futures import ProcessPoolExecutor

    t0 = time.perf_counter()
    for _ in range(k):
        _spin(n)
    one = time.perf_counter() - t0
    with ProcessPoolExecutor(2) as ex:
        list(ex.map(_spin, [1000, 1000]))  # start the workers first
        t0 = time.perf_counter()
        list(ex.map(_spin, [n] * k))
        two = time.perf_counter() - t0
    return one / two


def null_check(k: int, workers: int) -> dict:
    """Mann–Whitney p-values of ke between two arms with no true difference, over k studies."""
    from scipy import stats

    from compartments import read_study
    from compartments.cohort import run_cohort
    from compartments.summaries import group_tests

    frames = [study_frame(12, seed=1000 + j, ke_b=0.1, prefix=f"r{j:03d}-") for j in range(k)]
    study = read_study(pd.concat(frames, ignore_index=True), dose=100.0, route="oral")
    t0 = time.perf_counter()
    cohort = run_cohort(study, ["one-comp-oral"], strategy="nls", workers=workers)
    wall = time.perf_counter() - t0
    ps = []
    for j in range(k):
        mine = [f for f in cohort.fits if f.subject.startswith(f"r{j:03d}-")]
        subs = [s for s in study if s.id.startswith(f"r{j:03d}-")]
        ps.append(float(group_tests(mine, subs, "arm", "one-comp-oral").loc["ke", "p_exploratory"]))
    p = np.array(ps)
    ks = stats.kstest(p, "uniform")
    return {"studies": k, "fits": len(cohort.fits), "failed": cohort.n_failed, "wall_s": wall,
            "below_0.05": float(np.mean(p < 0.05)), "below_0.10": float(np.mean(p < 0.10)),
            "median_p": float(np.median(p)), "ks_statistic": float(ks.statistic), "ks_p": float(ks.pvalue)}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="20 subjects, null check over 10 studies")
    ap.add_argument("--subjects", type=int, default=None, help="number of subjects (default 500; quick 20)")
    ap.add_argument("--strategy", default="hybrid", choices=("hybrid", "nls"))
    ap.add_argument("--configs", default="1,2,dask", help="comma list of 1, 2, ..., dask")
    ap.add_argument("--null", type=int, default=None, help="studies in the null check (default 100; quick 10; 0: none)")
    ap.add_argument("--out", type=Path, default=HERE / "out" / "cohort.json")
    ap.add_argument("--one", default=None, help=argparse.SUPPRESS)  # internal: run one configuration
    args = ap.parse_args()
    n = args.subjects or (20 if args.quick else 500)
    if args.one is not None:
        print(json.dumps(run_one(args.one, n, args.strategy)))
        return

    info = {"python": platform.python_version(), "machine": platform.machine(), "cores": os.cpu_count(),
            "load_before": os.getloadavg(), "strategy": args.strategy, "subjects": n}
    print(f"cohort benchmark: {n} subjects × {len(MODELS)} models, strategy {args.strategy}, "
          f"{os.cpu_count()} cores, load average {info['load_before'][0]:.2f}", flush=True)
    results = []
    info["control_speedup_before"] = machine_parallelism()
    print(f"  control: a plain Python loop runs {info['control_speedup_before']:.2f}× faster in 2 processes "
          "than in 1 on this machine now", flush=True)
    for config in [c.strip() for c in args.configs.split(",") if c.strip()]:
        cmd = [sys.executable, str(Path(__file__).resolve()), "--one", config, "--subjects", str(n),
               "--strategy", args.strategy]
        done = subprocess.run(cmd, capture_output=True, text=True, check=False,
                              env={**os.environ, "PYTHONWARNINGS": "ignore"})
        if done.returncode != 0:
            print(f"  {config}: failed\n{done.stderr[-2000:]}", flush=True)
            continue
        r = json.loads(done.stdout.strip().splitlines()[-1])
        results.append(r)
        extra = f", cluster start {r['cluster_start_s']:.1f} s" if "cluster_start_s" in r else ""
        print(f"  {config:>4}: {r['wall_s']:8.1f} s wall ({r['fits']} fits, {r['failed']} failed{extra}); "
              f"peak RSS {r['self_mib']:.0f} MiB driver, {r['largest_child_mib']:.0f} MiB largest child, "
              f"{r['children_total_mib']:.0f} MiB all children", flush=True)
    by = {r["config"]: r for r in results}
    summary: dict = {"info": info, "runs": results}
    info["control_speedup_after"] = machine_parallelism()
    info["load_after"] = os.getloadavg()
    if "1" in by and "2" in by:
        summary["speedup_2_workers"] = by["1"]["wall_s"] / by["2"]["wall_s"]
        print(f"  speed-up with 2 workers: {summary['speedup_2_workers']:.2f}× (goal ≥ 1.7×; the control loop: "
              f"{info['control_speedup_before']:.2f}× before, {info['control_speedup_after']:.2f}× after)")
    if "2" in by and "dask" in by:
        summary["dask_overhead"] = by["dask"]["wall_s"] / by["2"]["wall_s"] - 1
        print(f"  Dask LocalCluster run time vs pool: {100 * summary['dask_overhead']:+.1f} %")
    prints = {r["fingerprint"] for r in results}
    summary["identical"] = len(prints) == 1
    print(f"  identical numbers across configurations: {summary['identical']}")
    if not summary["identical"] and results:
        ref = results[0]["per_fit"]
        for r in results[1:]:
            diff = [k for k, v in r["per_fit"].items() if ref.get(k) != v]
            print(f"    {r['config']} differs from {results[0]['config']} in {len(diff)} fit(s): {', '.join(diff[:8])}")
        print("    network stage stopped at its time budget: "
              + ", ".join(f"{r['config']}: {r['network_stopped']}" for r in results))
    for r in results:
        r.pop("per_fit", None)
    k = args.null if args.null is not None else (10 if args.quick else 100)
    if k:
        summary["null"] = null_check(k, workers=2)
        z = summary["null"]
        print(f"  null check ({k} studies, no true difference in ke): p < 0.05 in {100 * z['below_0.05']:.0f} %, "
              f"p < 0.10 in {100 * z['below_0.10']:.0f} %, median p {z['median_p']:.2f}, "
              f"KS vs uniform p = {z['ks_p']:.2f}")
    args.out.parent.mkdir(parents=True, exist_ok=True)
    from compartments.atomic import write_text

    write_text(args.out, json.dumps(summary, indent=2) + "\n")
    print(f"  written {args.out}")


if __name__ == "__main__":
    main()
