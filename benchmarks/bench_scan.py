#!/usr/bin/env python3
"""Throughput of `sigmasim scan` on Dask against running the same configs one after another.

    python benchmarks/bench_scan.py [--points 16] [--measurements 400] [--lattice 6]

The grid is small U(3) runs (d = 3, L^3, heatbath + overrelaxation, theta and seed varied). It is run
three times from scratch, in this order, in one benchmark run:

  serial    every point's config through `sigmasim.run.execute_run`, one after another in this process
            (kernels already compiled and loaded: the best case for a loop over configs);
  1 worker  `sigmasim scan` on an embedded LocalCluster with one worker (2 numba threads per run on
            2 cores, as the scan sets workers x threads = cores);
  2 workers the same with two workers (1 numba thread per run).

It prints runs per minute for each, the wall time of the scan's fixed start (cluster start, worker
imports, cached kernels loaded) and the overhead per run: (scan time - start - serial time at the
same numba threads / w) x w / points, the time each run loses on its worker to the scheduler, the
task round trip and the per-point file I/O; and the time the index takes (the Gamma-method analysis of
every point, in the client, after the runs). Machines are noisy: compare the lines of one run only. One JSON line goes to
benchmarks/results/scan.jsonl.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
RESULTS = ROOT / "benchmarks" / "results"
sys.path.insert(0, str(ROOT))

SCAN = """
[scan]
name = "bench"
output = "{out}"
[scan.product]
"model.theta" = {{start = 2.6, stop = 3.7, num = {n_theta}}}
seed = {seeds}
[lattice]
shape = [{L}, {L}, {L}]
[model]
nf = 3
beta = 1.2
mass = 0.3
kappa = 0.8
theta_placement = "anomaly"
[updates]
schedule = [{{update = "heatbath", repeat = 1}}, {{update = "overrelax", repeat = 2}}]
[run]
thermalize = 50
measurements = {meas}
"""


def scan_file(work: Path, tag: str, points: int, meas: int, L: int) -> Path:
    n_theta = max(1, points // 2)
    text = SCAN.format(out=work / tag, n_theta=n_theta, seeds=[1, 2], L=L, meas=meas)
    p = work / f"{tag}.toml"
    p.write_text(text)
    return p


def serial(path: Path, threads: int) -> float:
    import numba

    from sigmasim.run import execute_run
    from sigmasim.config import config_from_dict
    from sigmasim.scan import expand_points, load_scan

    numba.set_num_threads(threads)
    pts = expand_points(load_scan(path))
    t0 = time.perf_counter()
    for p in pts:
        execute_run(config_from_dict(p.raw), quiet=True)
    return time.perf_counter() - t0


def start_only(path: Path, workers: int) -> float:
    """Wall time to start the embedded cluster and load the kernels on every worker."""
    from sigmasim.scan import load_scan, make_client

    def warm():
        from sigmasim.chain import make_simulation
        from sigmasim.config import config_from_dict

        make_simulation(config_from_dict({"lattice": {"shape": [2, 2]}, "model": {"nf": 3, "kappa": 1.0}})).sweep()
        return 0

    t0 = time.perf_counter()
    client, cluster, _ = make_client(load_scan(path), workers=workers)
    client.run(warm)
    dt = time.perf_counter() - t0
    client.close()
    cluster.close()
    return dt


def scanned(path: Path, workers: int) -> float:
    from sigmasim.scan import collect, load_scan, run_scan

    spec = load_scan(path)
    t0 = time.perf_counter()
    pts = run_scan(spec, workers=workers, quiet=True)
    t1 = time.perf_counter()
    collect(spec, pts)
    t2 = time.perf_counter()
    assert all(p.status == "done" for p in pts), [(p.label, p.error) for p in pts if p.status != "done"]
    return t1 - t0, t2 - t1


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--points", type=int, default=16)
    ap.add_argument("--measurements", type=int, default=400)
    ap.add_argument("--lattice", type=int, default=6)
    args = ap.parse_args(argv)
    from sigmasim.cluster import cores as _cores

    cores = _cores()
    work = Path(tempfile.mkdtemp(prefix="sigmasim-bench-scan-"))
    try:
        # compile/load the kernels in this process first (the serial loop's best case)
        serial(scan_file(work, "warm", 2, 20, 4), 1)
        rows = {}
        n = 2 * max(1, args.points // 2)
        t_s1 = serial(scan_file(work, "serial1", n, args.measurements, args.lattice), 1)
        t_sc = serial(scan_file(work, "serialc", n, args.measurements, args.lattice), cores)
        rows["serial, 1 thread"] = (t_s1, 0.0, 0.0)
        rows[f"serial, {cores} threads"] = (t_sc, 0.0, 0.0)
        for w in (1, 2):
            start = start_only(scan_file(work, f"start{w}", 2, 20, 4), w)
            t, t_index = scanned(scan_file(work, f"scan{w}", n, args.measurements, args.lattice), w)
            rows[f"scan, {w} worker{'s' if w > 1 else ''}"] = (t, start, t_index)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    print(f"grid: {n} U(3) runs, {args.lattice}^3, 50 + {args.measurements} sweeps each; {cores} cores")
    print(f"{'how':<20}{'wall s':>9}{'runs/min':>10}{'start s':>9}{'overhead/run s':>16}{'index s':>9}")
    ref = {1: t_sc if cores >= 2 else t_s1, 2: t_s1}  # numba threads per run: cores // workers
    out = {"points": n, "measurements": args.measurements, "lattice": args.lattice, "cores": cores}
    for name, (t, start, t_index) in rows.items():
        over = ""
        if name.startswith("scan"):
            w = int(name.split()[1])
            per_point_serial = ref[w] / w  # w runs at a time, each at cores // w threads
            per_run = (t - start - per_point_serial) * w / n  # each worker ran n / w of the points
            over = f"{per_run:.3f}"
            out[name] = {"seconds": t, "start": start, "overhead_per_run": per_run, "index": t_index}
        else:
            out[name] = {"seconds": t}
        print(f"{name:<20}{t:>9.2f}{60 * n / t:>10.1f}{(f'{start:.2f}' if start else ''):>9}{over:>16}"
              f"{(f'{t_index:.2f}' if t_index else ''):>9}")
    print("(wall: running the points; overhead/run: (wall - start - serial time at the same numba\n"
          " threads / w) x w / points, the time each run loses on its worker; index: writing the index\n"
          " with the Gamma-method analysis of every point, after the runs; compare within one run only)")
    RESULTS.mkdir(parents=True, exist_ok=True)
    with open(RESULTS / "scan.jsonl", "a") as fh:
        fh.write(json.dumps({"time": time.strftime("%Y-%m-%dT%H:%M:%S"), **out}) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
