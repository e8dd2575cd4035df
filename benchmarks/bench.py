#!/usr/bin/env python3
"""Speed benchmark of sigmasim's kernels against the hand-written C yardstick.

    python benchmarks/bench.py [--quick] [--threads N] [--no-c] [--no-compile] [--repeat N] [--models ...]

Measures, through the public path (config_from_dict + Simulation.sweep, after
thermalisation and Metropolis step tuning), site-hits per second of

  (a) U(1), d = 3, L = 32, beta = 0.45, h = 0.05, theta = 3.0, kappa = 0
      (Metropolis 1 hit per visit, heatbath, overrelaxation);
  (b) U(3), d = 3, L = 16, beta = 0.5, h = 0.1, kappa = 0.2, theta = 3.0 in the
      mass phase (Metropolis 4 hits per visit, heatbath, overrelaxation, and the
      default schedule 1 heatbath + 3 overrelaxation, counted as 4 site-hits per site);
  (c) U(2), the same couplings and updates as (b);
  (d) U(4), U(5), U(6) (models U4_d3, U5_d3, U6_d3), the same couplings, heatbath,
      overrelaxation and 1 heatbath + 3 overrelaxation on 1 thread, against
      benchmarks/c/unf.c (a C build of the same generic algorithm, vectorised across
      sites by the compiler, built here for each N), with its physics checked against
      ours and, at beta = 0, against the exact one-site values of sigmasim.exact;

on 1 thread and on all threads; builds and runs the yardstick's `c`,
`c_omp2` (and for Metropolis `c_scalar`) programs of every update it has
(`u1`, `u3`, `u2` with `--algo`) in the same run, numba and C back to back in
ABBA order (numba, C, C, numba), and prints the ratios of wall-time and of
CPU-time rates (site-hits per CPU second depend less on a busy machine); times the JIT compile (empty cache, in a subprocess with a temporary
NUMBA_CACHE_DIR) and the cached load; the start-up of `sigmasim run` on a tiny
config with a warm cache; and the memory a run adds compared with its field
arrays.  One JSON line per measurement goes to benchmarks/results/.

Machines are noisy: only ratios measured in one run mean anything.  Before
every timed run the foreign load (busy fraction of all cores, from
/proc/stat) is printed; a run next to a busy core is flagged [contended].

The yardstick is looked up in $SIGMASIM_PERF_DIR, else ../shared/perf
relative to the repository root; without it the C comparison is skipped.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
RESULTS = ROOT / "benchmarks" / "results"
sys.path.insert(0, str(ROOT))

MODELS = {
    "U1_d3": dict(nf=1, shape=[32, 32, 32], beta=0.45, mass=0.05, kappa=0.0, theta=3.0, hits=1, step=1.0),
    "U3_d3": dict(nf=3, shape=[16, 16, 16], beta=0.5, mass=0.1, kappa=0.2, theta=3.0, hits=4, step=0.3),
    "U2_d3": dict(nf=2, shape=[16, 16, 16], beta=0.5, mass=0.1, kappa=0.2, theta=3.0, hits=4, step=0.3),
}
ALGOS = {"U1_d3": ("metropolis", "heatbath", "overrelax"),
         "U3_d3": ("metropolis", "heatbath", "overrelax", "hbor"),
         "U2_d3": ("metropolis", "heatbath", "overrelax", "hbor")}
SCHEDULES = {"hbor": [{"update": "heatbath", "repeat": 1}, {"update": "overrelax", "repeat": 3}]}
ALGO_NAMES = {  # the yardstick's algorithm names where it has the algorithm
    ("U1_d3", "metropolis"): "metropolis",
    ("U1_d3", "heatbath"): "heatbath_best_fisher",
    ("U3_d3", "metropolis"): "metropolis_4hit",
    ("U3_d3", "heatbath"): "heatbath_cabibbo_marinari",
    ("U3_d3", "overrelax"): "overrelax",
    ("U3_d3", "hbor"): "heatbath1_overrelax3",
    ("U2_d3", "metropolis"): "metropolis_4hit",
    ("U2_d3", "heatbath"): "heatbath_cabibbo_marinari",
    ("U2_d3", "overrelax"): "overrelax",
    ("U2_d3", "hbor"): "heatbath1_overrelax3",
}
C_PROGRAM = {"U1_d3": "u1", "U3_d3": "u3", "U2_d3": "u2"}
# (d): the generic nf >= 4 path against benchmarks/c/unf.c (built with -DNF=nf), 1 thread
UNF_MODELS = {f"U{nf}_d3": dict(nf=nf, shape=[16, 16, 16], beta=0.5, mass=0.1, kappa=0.2, theta=3.0, hits=4,
                                 step=0.3) for nf in (4, 5, 6)}
UNF_ALGOS = ("heatbath", "overrelax", "hbor")
UNF_SOURCE = ROOT / "benchmarks" / "c" / "unf.c"
C_ALGO = {"metropolis": "metro", "heatbath": "hb", "overrelax": "or", "hbor": "hbor"}


def physics_comparison(nb: dict, c: dict) -> str:
    """S/V and Re Tr U / nf of a numba and a C run with z = difference / combined error, marked when
    |z| > 4."""
    z = []
    for k in ("action_per_site", "retr_over_nf"):
        e = np.hypot(nb[k + "_err"], c[k + "_err"])
        z.append((nb[k] - c[k]) / e if e > 0 else float("nan"))
    return (f"S/V numba {nb['action_per_site']:.5f}+-{nb['action_per_site_err']:.5f} "
            f"C {c['action_per_site']:.5f}+-{c['action_per_site_err']:.5f} (z {z[0]:+.1f});  "
            f"ReTrU/nf numba {nb['retr_over_nf']:.5f}+-{nb['retr_over_nf_err']:.5f} "
            f"C {c['retr_over_nf']:.5f}+-{c['retr_over_nf_err']:.5f} (z {z[1]:+.1f})"
            + ("  <-- CHECK" if max(abs(x) for x in z) > 4 else ""))

def hits_per_site(cfg, algo: str) -> int:
    """Site-hits per site and sweep: Metropolis hits, 4 for the 1 + 3 schedule, else 1."""
    if algo == "metropolis":
        return cfg.metropolis_hits
    return sum(r for _, r in cfg.schedule)


def config(model: str, algo: str, thermalize: int, seed: int = 11):
    from sigmasim.config import config_from_dict

    m = MODELS[model] if model in MODELS else UNF_MODELS[model]
    return config_from_dict({
        "name": "bench",
        "seed": seed,
        "lattice": {"shape": m["shape"]},
        "model": {"nf": m["nf"], "beta": m["beta"], "mass": m["mass"], "kappa": m["kappa"],
                  "theta": m["theta"], "theta_placement": "mass"},
        "updates": {"schedule": SCHEDULES.get(algo, [{"update": algo}]), "metropolis_hits": m["hits"],
                    "initial_step": m["step"], "tune_every": 10, "target_acceptance": 0.5},
        "run": {"thermalize": thermalize, "measurements": 1, "start": "cold"},
    })


# ----------------------------------------------------------------------------- load
def _cpu_times():
    with open("/proc/stat") as f:
        v = [int(x) for x in f.readline().split()[1:]]
    idle = v[3] + (v[4] if len(v) > 4 else 0)
    return sum(v), idle


def foreign_load(seconds: float = 0.3) -> float:
    """Busy fraction of all cores over ``seconds`` while this process sleeps (NaN if unknown)."""
    try:
        t0, i0 = _cpu_times()
        time.sleep(seconds)
        t1, i1 = _cpu_times()
    except OSError:
        return float("nan")
    return 1.0 - (i1 - i0) / max(1, t1 - t0)


def contended(load: float, threads: int) -> bool:
    ncpu = os.cpu_count() or 1
    lim = 0.25 if threads > 1 else 1.0 - 1.0 / ncpu + 0.1
    return load > lim


# ----------------------------------------------------------------------------- numba
def blocked_mean(x, nblocks: int = 20):
    x = np.asarray(x, dtype=float)
    nb = min(nblocks, len(x))
    if nb < 2:
        return float(x.mean()), float("nan")
    bl = len(x) // nb
    b = x[: nb * bl].reshape(nb, bl).mean(axis=1)
    return float(x.mean()), float(b.std(ddof=1) / np.sqrt(nb))


def time_sweeps(cfg, model: str, algo: str, algo_name: str, threads: int, seconds: float,
                thermalize: int, min_sweeps: int = 20) -> dict:
    """Sweeps of ``cfg`` (any model) through the public Simulation path; one result line.

    Thermalises (tuning the Metropolis step), then times only ``sim.sweep()``; the measurement
    for the physics sanity numbers happens outside the timed part, as the yardstick does.
    """
    import numba

    from sigmasim.chain import make_simulation

    numba.set_num_threads(threads)
    sim = make_simulation(cfg)
    for _ in range(thermalize):
        sim.sweep()
    st = sim.state
    k = 0 if algo == "metropolis" else 1  # acceptance window: Metropolis hits, or phase/proposal moves
    load = foreign_load()
    action, retr = [], []
    t_upd = 0.0
    c_upd = 0.0
    n = 0
    acc_sum = [0, 0]
    t_start = time.perf_counter()
    while n < min_sweeps or time.perf_counter() - t_start < seconds:
        t0 = time.perf_counter()
        p0 = time.process_time()
        sim.sweep()
        t_upd += time.perf_counter() - t0
        c_upd += time.process_time() - p0
        n += 1
        acc_sum[0] += int(st.win_acc[k])
        acc_sum[1] += int(st.win_tried[k])
        rec = sim.measure()  # resets the acceptance window
        action.append(rec["action"])
        retr.append(rec["omega"].real)
    hits = hits_per_site(cfg, algo)
    a, ae = blocked_mean(action)
    r, re_ = blocked_mean(retr)
    impl = "numba" if threads == 1 else f"numba_{threads}threads"
    return {
        "model": model, "algorithm": algo_name, "implementation": impl,
        "lattice": "x".join(map(str, cfg.shape)), "threads": threads, "sweeps": n,
        "therm": thermalize, "hits_per_site": hits, "seconds": t_upd,
        "site_hits_per_second": n * cfg.volume * hits / t_upd,
        "site_hits_per_cpu_second": n * cfg.volume * hits / max(c_upd, 1e-9),
        "acceptance": acc_sum[0] / acc_sum[1] if acc_sum[1] else 1.0,
        "step": st.step_size, "action_per_site": a, "action_per_site_err": ae,
        "retr_over_nf": r, "retr_over_nf_err": re_, "foreign_load_before": load,
        "contended": contended(load, threads),
    }


def interleaved_speedup(model: str, algo: str, threads: int, seconds: float, thermalize: int,
                        block_seconds: float = 0.05) -> dict:
    """``threads`` vs 1 thread on one chain, in alternating blocks of sweeps (ABBA order).

    The thread count only changes the speed (the chain is the same for any count), so both
    see the same configurations and, block by block, the same machine: the ratio of the
    medians is far less sensitive to a neighbour's load than two separate runs.
    """
    import numba

    from sigmasim.chain import make_simulation

    cfg = config(model, algo, thermalize)
    numba.set_num_threads(threads)
    sim = make_simulation(cfg)
    for _ in range(thermalize):
        sim.sweep()
    t0 = time.perf_counter()
    for _ in range(5):
        sim.sweep()
    per_block = max(3, int(block_seconds / ((time.perf_counter() - t0) / 5)))
    load = foreign_load()
    res = {1: [], threads: []}
    t_start = time.perf_counter()
    k = 0
    while k < 8 or time.perf_counter() - t_start < seconds:
        for th in ((1, threads) if k % 2 == 0 else (threads, 1)):
            numba.set_num_threads(th)
            sim.sweep()  # the first sweep after a switch is not timed
            t0 = time.perf_counter()
            for _ in range(per_block):
                sim.sweep()
            res[th].append((time.perf_counter() - t0) / per_block)
        k += 1
    numba.set_num_threads(threads)
    one, many = float(np.median(res[1])), float(np.median(res[threads]))
    hits = hits_per_site(cfg, algo)
    return {"measurement": "interleaved_speedup", "model": model, "algorithm": algo, "threads": threads,
            "blocks": len(res[1]), "sweeps_per_block": per_block,
            "seconds_per_sweep_1": one, f"seconds_per_sweep_{threads}": many,
            "site_hits_per_second_1": cfg.volume * hits / one,
            f"site_hits_per_second_{threads}": cfg.volume * hits / many,
            "speedup": one / many, "foreign_load_before": load, "contended": contended(load, threads)}


def run_numba(model: str, algo: str, threads: int, seconds: float, thermalize: int) -> dict:
    return time_sweeps(config(model, algo, thermalize), model, algo, ALGO_NAMES.get((model, algo), algo),
                       threads, seconds, thermalize)


def machine_scaling(threads: int) -> dict:
    """How this machine's cores share work: 1 vs ``threads`` threads on two toy loops.

    Each of ``threads`` work items is either an L1-resident vector loop bound by the
    throughput of the vector units, or a dependent chain of scalar multiply-adds bound by
    latency.  On independent idle cores both scale by ``threads``.  Where the virtual CPUs
    share a physical core's vector units (SMT siblings on the host, whatever the guest
    reports) or the host is busy, the first scales less, and so does any kernel that keeps
    the vector units busy on one thread (seen on the 2-CPU development machine: from 0.8x
    to 1.9x within minutes, while the latency-bound loop stayed at 2.0x).
    """
    import numba
    from numba import njit, prange

    @njit(parallel=True)
    def vector_bound(a, reps):
        for t in prange(a.shape[0]):
            x = a[t]
            for _ in range(reps):
                for i in range(x.shape[0]):
                    x[i] = x[i] * 0.999999 + 1e-7
        return 0

    @njit(parallel=True)
    def latency_bound(a, reps):
        for t in prange(a.shape[0]):
            v = a[t, 0]
            for _ in range(reps):
                v = v * 0.999999 + 1e-7
            a[t, 0] = v
        return 0

    a = np.ones((threads, 512))
    out = {}
    for name, f, reps in (("vector_bound", vector_bound, 400_000), ("latency_bound", latency_bound, 20_000_000)):
        f(a, 1)
        best = {}
        for th in (1, threads, 1, threads):
            numba.set_num_threads(th)
            t0 = time.perf_counter()
            f(a, reps)
            best[th] = min(best.get(th, np.inf), time.perf_counter() - t0)
        out[name] = best[1] / best[threads]
    numba.set_num_threads(threads)
    return out


# ----------------------------------------------------------------------------- C yardstick
def perf_dir() -> Path | None:
    p = Path(os.environ.get("SIGMASIM_PERF_DIR", ROOT.parent / "shared" / "perf"))
    return p if (p / "src" / "u1.c").is_file() and (p / "src" / "u3.c").is_file() else None


def build_c(src: Path, work: Path) -> dict:
    """Build the yardstick's programs as its run_all.sh does; returns name -> argv prefix."""
    cc = os.environ.get("CC", "gcc")
    flags = ["-O3", "-march=native", "-fno-math-errno", "-std=gnu11", "-Wall", "-Wno-unknown-pragmas"]
    shutil.copytree(src / "src", work / "src")
    (work / "build").mkdir()
    jobs = {
        "u1": ["-fopenmp-simd", "-o", "build/u1", "src/u1.c", "-lm"],
        "u1_omp": ["-fopenmp", "-o", "build/u1_omp", "src/u1.c", "-lm"],
        "u1_scalar": ["-fno-tree-vectorize", "-o", "build/u1_scalar", "src/u1.c", "-lm"],
        "u3": ["-o", "build/u3", "src/u3.c", "-lm"],
        "u3_omp": ["-fopenmp", "-o", "build/u3_omp", "src/u3.c", "-lm"],
        "u3_scalar": ["-DVL=1", "-fno-tree-vectorize", "-o", "build/u3_scalar", "src/u3.c", "-lm"],
        "u2": ["-o", "build/u2", "src/u2.c", "-lm"],
        "u2_omp": ["-fopenmp", "-o", "build/u2_omp", "src/u2.c", "-lm"],
        "u2_scalar": ["-DVL=1", "-fno-tree-vectorize", "-o", "build/u2_scalar", "src/u2.c", "-lm"],
    }
    procs = {k: subprocess.Popen([cc, *flags, *v], cwd=work, stderr=subprocess.PIPE, text=True)
             for k, v in jobs.items()}
    for k, p in procs.items():
        _, err = p.communicate()
        if p.returncode:
            raise RuntimeError(f"building {k} failed:\n{err}")
    return {k: str(work / "build" / k) for k in jobs}


