#!/usr/bin/env python3
"""2-thread speed-up of the kernels, paired with the C yardstick's, repetition by repetition.

    python benchmarks/scaling.py [--repeat N] [--seconds S] [--quiet-wait S] [--no-c] [--results DIR]
                                 [--cases U2_d3:metropolis,U3_d3:hbor,...]

On a small virtual machine the speed-up of vectorised code from 1 to 2 threads depends on what the
host runs beside it (the two virtual CPUs may share one core's vector units with other guests), and
that changes within minutes.  So each repetition measures, back to back:

1. the machine: the toy loops of ``bench.machine_scaling`` (a vector-throughput-bound loop and a
   latency-bound one, the same work per thread; on two free cores both give 2x);
2. sigmasim: 1 vs 2 threads interleaved on one chain (``bench.interleaved_speedup``) for each
   case (model:update; by default the benchmark's U(1) 32^3 and U(3) 16^3 Metropolis; the U(2) and
   U(3) 16^3 models also take heatbath, overrelax and hbor, the 1 + 3 schedule);
3. the C yardstick: its 1-thread SIMD build and its 2-thread OpenMP build on the same models, in
   ABBA order (1, 2, 2, 1 threads), the speed-up from the summed times.

Repetitions whose vector-bound toy check is below ``--quiet-level`` (default 1.8x) are flagged
"host busy"; ``--quiet-wait S`` waits up to S seconds before each repetition for a check above that
level.  The summary gives medians over all repetitions and over the quiet ones, and sigmasim's
speed-up over the C yardstick's in the same repetition.  One JSON line per measurement goes to
benchmarks/results/scaling-*.jsonl.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.bench import (  # noqa: E402
    RESULTS,
    build_c,
    foreign_load,
    interleaved_speedup,
    machine_scaling,
    perf_dir,
    run_c,
)

# (model, update) -> (yardstick program, its arguments): runs of about half a second
C_ARGS = {("U1_d3", "metropolis"): ("u1", ["--algo", "metro", "--sweeps", "1500", "--therm", "100"]),
          ("U3_d3", "metropolis"): ("u3", ["--algo", "metro", "--sweeps", "500", "--therm", "50"]),
          ("U3_d3", "heatbath"): ("u3", ["--algo", "hb", "--sweeps", "300", "--therm", "50"]),
          ("U3_d3", "overrelax"): ("u3", ["--algo", "or", "--sweeps", "700", "--therm", "50"]),
          ("U3_d3", "hbor"): ("u3", ["--algo", "hbor", "--sweeps", "150", "--therm", "50"]),
          ("U2_d3", "metropolis"): ("u2", ["--algo", "metro", "--sweeps", "1500", "--therm", "100"]),
          ("U2_d3", "heatbath"): ("u2", ["--algo", "hb", "--sweeps", "600", "--therm", "50"]),
          ("U2_d3", "overrelax"): ("u2", ["--algo", "or", "--sweeps", "1500", "--therm", "50"]),
          ("U2_d3", "hbor"): ("u2", ["--algo", "hbor", "--sweeps", "300", "--therm", "50"])}
THERM = {"U1_d3": 200, "U3_d3": 100, "U2_d3": 100}
DEFAULT_CASES = "U1_d3:metropolis,U3_d3:metropolis"


def c_speedup(exes: dict, case: tuple, seed: int) -> dict:
    """The yardstick's 1-thread SIMD build vs its 2-thread OpenMP build, ABBA order."""
    prog, args = C_ARGS[case]
    rates = {1: [], 2: []}
    for th in (1, 2, 2, 1):
        d = run_c(exes[prog] if th == 1 else exes[prog + "_omp"], [*args, "--seed", str(seed)], th, None)
        rates[th].append(d["seconds"])
    t1, t2 = sum(rates[1]), sum(rates[2])
    return {"seconds_1": t1, "seconds_2": t2, "speedup": t1 / t2}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--repeat", type=int, default=5, help="repetitions (default 5)")
    ap.add_argument("--seconds", type=float, default=3.0, help="seconds per interleaved timing (default 3)")
    ap.add_argument("--quiet-level", type=float, default=1.8,
                    help="vector-bound toy speed-up that counts as a quiet host (default 1.8)")
    ap.add_argument("--quiet-wait", type=float, default=0.0,
                    help="seconds to wait before each repetition for a quiet host (default 0: no wait)")
    ap.add_argument("--no-c", action="store_true", help="skip the C yardstick")
    ap.add_argument("--results", type=Path, default=RESULTS, help="folder for the JSON lines")
    ap.add_argument("--cases", default=DEFAULT_CASES,
                    help=f"comma-separated model:update pairs (default {DEFAULT_CASES}; known: "
                         + ", ".join(f"{m}:{a}" for m, a in C_ARGS) + ")")
    args = ap.parse_args(argv)
    cases = []
    for item in args.cases.split(","):
        case = tuple(item.strip().split(":"))
        if case not in C_ARGS:
            print(f"scaling: unknown case {item.strip()!r} (known: {', '.join(f'{m}:{a}' for m, a in C_ARGS)})",
                  file=sys.stderr)
            return 2
        cases.append(case)

    import numba

    if numba.config.NUMBA_NUM_THREADS < 2:
        print("scaling: needs at least 2 CPUs")
        return 1
    args.results.mkdir(parents=True, exist_ok=True)
    out_path = args.results / time.strftime("scaling-%Y%m%d-%H%M%S.jsonl")

    def emit(d):
        with open(out_path, "a") as f:
            f.write(json.dumps(d) + "\n")

    exes, work = None, None
    pdir = None if args.no_c else perf_dir()
    if pdir is not None:
        work = Path(tempfile.mkdtemp(prefix="sigmasim-perf-"))
        try:
            exes = build_c(pdir, work)
        except (RuntimeError, OSError) as exc:
            print(f"C yardstick: build failed ({exc}); sigmasim only")
    elif not args.no_c:
        print("C yardstick: not found (set SIGMASIM_PERF_DIR); sigmasim only")
    print(f"sigmasim 2-thread scaling  (numba {numba.__version__}, threading layer "
          f"{numba.config.THREADING_LAYER}; foreign load now {foreign_load(1.0):.2f})")
    # warm the kernels (no compile inside a timing)
    for model, algo in cases:
        interleaved_speedup(model, algo, 2, 0.0, 2)
    rows = []
    for rep in range(args.repeat):
        t0 = time.perf_counter()
        while True:
            ms = machine_scaling(2)
            quiet = ms["vector_bound"] >= args.quiet_level
            if quiet or time.perf_counter() - t0 >= args.quiet_wait:
                break
            time.sleep(2.0)
        line = [f"rep {rep + 1}: toy vector {ms['vector_bound']:.2f}x latency {ms['latency_bound']:.2f}x"
                f"{'' if quiet else ' [host busy]'}"]
        for model, algo in cases:
            d = interleaved_speedup(model, algo, 2, args.seconds, THERM[model])
            row = {"measurement": "scaling", "repetition": rep + 1, "model": model, "update": algo, "quiet": quiet,
                   "toy_vector_bound": ms["vector_bound"], "toy_latency_bound": ms["latency_bound"],
                   "sigmasim_speedup": d["speedup"], "sigmasim_us_per_sweep_1": d["seconds_per_sweep_1"] * 1e6,
                   "sigmasim_us_per_sweep_2": d["seconds_per_sweep_2"] * 1e6}
            text = f"{model} {algo} sigmasim {d['speedup']:.2f}x"
            if exes:
                c = c_speedup(exes, (model, algo), 1001 + rep)
                row["c_speedup"] = c["speedup"]
                text += f" (C {c['speedup']:.2f}x)"
            rows.append(row)
            emit(row)
            line.append(text)
        print(" | ".join(line), flush=True)

    print("== summary (median over repetitions; sigmasim / C: the ratio of the two speed-ups in each repetition)")
    for model, algo in cases:
        for label, sel in (("all", lambda r: True), ("quiet host", lambda r: r["quiet"])):
            rs = [r for r in rows if r["model"] == model and r["update"] == algo and sel(r)]
            if not rs:
                print(f"  {model} {algo} {label:10s}: none")
                continue
            s = sorted(r["sigmasim_speedup"] for r in rs)
            text = (f"  {model} {algo} {label:10s} ({len(rs)}): sigmasim median {np.median(s):.2f}x "
                    f"(range {s[0]:.2f}-{s[-1]:.2f})")
            if "c_speedup" in rs[0]:
                c = sorted(r["c_speedup"] for r in rs)
                q = sorted(r["sigmasim_speedup"] / r["c_speedup"] for r in rs)
                text += (f", C median {np.median(c):.2f}x (range {c[0]:.2f}-{c[-1]:.2f}), "
                         f"sigmasim / C median {np.median(q):.2f}")
            print(text)
    print(f"results: {out_path}")
    if work is not None:
        shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