def run_c(exe: str, args: list, threads: int, impl: str | None) -> dict:
    env = dict(os.environ, OMP_NUM_THREADS=str(threads))
    cmd = [exe, *args] + (["--impl", impl] if impl else [])
    load = foreign_load()
    out = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=300, check=True).stdout
    d = json.loads(out.strip().splitlines()[-1])
    d["foreign_load_before"] = load
    d["contended"] = contended(load, threads)
    return d



# ----------------------------------------------------------------------------- nf = 4..6 against benchmarks/c/unf.c
def build_unf(work: Path, nfs) -> dict:
    """Build benchmarks/c/unf.c once per N (``-DNF=N``, no OpenMP threads: 1 thread); returns nf -> program."""
    cc = os.environ.get("CC", "gcc")
    flags = ["-O3", "-march=native", "-fno-math-errno", "-std=gnu11", "-fopenmp-simd", "-Wall",
             "-Wno-unknown-pragmas"]
    procs = {nf: subprocess.Popen([cc, *flags, f"-DNF={nf}", "-o", str(work / f"unf{nf}"), str(UNF_SOURCE), "-lm"],
                                  stderr=subprocess.PIPE, text=True) for nf in nfs}
    for nf, p in procs.items():
        _, err = p.communicate()
        if p.returncode:
            raise RuntimeError(f"building unf.c with NF={nf} failed:\n{err}")
    return {nf: str(work / f"unf{nf}") for nf in nfs}


def unf_args(m: dict, algo: str, sweeps: int, therm: int, beta: float | None = None, size: int | None = None) -> list:
    """The command line of benchmarks/c/unf.c for the couplings of model ``m``."""
    return ["--algo", C_ALGO[algo], "--L", str(size or m["shape"][0]), "--sweeps", str(sweeps), "--therm", str(therm),
            "--seed", "1001", "--beta", repr(m["beta"] if beta is None else beta), "--h", repr(m["mass"]),
            "--kappa", repr(m["kappa"]), "--theta", repr(m["theta"])]


def unf_exact_check(exe: str, m: dict, sweeps: int) -> dict:
    """unf.c at beta = 0 (sites independent, 8^3, 1 heatbath + 3 overrelaxation) against the exact
    one-site <S>/V and <Re Tr U>/nf of :func:`sigmasim.exact.one_site_u` (theta in the mass term)."""
    from sigmasim.exact import one_site_u

    nf, h, kappa = m["nf"], m["mass"], m["kappa"]
    ex = one_site_u(nf, h, kappa, theta_m=m["theta"] / nf)
    # S_x = -Re Tr(H U) - 2 kappa Re det U, H = h e^{i theta / nf} 1
    s_exact = -nf * h * ex["re_tr_thetam_u"] - 2.0 * kappa * ex["re_thetaa_det_u"]
    d = run_c(exe, unf_args(m, "hbor", sweeps, 20, beta=0.0, size=8), 1, None)
    out = {"measurement": "unf_c_exact_one_site", "nf": nf, "sweeps": sweeps,
           "action_per_site": d["action_per_site"], "action_per_site_err": d["action_per_site_err"],
           "action_per_site_exact": s_exact, "retr_over_nf": d["retr_over_nf"],
           "retr_over_nf_err": d["retr_over_nf_err"], "retr_over_nf_exact": ex["re_tr_u"]}
    out["z_action"] = (d["action_per_site"] - s_exact) / d["action_per_site_err"]
    out["z_retr"] = (d["retr_over_nf"] - ex["re_tr_u"]) / d["retr_over_nf_err"]
    return out


def unf_section(models: list, no_c: bool, quick: bool, secs: float, therm: int, emit, show) -> None:
    """(d): nf = 4..6 heatbath, overrelaxation and 1 hb + 3 or, numba and unf.c in ABBA order on 1 thread,
    the ratios, the physics of both at the same couplings (z) and unf.c at beta = 0 against the exact values."""
    from sigmasim.chain import Simulation
    from sigmasim.config import config_from_dict

    print("== nf = 4..6: the generic path against benchmarks/c/unf.c (a C build of the same algorithm, N a "
          "compile-time constant, chunks of 64 sites with the sites innermost, scalar libm), 1 thread, "
          "numba, C, C, numba")
    for model in models:  # warm the JIT cache (one kernel for every nf >= 2 heatbath/overrelaxation)
        for algo in UNF_ALGOS:
            c = config(model, algo, 0).to_dict()
            c["lattice"]["shape"] = [4, 4, 4]
            s = Simulation(config_from_dict(c))
            s.sweep()
            s.measure()
    nfs = [UNF_MODELS[m]["nf"] for m in models]
    exes, work = None, None
    if no_c:
        print("  unf.c: skipped (--no-c)")
    else:
        work = Path(tempfile.mkdtemp(prefix="sigmasim-unf-"))
        try:
            exes = build_unf(work, nfs)
            print(f"  unf.c: built for N = {', '.join(map(str, nfs))} in {work}")
        except (RuntimeError, OSError) as exc:
            print(f"  unf.c: build failed, ratios to C skipped ({exc})")
    rates, res = {}, {}
    try:
        for model in models:
            m = UNF_MODELS[model]
            volume = int(np.prod(m["shape"]))
            for algo in UNF_ALGOS:
                hits = 4 if algo == "hbor" else 1
                for k, who in enumerate(("numba", "c", "c", "numba") if exes else ("numba",)):
                    if who == "numba":
                        d = run_numba(model, algo, 1, secs, therm)
                        if k == 0:  # the C run gets about the same time: sweeps from our rate
                            n_c = max(20, int(secs * d["site_hits_per_second"] / (volume * hits)))
                    else:
                        try:
                            d = run_c(exes[m["nf"]], unf_args(m, algo, n_c, therm), 1, "c_unf")
                        except (subprocess.SubprocessError, OSError, ValueError) as exc:
                            print(f"  unf.c: failed ({exc})")
                            continue
                    d["model"] = model
                    res.setdefault((model, algo, who), d)
                    rates.setdefault((model, algo, who), []).append(
                        (d["site_hits_per_second"], d.get("site_hits_per_cpu_second", float("nan"))))
                    emit(d)
                    show(d)
        print("== nf = 4..6 ratios (same run; numba / unf.c, mean of the ABBA pair; wall-time rates, CPU-time "
              "rates in brackets; goal: >= 0.4 on 1 thread)")
        for model in models:
            for algo in UNF_ALGOS:
                a_, b_ = rates.get((model, algo, "numba")), rates.get((model, algo, "c"))
                if not a_ or not b_:
                    continue
                w = np.mean([x[0] for x in a_]) / np.mean([x[0] for x in b_])
                c = np.mean([x[1] for x in a_]) / np.mean([x[1] for x in b_])
                print(f"  {model} {algo:11s} numba / unf.c: {w:5.2f}  [{c:5.2f}]")
                emit({"measurement": "unf_ratio", "model": model, "algorithm": algo, "wall_ratio": w, "cpu_ratio": c})
        if not exes:
            return
        print("== nf = 4..6 physics (numba vs unf.c at the same couplings, each mean +- blocked error; "
              "z = difference / error; overrelaxation alone is not ergodic: both chains stay near the cold "
              "start, so its row compares like with like only loosely)")
        for model in models:
            for algo in UNF_ALGOS:
                nb, c = res.get((model, algo, "numba")), res.get((model, algo, "c"))
                if nb is None or c is None:
                    continue
                print(f"  {model} {algo:11s} {physics_comparison(nb, c)}")
        print("== unf.c at beta = 0 against the exact one-site values (sigmasim.exact.one_site_u; 8^3, "
              "1 hb + 3 or)")
        for model in models:
            m = UNF_MODELS[model]
            d = unf_exact_check(exes[m["nf"]], m, 300 if quick else 1000)
            emit(d)
            print(f"  {model} S/V {d['action_per_site']:.5f}+-{d['action_per_site_err']:.5f} exact "
                  f"{d['action_per_site_exact']:.5f} (z {d['z_action']:+.1f});  ReTrU/nf {d['retr_over_nf']:.5f}"
                  f"+-{d['retr_over_nf_err']:.5f} exact {d['retr_over_nf_exact']:.5f} (z {d['z_retr']:+.1f})"
                  + ("  <-- CHECK" if max(abs(d["z_action"]), abs(d["z_retr"])) > 4 else ""))
    finally:
        if work is not None:
            shutil.rmtree(work, ignore_errors=True)


# ----------------------------------------------------------------------------- compile / start-up / memory
_COMPILE_SNIPPET = r"""
import json, sys, time
t0 = time.perf_counter()
sys.path.insert(0, sys.argv[1])
sys.argv = sys.argv[:1] + sys.argv[2:]
import numba
from benchmarks.bench import config
from sigmasim.chain import Simulation
t_import = time.perf_counter() - t0
out = {"import": t_import}
for model in ("U1_d3", "U3_d3", "U2_d3"):
    for algo in ("metropolis", "heatbath", "overrelax"):
        sim = Simulation(config(model, algo, 0))
        t0 = time.perf_counter()
        sim.sweep()
        sim.measure()
        out[model + "/" + algo] = time.perf_counter() - t0
print(json.dumps(out))
"""

_MEMORY_SNIPPET = r"""
import gc, json, sys, tracemalloc
sys.path.insert(0, sys.argv[1])
model, algo, threads, sweeps = sys.argv[2], sys.argv[3], int(sys.argv[4]), int(sys.argv[5])
import numba
numba.set_num_threads(threads)
from benchmarks.bench import config
from sigmasim.chain import Simulation
from sigmasim.config import config_from_dict
def rss():
    for line in open("/proc/self/status"):
        if line.startswith("VmRSS"):
            return int(line.split()[1]) * 1024
# every kernel of the update loaded first (sweeps, tuning, re-unitarisation, measurement, thread
# pool) on a 4^3 lattice of the same model: compiled code and libraries are not memory of the run
c = config(model, algo, 0).to_dict(); c["lattice"]["shape"] = [4, 4, 4]
s = Simulation(config_from_dict(c))
for _ in range(25):
    s.sweep()
s.measure()
del s, c
gc.collect()
before = rss()
peak = before
tracemalloc.start()
sim = Simulation(config(model, algo, 0))
peak = max(peak, rss())
for i in range(sweeps):
    sim.sweep()
    if i % 5 == 4:
        sim.measure()
    peak = max(peak, rss())
after = rss()
traced_now, traced_peak = tracemalloc.get_traced_memory()
tracemalloc.stop()
print(json.dumps({"model": model, "algo": algo, "threads": threads, "sweeps": sweeps,
                  "rss_before": before, "rss_after": after, "added": after - before,
                  "peak_added": peak - before, "traced_end": traced_now, "traced_peak": traced_peak,
                  "field_bytes": sim.state.re.nbytes + sim.state.im.nbytes,
                  "table_bytes": sim.lattice.table_bytes,
                  "site_tables": sorted(sim.lattice._site_tables)}))
"""


def compile_times() -> dict:
    with tempfile.TemporaryDirectory() as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache)
        res = {}
        for label in ("cold", "cached"):
            t0 = time.perf_counter()
            out = subprocess.run([sys.executable, "-c", _COMPILE_SNIPPET, str(ROOT)], env=env,
                                 capture_output=True, text=True, check=True).stdout
            res[label] = json.loads(out.strip().splitlines()[-1])
            res[label]["process"] = time.perf_counter() - t0
    return res


def startup_time() -> dict:
    tiny = """name = "tiny"\nseed = 1\n[lattice]\nshape = [4, 4]\n[model]\nnf = 1\nbeta = 0.5\n
[run]\nthermalize = 5\nmeasurements = 5\n"""
    with tempfile.TemporaryDirectory() as d:
        cfg = Path(d) / "tiny.toml"
        cfg.write_text(tiny)
        cmd = [sys.executable, "-m", "sigmasim", "run", str(cfg), "--output", str(Path(d) / "out"),
               "--quiet", "--overwrite"]
        env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
        walls = []
        for _ in range(3):  # the first warms the cache
            t0 = time.perf_counter()
            p = subprocess.run(cmd, env=env, capture_output=True, text=True)
            walls.append(time.perf_counter() - t0)
            if p.returncode:
                return {"error": (p.stderr or p.stdout).strip().splitlines()[-1:]}
        t0 = time.perf_counter()
        subprocess.run([sys.executable, "-c", "import numba, h5py"], env=env, check=True)
        base = time.perf_counter() - t0
    return {"first": walls[0], "warm": min(walls[1:]), "python_numba_h5py_import": base}


def memory(model: str, algo: str, threads: int, sweeps: int = 60) -> dict:
    """Memory of one run of ``algo`` on ``model`` in a fresh subprocess (see the snippet)."""
    out = subprocess.run([sys.executable, "-c", _MEMORY_SNIPPET, str(ROOT), model, algo, str(threads),
                          str(sweeps)],
                         capture_output=True, text=True, check=True).stdout
    return json.loads(out.strip().splitlines()[-1])


# ----------------------------------------------------------------------------- main
def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="shorter runs (about a minute)")
    ap.add_argument("--threads", type=int, default=0, help="the 'all threads' count (default: all cores)")
    ap.add_argument("--no-c", action="store_true", help="skip the C yardstick")
    ap.add_argument("--no-compile", action="store_true", help="skip compile, start-up and memory timings")
    ap.add_argument("--models", default=",".join([*MODELS, *UNF_MODELS]),
                    help=f"comma-separated subset of {', '.join([*MODELS, *UNF_MODELS])} (default all)")
    ap.add_argument("--repeat", type=int, default=3,
                    help="repetitions of the interleaved 1 vs all threads timing (default 3)")
    args = ap.parse_args(argv)

    import numba

    nall = args.threads or numba.config.NUMBA_NUM_THREADS
    secs = 1.0 if args.quick else 3.0
    therm = {"U1_d3": 100 if args.quick else 200, "U3_d3": 60 if args.quick else 100,
             "U2_d3": 60 if args.quick else 100}
    models = [m.strip() for m in args.models.split(",") if m.strip()]
    bad = [m for m in models if m not in MODELS and m not in UNF_MODELS]
    if bad or not models:
        print(f"error: --models takes a comma-separated subset of {', '.join([*MODELS, *UNF_MODELS])}, "
              f"got {args.models!r}", file=sys.stderr)
        return 2
    unf_models = [m for m in models if m in UNF_MODELS]  # (d), timed in unf_section
    models = [m for m in models if m in MODELS]
    RESULTS.mkdir(parents=True, exist_ok=True)
    out_path = RESULTS / time.strftime("bench-%Y%m%d-%H%M%S.jsonl")
    lines = []

    def emit(d):
        lines.append(d)
        with open(out_path, "a") as f:
            f.write(json.dumps(d) + "\n")

    def show_machine(ms, when):
        print(f"machine ({when}): {nall} threads / 1 thread on toy loops, the same work per thread: "
              f"vector-throughput bound {ms['vector_bound']:.2f}x, latency bound {ms['latency_bound']:.2f}x "
              f"(well below {nall}x for the first: the vector units are shared, with the other CPU or with "
              f"other guests of the host, which caps the thread speed-up of vectorised kernels)", flush=True)
        emit({"measurement": "machine_scaling", "when": when, "threads": nall, **ms})

    def show(d):
        flag = "  [contended]" if d.get("contended") else ""
        print(f"  {d['model']:6s} {d['algorithm']:26s} {d['implementation']:16s} th={d['threads']} "
              f"{d['site_hits_per_second']:10.3e} hits/s ({d.get('site_hits_per_cpu_second', float('nan')):9.3e}"
              f" per CPU s)  acc {d['acceptance']:.3f}  "
              f"S/V {d['action_per_site']:.5f}+-{d['action_per_site_err']:.5f}  "
              f"ReTrU/nf {d['retr_over_nf']:.5f}+-{d['retr_over_nf_err']:.5f}  "
              f"load {d['foreign_load_before']:.2f}{flag}", flush=True)

    print(f"sigmasim benchmark  (numba {numba.__version__}, {os.cpu_count()} cpus, "
          f"threading layer {numba.config.THREADING_LAYER}, all threads = {nall})")
    print(f"foreign load now: {foreign_load(1.0):.2f} (busy fraction of all cores)")
    if nall > 1:
        ms = machine_scaling(nall)
        show_machine(ms, "start")

    # warm the JIT cache so that no compile lands in a timed run
    for model in models:
        for algo in ALGOS[model]:
            c = config(model, algo, 0).to_dict()
            c["lattice"]["shape"] = [4, 4, 4]
            from sigmasim.chain import Simulation
            from sigmasim.config import config_from_dict
            s = Simulation(config_from_dict(c))
            s.sweep()
            s.measure()

    pdir = None if args.no_c or not models else perf_dir()
    exes = None
    work = None
    if args.no_c:
        print("C yardstick: skipped (--no-c)")
    elif not models:
        pass  # only nf = 4..6 rows: the yardstick has no program for them (unf_section builds unf.c)
    elif pdir is None:
        print("C yardstick: NOT FOUND (set SIGMASIM_PERF_DIR or put it at ../shared/perf); "
              "ratios to C skipped")
    else:
        work = Path(tempfile.mkdtemp(prefix="sigmasim-perf-"))
        try:
            exes = build_c(pdir, work)
            print(f"C yardstick: {pdir}, built in {work}")
        except (RuntimeError, OSError) as exc:
            print(f"C yardstick: build failed, ratios to C skipped ({exc})")
            exes = None

    c_sweeps = {  # (sweeps, thermalisation) of one C run, about a second on an idle core
        ("U1_d3", "metropolis"): (3000, 200), ("U1_d3", "heatbath"): (1500, 200),
        ("U3_d3", "metropolis"): (1500, 100), ("U3_d3", "heatbath"): (600, 50),
        ("U3_d3", "overrelax"): (1500, 50), ("U3_d3", "hbor"): (300, 50),
        ("U2_d3", "metropolis"): (3000, 300), ("U2_d3", "heatbath"): (1200, 50),
        ("U2_d3", "overrelax"): (3000, 50), ("U2_d3", "hbor"): (600, 50),
    }
    c_scalar_sweeps = {"U1_d3": (300, 200), "U3_d3": (150, 100) if args.quick else (300, 100),
                       "U2_d3": (300, 100)}
    res = {}
    rates = {}  # (model, algo, impl) -> [(wall rate, cpu rate)], impl numba / numba_N / c / c_omp2

    def c_run(exe, argv, th, impl):
        try:
            d = run_c(exe, argv, th, "c_scalar" if impl == "c_scalar" else None)
        except (subprocess.SubprocessError, OSError, ValueError) as exc:
            print(f"  {impl}: failed ({exc})")
            return None
        d["implementation"] = impl
        return d

    for model in models:
        print(f"== {model}")
        for algo in ALGOS[model]:
            prog = C_PROGRAM[model]
            has_c = exes is not None and (model, algo) in c_sweeps
            n, t = c_sweeps.get((model, algo), (0, 0))
            if args.quick:
                n = max(50, n // 2)
            cargs = ["--algo", C_ALGO[algo], "--sweeps", str(n), "--therm", str(t), "--seed", "1001"]
            for th in sorted({1, nall}):
                impl_c, exe = ("c", prog) if th == 1 else ("c_omp2", prog + "_omp")
                # ABBA: numba, C, C, numba (each compared only with the runs beside it)
                order = ("numba", "c", "c", "numba") if has_c and (th == 1 or nall == 2) else ("numba",)
                for who in order:
                    if who == "numba":
                        d = run_numba(model, algo, th, secs, therm[model])
                        key = "numba" if th == 1 else f"numba_{th}"
                        res.setdefault((model, algo, th), d)
                    else:
                        d = c_run(exes[exe], cargs, th, impl_c)
                        if d is None:
                            continue
                        key = impl_c
                        res.setdefault((model, "c:" + impl_c, algo), d)
                    emit(d)
                    show(d)
                    rates.setdefault((model, algo, key), []).append(
                        (d["site_hits_per_second"], d.get("site_hits_per_cpu_second", float("nan"))))
            if algo == "metropolis" and exes:
                n, t = c_scalar_sweeps[model]
                d = c_run(exes[prog + "_scalar"], ["--algo", "metro", "--sweeps", str(n), "--therm", str(t),
                                                   "--seed", "1001"], 1, "c_scalar")
                if d is not None:
                    emit(d)
                    show(d)
                    res[(model, "c:c_scalar", algo)] = d
                    rates.setdefault((model, algo, "c_scalar"), []).append(
                        (d["site_hits_per_second"], d.get("site_hits_per_cpu_second", float("nan"))))

    inter = {}
    if nall > 1:
        print(f"== {nall} threads vs 1 thread interleaved on one chain (alternating blocks of sweeps), "
              f"{args.repeat} repetitions, each after the toy-loop check of the machine")
        for rep in range(args.repeat):
            ms = machine_scaling(nall)
            print(f"  repetition {rep + 1}: toy loops vector-bound {ms['vector_bound']:.2f}x, "
                  f"latency-bound {ms['latency_bound']:.2f}x", flush=True)
            emit({"measurement": "machine_scaling", "when": f"interleaved repetition {rep + 1}", "threads": nall,
                  **ms})
            for model in models:
                for algo in ALGOS[model]:
                    d = interleaved_speedup(model, algo, nall, secs, therm[model])
                    d["repetition"] = rep + 1
                    emit(d)
                    inter.setdefault((model, algo), []).append(d)
                    flag = "  [contended]" if d["contended"] else ""
                    print(f"    {model:6s} {algo:10s} 1 thread {d['seconds_per_sweep_1'] * 1e6:7.0f} us/sweep "
                          f"({d['site_hits_per_second_1']:.3e} hits/s), {nall} threads "
                          f"{d[f'seconds_per_sweep_{nall}'] * 1e6:7.0f} us/sweep: {d['speedup']:.2f}x "
                          f"({d['blocks']} blocks of {d['sweeps_per_block']})  load {d['foreign_load_before']:.2f}"
                          f"{flag}", flush=True)
        show_machine(machine_scaling(nall), "after the timings")
    print("== ratios (same run; numba over C, each the mean of the ABBA pair beside it; wall-time "
          "rates, CPU-time rates in brackets; goal: >= 0.7 on 1 thread, >= 1.7x from 1 to 2 threads)")
    for model in models:
        for algo in ALGOS[model]:
            one = res[(model, algo, 1)]["site_hits_per_second"]
            if nall > 1:
                many = res[(model, algo, nall)]["site_hits_per_second"]
                extra = ""
                if (model, algo) in inter:
                    sp = sorted(d["speedup"] for d in inter[(model, algo)])
                    extra = (f"  (interleaved on one chain: median {float(np.median(sp)):.2f}x, "
                             f"range {sp[0]:.2f}-{sp[-1]:.2f}x over {len(sp)})")
                print(f"  {model} {algo:11s} numba {nall} threads / 1 thread: {many / one:5.2f}x{extra}")
            for mine, theirs in (("numba", "c"), ("numba", "c_scalar"), (f"numba_{nall}", "c_omp2")):
                a_, b_ = rates.get((model, algo, mine)), rates.get((model, algo, theirs))
                if not a_ or not b_:
                    continue
                w = np.mean([x[0] for x in a_]) / np.mean([x[0] for x in b_])
                c = np.mean([x[1] for x in a_]) / np.mean([x[1] for x in b_])
                print(f"  {model} {algo:11s} {mine} / {theirs}: {w:5.2f}  [{c:5.2f}]")
            if (model, algo, "c") in rates and (model, algo, "c_omp2") in rates:
                sp = (np.mean([x[0] for x in rates[(model, algo, "c_omp2")]])
                      / np.mean([x[0] for x in rates[(model, algo, "c")]]))
                print(f"  {model} {algo:11s} C 2-thread speed-up: {sp:5.2f}x")

    print("== physics sanity (Metropolis; numba vs C, each mean +- blocked error; z = difference / error)")
    for model in models:
        nb = res[(model, "metropolis", 1)]
        c = res.get((model, "c:c", "metropolis"))
        if c is None:
            print(f"  {model}: numba S/V {nb['action_per_site']:.5f}+-{nb['action_per_site_err']:.5f}, "
                  f"ReTrU/nf {nb['retr_over_nf']:.5f}+-{nb['retr_over_nf_err']:.5f} (no C run)")
            continue
        print(f"  {model}: {physics_comparison(nb, c)}")

    if unf_models:
        unf_section(unf_models, args.no_c, args.quick, secs, 60 if args.quick else 100, emit, show)

    if not args.no_compile:
        print("== JIT compile (first sweep + measure of each update; subprocess, temporary NUMBA_CACHE_DIR)")
        ct = compile_times()
        for label in ("cold", "cached"):
            r = ct[label]
            parts = "  ".join(f"{k} {v:.2f}s" for k, v in r.items() if "/" in k)
            total = sum(v for k, v in r.items() if "/" in k)
            print(f"  {label:6s} total {total:6.2f}s  (import {r['import']:.2f}s, process {r['process']:.2f}s)  {parts}")
            emit({"measurement": "compile", "cache": label, **r})
        print("== start-up of `sigmasim run` on a tiny config (warm cache, wall time of the process)")
        su = startup_time()
        if "error" in su:
            print(f"  failed: {su['error']}")
        else:
            print(f"  warm {su['warm']:.2f}s (goal < 3 s; first run {su['first']:.2f}s; "
                  f"bare `import numba, h5py` {su['python_numba_h5py_import']:.2f}s)")
        emit({"measurement": "startup", **su})
        print("== memory (one subprocess per run, every kernel loaded first on a 4^3 lattice; counted: the "
              "growth of the process from just before the Simulation is built to after 60 sweeps and 12 "
              "measurements, with the Simulation alive)")
        for model in models:
            for algo in ("metropolis", "heatbath", "overrelax"):
                mem = memory(model, algo, nall)
                f = mem["field_bytes"]
                mib = 2.0 ** 20
                print(f"  {model} {algo:10s} field {f / mib:.2f} MiB, lattice tables {mem['table_bytes'] / mib:.2f} MiB"
                      f" ({', '.join(mem['site_tables']) or 'row tables only'}); numpy (tracemalloc) peak "
                      f"{mem['traced_peak'] / mib:.2f} MiB, held at the end {mem['traced_end'] / mib:.2f} MiB; "
                      f"RSS growth {mem['added'] / mib:.2f} MiB = {mem['added'] / f:.2f}x the field "
                      f"(largest after a sweep {mem['peak_added'] / mib:.2f} MiB = {mem['peak_added'] / f:.2f}x)")
                emit({"measurement": "memory", **mem})
    print(f"results: {out_path}")
    if work is not None:
        shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
