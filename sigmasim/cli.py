"""Command line: ``sigmasim run | scan | demo | info | analyze | hysteresis | temper | lifetimes |
multicanonical | umbrella | vacua | validate | export | synth | score | config-reference``
(``sweep``: the old name of ``hysteresis``, for one more release).

This is the error boundary: every :class:`SigmasimError` becomes one line on
stderr and exit status 2; an interrupted run exits with 130 after writing its
checkpoint.  It also holds all the printing: every ``*_command`` function lives here and formats
what the modules' public functions return (the modules themselves print nothing).
"""

from __future__ import annotations

import argparse
import signal
import sys
from pathlib import Path

from sigmasim.errors import SigmasimError

__all__ = ["main", "format_vacua", "format_lifetimes", "hysteresis_command", "temper_command",
           "lifetimes_command"]


class _Parser(argparse.ArgumentParser):
    protocol_table = None  # a protocol command's table: its keys end the --help text

    def error(self, message):  # one line, exit 2, no usage dump
        sys.stderr.write(f"sigmasim: error: {message} (see sigmasim --help)\n")
        raise SystemExit(2)

    def format_help(self):
        text = super().format_help()
        if self.protocol_table:
            from sigmasim.reference import table_help

            text += "\n" + table_help(self.protocol_table) + "\n"
        return text


def _set_threads(n: int, sites_per_colour: int | None = None, nf: int = 1) -> int:
    """numba threads: ``n`` if positive, else one below the crossover lattice size, else the idle
    cores (:mod:`sigmasim.threads`)."""
    from sigmasim.threads import set_threads

    return set_threads(n, sites_per_colour, nf)


def execute_run(config, **kw) -> Path:
    """:func:`sigmasim.run.execute_run` with the command line's note on stderr (a resume with
    nothing left to run says so)."""
    from sigmasim.run import execute_run as run

    kw.setdefault("note", lambda text: print(f"sigmasim: {text}", file=sys.stderr))
    return run(config, **kw)


#: below this many independent samples of Im Omega_h the run table warns (N / (2 tau_int))
FEW_INDEPENDENT = 50


def _independent_samples(x) -> float:
    """N / (2 tau_int) of a series (Gamma method); N for a constant or too short series."""
    import numpy as np

    from sigmasim.analysis.gamma import gamma_analysis

    x = np.asarray(x, float)
    if x.size < 4 or not np.ptp(x) > 1e-10:  # constant up to rounding (SU(2): Im Tr U = 0)
        return float(x.size)
    try:
        tau = float(gamma_analysis(x).tau_int)
    except Exception:  # a decoration of the table: never fail the run over it
        return float(x.size)
    return x.size / (2 * max(tau, 0.5))


def _summary_table(paths) -> str:
    import numpy as np

    from sigmasim.storage import open_run

    def rate(x):
        x = x[~np.isnan(x)]
        return f"{x.mean():.2f}" if x.size else "-"

    runs = [open_run(p) for p in paths]
    wide = max([22, *(len(d.config.name) + 2 for d in runs)])
    head = (f"{'run':<{wide}}{'theta':>8}{'<S>/V':>10}{'<Re Omega_h>':>14}{'<Im Omega_h>':>14}"
            f"{'<|Omega|>':>11}{'acc Metr':>10}{'acc phase':>11}  branch (tree level)")
    lines = [head, "-" * len(head)]
    few = []
    for d in runs:
        s = d.series
        lines.append(
            f"{d.config.name:<{wide}}{d.config.theta:>8.3f}{s['action'].mean():>10.4f}"
            f"{s['omega_h'].real.mean():>14.4f}{s['omega_h'].imag.mean():>14.4f}"
            f"{np.abs(s['omega']).mean():>11.4f}{rate(s['accept_metropolis']):>10}{rate(s['accept_phase']):>11}"
            f"  {_branch_note(d.config, s['omega_h'])}"
        )
        n_ind = _independent_samples(s["omega_h"].imag)
        if n_ind < FEW_INDEPENDENT:
            few.append(f"warning: {d.config.name}: <Im Omega_h> rests on about {n_ind:.0f} independent samples "
                       f"({len(d)} measurements); its plain mean is not reliable, run longer")
    lines += few
    lines.append("(plain means; acc: Metropolis and U(1) phase-move acceptance, '-' where the schedule has none,\n"
                 " an exact heatbath takes every move; run 'sigmasim analyze' for errors. branch k: arg Omega_h nearest "
                 "(theta + 2 pi k)/nf for most measurements;")
    lines.append(" global/METASTABLE: the tree-level minima at that theta (sigmasim vacua). "
                 "Research toy, not a physical prediction.)")
    return "\n".join(lines)


def _branch_note(config, omega_h) -> str:
    """``k = -1 METASTABLE (global 0)`` for the summary tables (the convention of sigmasim.vacua)."""
    from sigmasim import vacua

    k, frac = vacua.measured_branch(omega_h, config.theta, config.nf)
    note = f"k = {k}"
    if frac == frac and frac < 0.9:
        note += f" ({frac:.0%} of meas.)"
    pot = vacua.potential_of_config(config)
    if pot is None:
        return note + " (no tree-level potential for this model)"
    st = vacua.branch_status(pot, k)
    if st.status == "flat":
        return note + " (flat tree-level potential: no isolated vacuum)"
    g = ",".join(str(b) for b in st.global_branches)
    word = {"metastable": "METASTABLE", "no minimum": "not a tree-level minimum"}.get(st.status, st.status)
    return f"{note} {word}" + ("" if st.status.startswith("global") and len(st.global_branches) == 1
                                 else f" (global {g})")


# [sweep] is the old name of [hysteresis], read for one more release
PROTOCOL_TABLES = {"hysteresis": "hysteresis", "sweep": "hysteresis", "tempering": "temper", "lifetimes": "lifetimes",
                   "scan": "scan",
                   "multicanonical": "multicanonical", "umbrella": "umbrella"}


def _refuse_protocol_tables(path, raw=None) -> None:
    from sigmasim.config import read_toml
    from sigmasim.errors import ConfigError

    if raw is None:
        raw = read_toml(path)
    for table, command in PROTOCOL_TABLES.items():
        if table in raw:
            raise ConfigError(f"{path} has a [{table}] table: run it with 'sigmasim {command} {path}'")



# ---------------------------------------------------------------- command printers
# each does its module's work through its public functions and prints the result

def score_command(truth_json: str, estimates_json: str) -> int:
    """``sigmasim score``: print the table; return 0 when every verdict is 'ok', 1 otherwise
    (biased, errors too small or too large, not normal, off by > 3 sigma), so scripts can test it."""
    from sigmasim.score import format_scores, load_estimates, load_truth, score

    truth = load_truth(truth_json)
    rows = score(truth, load_estimates(estimates_json))
    print(format_scores(rows))
    if any(r.n >= 2 for r in rows):
        print("pull = (estimate - truth)/error; over replicas honest errors give mean 0, "
              "width 1 (errors in brackets)")
    bad = [r.name for r in rows if r.verdict != "ok"]
    if bad:
        print(f"not ok: {', '.join(bad)} (exit status 1)")
        return 1
    return 0


def export_command(run_path: str, fmt: str, out: str | None, reference: bool = False,
                   overwrite: bool = False) -> int:
    """``sigmasim export``: write the export (never over existing files without ``overwrite``),
    print the written files, return 0."""
    import json
    from sigmasim.export import export_run

    paths = export_run(run_path, fmt, out, reference, overwrite=overwrite)
    side = json.loads(paths[-1].read_text())
    kinds = {}
    for e in side["truth"].values():
        kinds[e["how"]] = kinds.get(e["how"], 0) + 1
    what = ", ".join(f"{n} {k}" for k, n in kinds.items()) or "none"
    shown = paths if len(paths) <= 4 else paths[:2] + [f"... ({len(paths) - 3} more)"] + paths[-1:]
    print(f"wrote {len(paths) - 1} data file(s) and the sidecar {paths[-1]}")
    for p in shown[:-1]:
        print(f"  {p}")
    print(f"truth values: {what}")
    return 0


def synth_command(kind: str, out: str, seed: int, **params) -> int:
    """``sigmasim synth``: write ``OUT.npz`` and ``OUT.json``; return 0."""
    from sigmasim.export import write_arrays
    from sigmasim.synth import synthesize

    arrays, side = synthesize(kind, seed, **params)
    entries = side.pop("arrays")
    paths = write_arrays(Path(out), arrays, entries, "npz", side)
    shapes = ", ".join(f"{k} {tuple(a.shape)}" for k, a in arrays.items())
    print(f"wrote {paths[0]} ({shapes}) and {paths[-1]}")
    tr = ", ".join(f"{k} = {v['value']:.6g}" for k, v in side["truth"].items()
                   if isinstance(v["value"], float))
    print(f"truth: {tr}")
    return 0


def scan_command(path: str, scheduler: str | None = None, workers: int | None = None,
                 threads: int | None = None, collect_only: bool = False, plot: str | None = None,
                 x: str | None = None, quiet: bool = False, raw: dict | None = None) -> int:
    """``sigmasim scan SCAN.toml [--scheduler ADDR] [--workers N] [--collect] [--plot OBS --x KEY]``."""
    from sigmasim.errors import ConfigError
    from sigmasim.scan import collect, format_index, load_scan, plot_index, run_scan

    spec = load_scan(path, raw)
    if workers is not None and workers < 1:
        raise ConfigError(f"--workers must be >= 1, got {workers}")
    if threads is not None and threads < 1:
        raise ConfigError(f"--threads must be >= 1, got {threads}")
    points = None
    status = 0
    if not collect_only:
        try:
            points = run_scan(spec, scheduler=scheduler, workers=workers, threads=threads, quiet=quiet)
        except KeyboardInterrupt:
            collect(spec)
            print(f"sigmasim: scan interrupted; every point is resumable: sigmasim scan {path}",
                  file=__import__("sys").stderr)
            return 130
    points, csv_path, h5_path = collect(spec, points)
    print(format_index(spec, points))
    n = {s: sum(p.status == s for p in points) for s in ("done", "partial", "failed", "pending")}
    print(f"{len(points)} points: {n['done']} done, {n['partial']} partial, {n['failed']} failed, "
          f"{n['pending']} pending  (errors: Gamma method; research toy, not a physical prediction)")
    for p in points:
        if p.status == "failed":
            print(f"failed: {p.label}: {p.error}")
    print(f"index: {csv_path} and {h5_path}")
    if plot:
        print(f"figure: {plot_index(spec, points, plot, x)}")
    if n["failed"] or (not collect_only and (n["partial"] or n["pending"])):
        status = 1
    return status


def analyze_command(paths: list[str], plot: bool = False, out_dir: str | None = None,
                    quiet: bool = False, band: float = 0.5) -> int:
    """``sigmasim analyze PATH... [--plot] [--out DIR] [--band B] [--quiet]``.

    Opens every run first (a bad file raises :class:`RunFileError` with a
    one-line message before any work), analyses each, prints the table
    (unless ``quiet``), writes ``<run>.analysis.json`` / ``.csv`` next to each
    run and, with ``plot``, the figures (PNG and PDF) into ``out_dir`` or next
    to the run.  Returns 0.
    """
    from sigmasim.errors import RunFileError
    from sigmasim.analysis.report import analyze_data, compare_branches, format_table, write_outputs

    from sigmasim.storage import open_run

    if not paths:
        raise SigmasimError("analyze: give at least one run file")
    if not (isinstance(band, (int, float)) and 0.0 <= band < 1.0):
        raise SigmasimError(f"--band must be in [0, 1), got {band}")
    resolved = []
    for p in paths:
        p = Path(p)
        if p.is_dir():  # a run folder <output>/<name>/ holds <name>.h5
            cand = p / f"{p.name}.h5"
            if not cand.exists():
                raise RunFileError(f"{p} is a folder without {cand.name}")
            p = cand
        resolved.append(p)
    from sigmasim.storage import MUCA_FORMAT, hdf5_root_attrs

    for p in resolved:
        try:
            fmt = hdf5_root_attrs(p, ("format",)).get("format") if p.is_file() else None
        except OSError:
            fmt = None
        if fmt == MUCA_FORMAT:
            raise RunFileError(f"{p} is a multicanonical file, not a run: 'sigmasim info {p}' prints its "
                               "reweighted averages and barrier")
    from sigmasim.progress import Steps

    data = [(p, open_run(p)) for p in resolved]
    analyses, written = [], []
    progress = Steps("analyze", quiet, "file")
    for i, (p, d) in enumerate(data):
        progress(i, len(data), p.name)  # a live line naming the file being analysed
        analyses.append(analyze_data(d.series, d.slices, d.config, status=d.status, path=p, band=band))
    compare_branches(analyses)
    for (p, d), ra in zip(data, analyses):
        written += list(write_outputs(ra))
        if plot:
            from sigmasim.analysis.plots import plot_all

            target = Path(out_dir) if out_dir else p.parent
            try:
                target.mkdir(parents=True, exist_ok=True)
            except OSError as exc:
                raise RunFileError(f"cannot create the figure folder {target}: {exc.strerror}") from None
            written += plot_all(ra, target)
    progress.close()
    if not quiet:
        print(format_table(analyses))
        print("written: " + ", ".join(str(w) for w in written))
        sys.stdout.flush()
    return 0


def multicanonical_command(config_path: str, out: str | None = None, quiet: bool = False,
                           overwrite: bool = False, plot: bool = False) -> int:
    """``sigmasim multicanonical CONFIG [--out FILE.h5] [--overwrite] [--plot] [--quiet]``.

    Runs the protocol, prints the summary and writes ``<run.output>/<name>/<name>-multicanonical.h5``
    (or ``--out``): the frozen weight and its edges, the Wang-Landau histograms, the production
    series (x, W(x) and every run series), the profile -ln P(x) with errors, and the averages,
    barrier, round trips and timings as attributes.  The run checkpoints to ``<file>.checkpoint``
    and a rerun of the same command continues it (Ctrl-C/SIGTERM: checkpoint, exit 130).  A file
    there that this command did not write is never replaced, one of another config only with
    ``--overwrite``.  ``--plot`` also draws -ln P(x) with its error band into FILE.png.
    """
    from sigmasim.chain import Interrupted
    from sigmasim.protocols import multicanonical as mc

    config, params = mc.load_multicanonical(config_path)
    path = Path(out) if out is not None else mc.default_path(config)

    def stage(name):
        if not quiet:
            print(f"[{name}]", flush=True)

    try:
        res = mc.execute(config, params, path, overwrite=overwrite, progress=stage,
                         note=lambda text: print(text, flush=True))
    except Interrupted as exc:
        print(f"sigmasim: stopped at sweep {exc.args[0]}; checkpoint written to {mc.checkpoint_path(path)}; "
              f"continue with: sigmasim multicanonical {config_path}" + (f" --out {out}" if out else ""),
              file=sys.stderr)
        return 130
    if res is not None:
        print(res.summary())
        print(f"wrote {path}")
        if plot:
            print(f"wrote {mc.plot_profile(res, path.with_suffix('.png'))}")
    return 0


def umbrella_command(config_path: str, serial: bool = False, quiet: bool = False) -> int:
    """``sigmasim umbrella CONFIG [--serial] [--quiet]``: run the missing windows, join, write."""
    from sigmasim.errors import RunFileError
    from sigmasim.protocols.umbrella import _prepare_folder, join_windows, load_umbrella, run_windows, write_outputs

    raw, config, params = load_umbrella(config_path)
    folder = config.run_dir / "umbrella"
    from sigmasim.storage import release_lock, take_lock

    folder.parent.mkdir(parents=True, exist_ok=True)
    lock = take_lock(folder.parent / "umbrella.lock", "umbrella", folder)
    try:
        _prepare_folder(folder, raw, config, params)

        def show(st):
            if not quiet:
                word = "skipped (complete)" if st.get("skipped") else st["status"]
                extra = f": {st['error']}" if st["error"] else f" in {st['seconds']:.1f} s"
                print(f"window {st['window']}: {word}{extra}", flush=True)

        status = run_windows(raw, config, params, folder, serial=serial, progress=show)
        failed = [s for s in status if s["status"] != "done"]
        if failed:
            raise RunFileError(f"{len(failed)} window(s) failed, first: {failed[0]['error']}; "
                               "fix and rerun (complete windows are kept)")
        res = join_windows(folder, params)
        print(res.summary())
        for path in write_outputs(res, folder, config.name):
            print(f"wrote {path}")
    finally:
        release_lock(lock)
    return 0



def cmd_run(args) -> int:
    from sigmasim.chain import Interrupted
    from sigmasim.config import config_from_dict, read_toml

    overrides = {}
    if args.output is not None:
        overrides["output"] = args.output
    if args.threads is not None:
        overrides["threads"] = args.threads
    if args.smoke:
        overrides.update(thermalize=10, measurements=20, name=Path(args.config).stem + "-smoke")
    raw = read_toml(args.config)  # once: the config may be a pipe
    _refuse_protocol_tables(args.config, raw)
    config = config_from_dict(raw, overrides)
    _set_threads(config.threads, config.volume // 2, config.nf)
    try:
        path = execute_run(config, resume=args.resume, overwrite=args.overwrite, quiet=args.quiet)
    except Interrupted as exc:
        print(f"sigmasim: stopped at sweep {exc.args[0]}; checkpoint written to {config.run_file}; "
              f"continue with: sigmasim run {args.config} --resume", file=sys.stderr)
        return 130
    print(_summary_table([path]))
    print(f"run file: {path}")
    return 0


def _parse_scan_values(text: str) -> list:
    from sigmasim.errors import ConfigError

    out = []
    for item in text.split(","):
        item = item.strip()
        try:
            out.append(int(item))
        except ValueError:
            try:
                out.append(float(item))
            except ValueError:
                raise ConfigError(f"--values must be numbers separated by commas, got {item!r}") from None
    if not out:
        raise ConfigError("--values is empty")
    return out


def cmd_scan(args) -> int:
    """A scan file runs on Dask (:mod:`sigmasim.scan`); a run config with --param/--values runs
    one config at several values of one key in turn: <name>-<key>-<value> per value."""
    from sigmasim.chain import Interrupted
    from sigmasim.config import SCHEMA, config_from_dict, read_toml
    from sigmasim.errors import ConfigError

    raw = read_toml(args.config)  # once: the config may be a pipe
    if "scan" in raw:

        for flag in ("param", "values", "output"):
            if getattr(args, flag) is not None:
                raise ConfigError(f"--{flag} is for a run config; a scan file sets its axes and output itself")
        if args.resume or args.overwrite:
            raise ConfigError("a scan file resumes by itself; --resume/--overwrite are for a run config")
        return scan_command(args.config, scheduler=args.scheduler, workers=args.workers, threads=args.threads,
                            collect_only=args.collect, plot=args.plot, x=args.x, quiet=args.quiet, raw=raw)
    for flag in ("scheduler", "workers", "plot", "x"):
        if getattr(args, flag) is not None:
            raise ConfigError(f"--{flag} needs a scan file (a TOML with a [scan] table)")
    if args.collect:
        raise ConfigError("--collect needs a scan file (a TOML with a [scan] table)")
    if args.param is None or args.values is None:
        raise ConfigError(f"{args.config} has no [scan] table: give --param and --values, or write a scan file")
    _refuse_protocol_tables(args.config, raw)
    base = config_from_dict(raw)  # validates the file itself first
    section, _, key = args.param.rpartition(".")
    if section not in SCHEMA or key not in SCHEMA[section] or args.param in ("name", "lattice.shape"):
        raise ConfigError(f"--param {args.param!r} is not a scannable config key (e.g. model.theta)")
    if args.threads is not None:
        config_from_dict(raw, {"threads": args.threads})  # checked like the file key
    if args.output is not None:
        config_from_dict(raw, {"output": args.output})
    _set_threads(base.threads if args.threads is None else args.threads, base.volume // 2, base.nf)
    paths = []
    for value in _parse_scan_values(args.values):
        one = dict(raw)
        tgt = one if not section else dict(one.get(section, {}))
        tgt[key] = value
        if section:
            one[section] = tgt
        one["name"] = f"{base.name}-{key}-{value}"
        if args.output is not None:
            one.setdefault("run", {})
            one["run"] = {**one["run"], "output": args.output}
        cfg = config_from_dict(one)
        try:
            paths.append(execute_run(cfg, resume=args.resume and cfg.run_file.exists(),
                                     overwrite=args.overwrite, quiet=args.quiet, label=f"{key}={value}"))
        except Interrupted as exc:
            print(f"sigmasim: scan stopped at {key} = {value}, sweep {exc.args[0]}; "
                  f"continue with: sigmasim scan {args.config} --param {args.param} "
                  f"--values {args.values} --resume", file=sys.stderr)
            return 130
    print(_summary_table(paths))
    print(f"run files: {', '.join(str(p) for p in paths)}")
    return 0


def cmd_demo(args) -> int:
    import math

    from sigmasim.chain import Interrupted
    from sigmasim.config import config_from_dict

    _set_threads(0, 4**3 // 2, 3)
    thetas = [2.6, 3.0, math.pi, 3.3, 3.7]
    paths = []
    print("demo: three flavours with a strong anomaly on a 4^3 lattice, theta across pi;\n"
          "every theta starts from the same random field (hot start, same seed) and the lattice is\n"
          "small enough for the field to tunnel between branches, so the sign of Im Omega_h follows\n"
          "the vacuum that is global at each theta (branch 0 below pi, branch -1 above), not the start")
    for th in thetas:
        raw = {
            "name": f"demo-theta-{th:.3f}",
            "seed": 2026,
            "lattice": {"shape": [4, 4, 4]},
            "model": {"nf": 3, "beta": 1.0, "mass": 0.2, "kappa": 1.0, "theta": th},
            "updates": {"schedule": [{"update": "heatbath", "repeat": 1}, {"update": "overrelax", "repeat": 2}]},
            "run": {"thermalize": 200, "measurements": 3000, "start": "hot", "output": args.output},
        }
        cfg = config_from_dict(raw)
        if cfg.run_file.exists():
            # the demo replaces its own earlier file, but never one that a process is writing now
            from sigmasim.storage import lock_path, release_lock, take_lock

            lock = take_lock(lock_path(cfg.run_file), "sigmasim process", cfg.run_file)
            try:
                cfg.run_file.unlink(missing_ok=True)
            finally:
                release_lock(lock)
        try:
            paths.append(execute_run(cfg, quiet=args.quiet, label=f"theta={th:.3f}"))
        except Interrupted:
            print("sigmasim: demo interrupted", file=sys.stderr)
            return 130
    print(_summary_table(paths))
    print(f"run files: {Path(args.output) / 'demo-theta-*'}/")
    return 0


def cmd_info(args) -> int:
    from sigmasim.info import info_text

    print(info_text(args.file))
    return 0


def cmd_analyze(args) -> int:

    return analyze_command(args.files, plot=args.plot, out_dir=args.out, quiet=args.quiet, band=args.band)


def _renamed(old: list, new: list) -> None:
    """One line on stderr for names kept as aliases for one release."""
    if old:
        sys.stderr.write(f"sigmasim: note: {' and '.join(old)} {'is' if len(old) == 1 else 'are'} now "
                         f"{' and '.join(new)}; the old name{'s' if len(old) > 1 else ''} work"
                         f"{'s' if len(old) == 1 else ''} until the next release\n")


def _jump_line(s: dict, d: str) -> str:
    import math

    from sigmasim.protocols.hysteresis import _jump_text

    v, e = s[f"jump_{d}"], s[f"jump_{d}_error"]
    n = sum(math.isfinite(x) for x in s[f"jump_{d}_per_cycle"])
    txt = (_jump_text(v) if not math.isfinite(v) else
           f"{v:.4f}" + (f" +- {e:.2g}" if math.isfinite(e) else "")
           + f" ({n} of {s['cycles']} cycles; resolution {s['jump_resolution']:.3g})")
    return f"jump {d:<5}{txt}"


def hysteresis_command(config_path: str, plot: bool = False, out: str | None = None, overwrite: bool = False,
                       quiet: bool = False, command: str = "hysteresis") -> int:
    """``sigmasim hysteresis CONFIG [--plot] [--out FILE] [--overwrite] [--quiet]``: run a hysteresis
    protocol, write its sweep file, print the jumps and the loop area (``command``: the name it was
    called by; the old name ``sweep`` gets a note).

    The protocol keeps a checkpoint beside its file (``<file>.checkpoint``) and continues it when run
    again after a crash; an existing sweep file is replaced only with ``--overwrite``.
    """
    import math

    from sigmasim.progress import Steps
    from sigmasim.protocols import hysteresis

    config, params, table = hysteresis.load_hysteresis(config_path)
    old, new = [], []
    if command != "hysteresis":
        old, new = [f"'sigmasim {command}'"], ["'sigmasim hysteresis'"]
    if table != "hysteresis":
        old, new = old + [f"the [{table}] table"], new + ["[hysteresis]"]
    _renamed(old, new)
    path = Path(out) if out else hysteresis.default_path(config)
    with Steps("hysteresis", quiet, "theta step") as progress:
        result = hysteresis.execute(config, params, path, overwrite=overwrite, progress=progress)
    s = result.summary
    print(f"wrote {path}")
    for d in ("up", "down"):
        print(_jump_line(s, d))
    stat = f" +- {s['area_error_stat']:.2g} (stat)" if math.isfinite(s["area_error_stat"]) else ""
    cyc = f" +- {s['area_error_cycles']:.2g} (cycles)" if math.isfinite(s["area_error_cycles"]) else ""
    print(f"loop area = dissipated work per site, oint <dS/dtheta>/V dtheta: {s['area']:.4g}{cyc}{stat}")
    print(f"  (oint Im omega_h dtheta = {s['area_im_omega_h']:.4g}; equals the work / h for degenerate "
          f"masses h)")
    if plot:
        png = hysteresis.plot_sweep(result, path.with_suffix(".png"))
        print(f"wrote {png}")
    return 0


def cmd_hysteresis(args) -> int:
    return hysteresis_command(args.config, plot=args.plot, out=args.out, overwrite=args.overwrite,
                              quiet=args.quiet, command=args.command)


def temper_command(config_path: str, out: str | None = None, quiet: bool = False) -> int:
    """``sigmasim temper CONFIG [--out FOLDER] [--quiet]``: replica exchange over the [tempering] ladder.

    Writes ``<out or run.output>/<name>/<name>-t<i>/<name>-t<i>.h5`` (ordinary run files, one per
    slot) and prints swap acceptances, round trips, the replicas' branch census (how often it
    changed, where replicas tunnelled) and the branch populations of every slot.
    """
    import dataclasses

    import numpy as np

    from sigmasim.progress import Steps
    from sigmasim.protocols import tempering
    from sigmasim.vacua import branch_range

    config, params = tempering.load_tempering(config_path)
    if out:
        config = dataclasses.replace(config, output=str(out))
    with Steps("temper", quiet, "sweep") as progress:
        res = tempering.execute(config, params, progress=progress)
    for f in res.files:
        print(f"wrote {f}")
    scales = res.mass_scales
    print("pair  theta_i  theta_j  scale_i  scale_j  acceptance")
    for i, a in enumerate(res.acceptance):
        print(f"{i:4d}  {res.thetas[i]:7.4f}  {res.thetas[i + 1]:7.4f}  {scales[i]:7.4f}  "
              f"{scales[i + 1]:7.4f}  {a:.3f}")
    rt = res.round_trips
    print(f"round trips: {len(rt)}" + (f", mean {np.mean(rt):.1f} sweeps" if rt else ""))
    census = tempering.branch_census(res, config.nf, params.band)
    print(f"branch census of the replicas changed {census.changes} times; in-slot branch changes per slot: "
          + " ".join(str(int(c)) for c in census.slot_changes))
    for i, (t, (occ, err)) in enumerate(zip(res.thetas, tempering.branch_populations(res, config.nf,
                                                                                     params.band))):
        # branch numbers of sigmasim.vacua (the populations count k modulo nf from 0)
        print(f"slot {i:2d} theta {t:7.4f} scale {scales[i]:.4f}  branch occupation "
              + "  ".join(f"k={kk}: {occ[kk % config.nf]:.3f}+-{err[kk % config.nf]:.3f}"
                          for kk in branch_range(config.nf)))
    if config.nf > 1 and census.changes < tempering.CENSUS_MIN_CHANGES:
        print(f"warning: the branch census changed only {census.changes} times (< {tempering.CENSUS_MIN_CHANGES}): "
              "the populations are fixed by the starting branches and their errors are not trustworthy; "
              "a ladder in theta alone cannot fix this at a first-order point (add mass_scales down to 0)")
    return 0


def cmd_temper(args) -> int:
    return temper_command(args.config, out=args.out, quiet=args.quiet)


def format_lifetimes(res) -> str:
    """The ``lifetimes`` table of a :class:`sigmasim.protocols.LifetimeResult`: per size the dead time, tau
    with its bootstrap error and exact interval, the mean escape time, std/mean, KS p-values; then
    both fits of ln tau."""
    lines = ["   L      V  starts  escaped  dead time(err)      tau(err)   68% interval       "
             "mean escape(err)  std/mean  KS p shifted/exp"]
    for i, L in enumerate(res.sizes):
        f = res.escape.get(L, {})
        iv = f.get("tau_interval", [float("nan")] * 2)
        lines.append(f"{L:4d} {L ** res.d:6d} {len(res.times[L]):7d} {res.n_escaped[i]:8d} "
                     f"{f.get('dead_time', float('nan')):8.4g}({f.get('dead_time_error', float('nan')):.2g}) "
                     f"{res.tau[i]:8.4g}({res.tau_error[i]:.2g}) [{iv[0]:.3g}, {iv[1]:.3g}]  "
                     f"{f.get('mean_escape', float('nan')):9.4g}({f.get('mean_escape_error', float('nan')):.2g})"
                     f"  {f.get('cv', float('nan')):8.2f}  {f.get('ks_shifted', float('nan')):.2f}/"
                     f"{f.get('ks_exponential', float('nan')):.2f}")
    lines.append("tau: mean escape time after the dead time (shifted exponential); errors: bootstrap over "
                 "starts; fits use ln tau with its bootstrap error")
    for name, f in res.fits.items():
        if f["dof"] > 0:
            quality = f"chi2/dof = {f['chi2']:.3g}/{f['dof']}"
        else:  # two sizes: the line goes through both points, chi2 is rounding noise
            quality = "no chi2 test (0 dof: the line passes through the points; use >= 3 sizes)"
        lines.append(f"ln tau = a + b L^{f['power']} ({name}): b = {f['slope']:.4g} +- {f['slope_error']:.2g}, "
                     f"a = {f['intercept']:.4g} +- {f['intercept_error']:.2g}, {quality}")
    return "\n".join(lines)


def lifetimes_command(config_path: str, out: str | None = None, workers: int = 0, quiet: bool = False) -> int:
    """``sigmasim lifetimes CONFIG [--out FILE.json] [--workers N] [--quiet]``: escape times per volume and fits.

    Prints :func:`format_lifetimes` and writes it as JSON to ``--out`` (default
    ``<run.output>/<name>/<name>-lifetimes.json``; an existing file there is replaced only if this
    command wrote it) with the escape-time distributions against the fitted laws as a PNG beside it
    (needs matplotlib).
    """
    from sigmasim.progress import Steps
    from sigmasim.protocols import lifetimes

    config, params = lifetimes.load_lifetimes(config_path)
    if workers:
        params["workers"] = int(workers)
    out = lifetimes.check_output(out if out is not None else lifetimes.default_path(config))
    with Steps("lifetimes", quiet, "start") as progress:
        res = lifetimes.run_lifetimes(config, params, progress=progress)
    print(format_lifetimes(res))
    lifetimes.write_lifetimes(out, res, config, params)
    print(f"wrote {out}")
    try:
        png = lifetimes.plot_escape_times(res, out.with_suffix(".png"))
        print(f"wrote {png} (escape-time distributions against the fitted laws)")
    except ImportError:
        print("matplotlib is not installed: no escape-time figure (install the plot extra)")
    return 0


def cmd_lifetimes(args) -> int:
    return lifetimes_command(args.config, out=args.out, workers=args.workers, quiet=args.quiet)


def cmd_multicanonical(args) -> int:

    return multicanonical_command(args.config, out=args.out, quiet=args.quiet, overwrite=args.overwrite,
                                  plot=args.plot)


def cmd_umbrella(args) -> int:

    return umbrella_command(args.config, serial=args.serial, quiet=args.quiet)


def cmd_export(args) -> int:

    return export_command(args.run, args.format, args.out, reference=args.reference, overwrite=args.overwrite)


def cmd_synth(args) -> int:

    params = {k: getattr(args, k) for k in ("replicas", "length", "rho", "amplitude", "shape", "m2",
                                              "configs", "method", "p01", "p10", "noise")}
    return synth_command(args.kind, args.out, args.seed, **{k: v for k, v in params.items() if v is not None})


def cmd_score(args) -> int:

    return score_command(args.truth, args.estimates)


def _fmt_complex(z) -> str:
    return f"{z.real:+.5f}{z.imag:+.5f}i"


def format_vacua(obj, step: int | None = None, theta: float | None = None) -> str:
    """Plain-text table of tree-level vacua or of a branch scan (the ``vacua`` command's output).

    Parameters
    ----------
    obj : list of sigmasim.vacua.Vacuum or sigmasim.vacua.BranchScan
        What to tabulate.
    step : int, optional
        For a scan: print every ``step``-th grid point (default: about 17 rows).
    theta : float, optional
        For a list of vacua: the physical angle they belong to, to print their
        branch numbers (:func:`sigmasim.vacua.branch_label`); ``?`` without it.

    Returns
    -------
    str
    """
    import numpy as np

    from sigmasim.vacua import BranchScan, branch_label, branch_range

    lines = []
    if isinstance(obj, BranchScan):
        r = obj
        lines.append(f"# {r.potential.describe()}, placement x={r.placement:g}; "
                     "tree level, research toy")
        nt = len(r.thetas)
        step = step or max(1, (nt - 1) // 16)
        lines.append("# k = branch number: arg e^{i theta_m} Omega nearest (theta + 2 pi k)/Nf, "
                     f"k in {branch_range(r.potential.nf).start}..{branch_range(r.potential.nf).stop - 1}")
        lines.append("# followed minima (columns E_#): " + "; ".join(
            f"#{b}: k = {r.row_labels(b)}" for b in range(r.n_branches)))
        glab = r.global_label
        head = f"{'theta':>9} {'theta/pi':>9} {'k_glob':>6} {'E_glob':>13} {'n_meta':>6}"
        head += "".join(f" {'E_#' + str(k):>12}" for k in range(r.n_branches))
        lines.append(head)
        for i in range(0, nt, step):
            row = (f"{r.thetas[i]:9.5f} {r.thetas[i] / np.pi:9.4f} {glab[i]:6d} "
                   f"{r.global_energy[i]:13.8f} {r.n_metastable[i]:6d}")
            row += "".join(f" {r.energies[k, i]:12.6f}" if np.isfinite(r.energies[k, i])
                           else f" {'-':>12}" for k in range(r.n_branches))
            lines.append(row)
        lab = r.labels
        nfl = r.potential.nf

        def k_at(b, t):
            # branch number of row b at theta t (from the nearest grid point where it exists)
            ok = np.flatnonzero(lab[b] != -999)
            if not ok.size:
                return "-"
            j = ok[np.argmin(np.abs(r.thetas[ok] - t))]
            ph = r.omega_rot[b, j]
            return str(branch_label(ph, t, nfl)) if abs(r.thetas[j] - t) > 0 else str(lab[b, j])

        lines.append("# first-order points (theta, theta/pi, k from -> to, E, method, rows #)")
        for p in r.first_order:
            lines.append(f"  {p.theta:.10f} {p.theta / np.pi:.8f} k {k_at(p.branch_from, p.theta)} -> "
                         f"{k_at(p.branch_to, p.theta)} {p.energy:.8f} {p.method} "
                         f"#{p.branch_from} -> #{p.branch_to}")
        lines.append("# spinodal points (theta, theta/pi, k, kind, E, row #)")
        for s in r.spinodals:
            lines.append(f"  {s.theta:.10f} {s.theta / np.pi:.8f} k {k_at(s.branch, s.theta)} {s.kind} "
                         f"{s.energy:.8f} #{s.branch}")
        lines.append("# CP pairs at CP-invariant theta (theta/pi, k_a, k_b; the same: self-conjugate)")
        for c in r.cp_pairs:
            lines.append(f"  {c.theta / np.pi:.4f} {k_at(c.branch_a, c.theta)} {k_at(c.branch_b, c.theta)}")
        return "\n".join(lines)
    vac = list(obj)
    lines.append(f"{'k':>3} {'energy':>14} {'Omega':>20} {'det U':>20} {'lam_min':>11} "
                 f"{'flat':>4} {'status':>10}  phases/pi")
    for v in vac:
        lam = v.hessian_full[0] if v.hessian_full.size else float("nan")
        ph = " ".join(f"{p / np.pi:+.4f}" for p in v.phases)
        k = "?" if theta is None else str(branch_label(v.omega_rot, theta, len(v.phases)))
        lines.append(f"{k:>3} {v.energy:14.8f} {_fmt_complex(v.omega):>20} {_fmt_complex(v.det):>20} "
                     f"{lam:11.3e} {v.n_flat:4d} {'global' if v.is_global else 'metastable':>10}  {ph}")
    if theta is not None:
        lines.append("(k = branch number: arg e^{i theta_m} Omega nearest (theta + 2 pi k)/Nf)")
    return "\n".join(lines)


def cmd_vacua(args) -> int:
    import numpy as np

    from sigmasim import vacua
    from sigmasim.config import config_from_dict, load_config
    from sigmasim.errors import ConfigError

    if args.config is not None:
        from sigmasim.config import read_toml

        raw = read_toml(args.config)
        if any(t in raw for t in PROTOCOL_TABLES):  # a sweep/temper/lifetimes/scan file: its run config
            if "scan" in raw:
                from sigmasim.scan import load_scan

                raw = load_scan(args.config).base
            cfg = config_from_dict({k: v for k, v in raw.items() if k not in PROTOCOL_TABLES})
        else:
            cfg = load_config(args.config)
    else:
        model = {k: v for k, v in (("nf", args.nf), ("group", args.group), ("mass", args.mass),
                                     ("kappa", args.kappa), ("theta", args.theta),
                                     ("theta_placement", args.placement)) if v is not None}
        if isinstance(model.get("mass"), list) and len(model["mass"]) == 1:
            model["mass"] = model["mass"][0]
        cfg = config_from_dict({"lattice": {"shape": [2]}, "model": model})
    from sigmasim.progress import task_bar

    theta_m, theta_a = cfg.theta_angles
    kw = dict(nf=cfg.nf, group=cfg.group)
    live = task_bar(2, "vacua: local minima, then branches over theta", args.quiet, unit="part")
    live.refresh()  # a live line while the minimisations run (terminal only)
    try:
        pot = vacua.make_potential(list(cfg.mass), cfg.kappa, theta_m=theta_m, theta_a=theta_a, **kw)
        minima = vacua.find_local_minima(pot)
        live.update(1)
        scan = vacua.scan_theta(list(cfg.mass), cfg.kappa, thetas=np.linspace(0, 4 * np.pi, args.points),
                                placement=cfg.theta_placement if cfg.group == "U" else "mass", **kw)
    except ValueError as exc:
        raise ConfigError(f"cannot analyse this potential: {exc}") from None
    finally:
        live.close()
    print(f"tree-level local minima at theta = {cfg.theta:.6g} (energies per site):")
    print(format_vacua(minima, theta=pot.theta))
    print()
    print("branches over theta in [0, 4 pi]:")
    print(format_vacua(scan, step=max(1, args.points // 24)))
    print("(tree level: classical potential only; research toy, not a physical prediction)")
    if args.plot:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        fig, ax = plt.subplots(figsize=(8, 5))
        vacua.plot_branches(scan, ax=ax)
        out = Path(args.out)
        out.parent.mkdir(parents=True, exist_ok=True)
        fig.tight_layout()
        fig.savefig(out.with_suffix(".png"), dpi=150)
        fig.savefig(out.with_suffix(".pdf"))
        plt.close(fig)
        print(f"figure: {out.with_suffix('.png')} and .pdf")
    return 0


def cmd_validate(args) -> int:
    from sigmasim import validation
    from sigmasim.progress import Steps

    _set_threads(0, 0)  # every check is a small lattice: one thread (sigmasim.threads)
    with Steps("validate", args.quiet, "group") as progress:
        checks = validation.quick_checks(progress)
    if args.thorough:
        with Steps("validate --thorough", args.quiet, "group") as progress:
            checks += validation.thorough_checks(progress)
    print(validation.format_table(checks))
    print("(each check: |MC - exact| <= 4 sigma, sigma from Wolff's Gamma method)")
    return 0 if all(c.passed for c in checks) else 1


def cmd_config_reference(args) -> int:
    from sigmasim.reference import reference_text

    print(reference_text())
    return 0


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="sigmasim", description="Monte Carlo for chiral sigma models at arbitrary theta")
    sub = p.add_subparsers(dest="command", required=True, parser_class=_Parser)
    r = sub.add_parser("run", help="run or resume a config")
    r.add_argument("config", help="TOML config file")
    r.add_argument("--resume", action="store_true", help="continue the run from its last checkpoint")
    r.add_argument("--overwrite", action="store_true",
                   help="start again over an existing file written by the same config")
    r.add_argument("--threads", type=int, default=None, help="numba threads (default: config)")
    r.add_argument("--output", default=None, help="output folder (default: config run.output)")
    r.add_argument("--quiet", action="store_true", help="no progress bar")
    r.add_argument("--smoke", action="store_true",
                   help="10 + 20 sweeps under the name <config>-smoke, to check a config in seconds")
    r.set_defaults(func=cmd_run)
    sn = sub.add_parser("scan", help="a grid of runs on Dask from a scan file (or one key of a config, in turn)",
                        description="SCAN.toml with a [scan] table: every point an ordinary run, executed on "
                                    "Dask (embedded local cluster, or --scheduler), resumable, with an index. "
                                    "A plain run config with --param/--values: one run per value, one after "
                                    "another in this process.")
    sn.add_argument("config", help="scan file (TOML with [scan]) or run config (with --param/--values)")
    sn.add_argument("--scheduler", default=None, help="scan file: address of a running Dask scheduler")
    sn.add_argument("--workers", type=int, default=None, help="scan file: embedded cluster's workers")
    sn.add_argument("--collect", action="store_true", help="scan file: only (re)write the index, run nothing")
    sn.add_argument("--plot", default=None, metavar="OBSERVABLE",
                    help="scan file: draw an index column (e.g. im_omega_h) against --x")
    sn.add_argument("--x", default=None, help="scan file: the axis for --plot (default: the first axis)")
    sn.add_argument("--param", default=None, help="run config: the key to vary, e.g. model.theta")
    sn.add_argument("--values", default=None, help="run config: comma-separated values, e.g. 2.8,3.0,3.14")
    sn.add_argument("--resume", action="store_true", help="run config: continue the runs that exist")
    sn.add_argument("--overwrite", action="store_true",
                    help="run config: start again over existing files written by the same configs")
    sn.add_argument("--threads", type=int, default=None, help="numba threads per run")
    sn.add_argument("--output", default=None, help="run config: output folder")
    sn.add_argument("--quiet", action="store_true")
    sn.protocol_table = "scan"
    sn.set_defaults(func=cmd_scan)
    d = sub.add_parser("demo", help="run the built-in demo (about a minute)")
    d.add_argument("--output", default="runs", help="output folder (default: runs)")
    d.add_argument("--quiet", action="store_true")
    d.set_defaults(func=cmd_demo)
    i = sub.add_parser("info", help="describe a file sigmasim wrote: run (status, config, provenance), "
                                    "sweep, scan index, lifetimes/analysis/export JSON or CSV")
    i.add_argument("file")
    i.set_defaults(func=cmd_info)
    a = sub.add_parser("analyze", help="errors, autocorrelations, masses (and figures) of run files")
    a.add_argument("files", nargs="+", help="run files (.h5)")
    a.add_argument("--plot", action="store_true", help="also write figures (PNG and PDF)")
    a.add_argument("--out", default=None, help="folder for figures (default: next to each run)")
    a.add_argument("--band", type=float, default=0.5,
                   help="hysteresis band of the vacuum index, in [0, 1) (default 0.5)")
    a.add_argument("--quiet", action="store_true")
    a.set_defaults(func=cmd_analyze)
    sw = sub.add_parser("hysteresis", aliases=["sweep"],
                        help="move theta up and down one chain without re-thermalising (old name: sweep)")
    sw.add_argument("config", help="run TOML with a [hysteresis] table (old name: [sweep])")
    sw.add_argument("--plot", action="store_true", help="draw the loop(s) with the tree-level branches")
    sw.add_argument("--out", default=None, help="sweep file (default <output>/<name>/<name>-sweep.h5)")
    sw.add_argument("--overwrite", action="store_true",
                    help="replace an existing sweep file (an unfinished sweep resumes by itself)")
    sw.add_argument("--quiet", action="store_true", help="no progress bar")
    sw.protocol_table = "hysteresis"
    sw.set_defaults(func=cmd_hysteresis)
    te = sub.add_parser("temper", help="replica exchange over a ladder of theta values")
    te.add_argument("config", help="run TOML with a [tempering] table")
    te.add_argument("--out", default=None, help="output folder (default: run.output)")
    te.add_argument("--quiet", action="store_true", help="no progress bar")
    te.protocol_table = "tempering"
    te.set_defaults(func=cmd_temper)
    lt = sub.add_parser("lifetimes", help="escape times from a metastable branch against the volume")
    lt.add_argument("config", help="run TOML with a [lifetimes] table and run.start = 'branch'")
    lt.add_argument("--out", default=None,
                    help="JSON file for the table and fits, with FILE.png: the escape-time distributions "
                         "(default <output>/<name>/<name>-lifetimes.json)")
    lt.add_argument("--workers", type=int, default=0, help="parallel starts (0: the idle cores)")
    lt.add_argument("--quiet", action="store_true", help="no progress bar")
    lt.protocol_table = "lifetimes"
    lt.set_defaults(func=cmd_lifetimes)
    mu = sub.add_parser("multicanonical", help="multicanonical sampling across the barrier in Im omega_h "
                                               "(weight building, production, -ln P(x), round trips)")
    mu.add_argument("config", help="run TOML with a [multicanonical] table")
    mu.add_argument("--out", default=None, help="HDF5 output (default <output>/<name>/<name>-multicanonical.h5); "
                                                "a rerun continues its checkpoint FILE.checkpoint")
    mu.add_argument("--overwrite", action="store_true", help="start again, replacing this command's file of another "
                                                            "config or an earlier finished run")
    mu.add_argument("--plot", action="store_true", help="also draw -ln P(x) with its error band (FILE.png)")
    mu.add_argument("--quiet", action="store_true", help="no stage lines")
    mu.protocol_table = "multicanonical"
    mu.set_defaults(func=cmd_multicanonical)
    um = sub.add_parser("umbrella", help="umbrella windows along Im omega_h on Dask, joined by WHAM into -ln P(x)")
    um.add_argument("config", help="run TOML with an [umbrella] table")
    um.add_argument("--serial", action="store_true", help="run the windows in this process instead of on Dask")
    um.add_argument("--quiet", action="store_true", help="no per-window lines")
    um.set_defaults(func=cmd_umbrella)
    ex = sub.add_parser("export", help="a run's arrays as npz/csv/hdf5 plus a JSON sidecar with known answers")
    ex.add_argument("run", help="run file (.h5)")
    ex.add_argument("--format", choices=["npz", "csv", "hdf5"], default="npz")
    ex.add_argument("--out", default=None, help="output prefix (default: RUN without .h5 + '_export')")
    ex.add_argument("--reference", action="store_true",
                    help="add the run's own Gamma-method means as 'high-statistics estimate' truths")
    ex.add_argument("--overwrite", action="store_true", help="replace existing output files")
    ex.set_defaults(func=cmd_export)
    sy = sub.add_parser("synth", help="synthetic data with exactly known answers (npz + JSON sidecar)")
    sy.add_argument("kind", choices=["ar1", "free-field", "telegraph"])
    sy.add_argument("--out", required=True, help="output prefix")
    sy.add_argument("--seed", type=int, required=True)
    sy.add_argument("--replicas", type=int, help="ar1, telegraph: independent series")
    sy.add_argument("--length", type=int, help="ar1, telegraph: samples per series")
    sy.add_argument("--rho", help="ar1: coefficient(s), comma separated")
    sy.add_argument("--amplitude", help="ar1: weight(s) of a sum of processes, comma separated")
    sy.add_argument("--shape", help="free-field: lattice T,L,...")
    sy.add_argument("--m2", type=float, help="free-field: mass squared")
    sy.add_argument("--configs", type=int, help="free-field: configurations")
    sy.add_argument("--method", choices=["slice", "field"], help="free-field: sampling method")
    sy.add_argument("--p01", type=float, help="telegraph: switching probability 0 -> 1 per step")
    sy.add_argument("--p10", type=float, help="telegraph: switching probability 1 -> 0 per step")
    sy.add_argument("--noise", type=float, help="telegraph: Gaussian noise on the two levels")
    sy.set_defaults(func=cmd_synth)
    sc = sub.add_parser("score", help="pulls of your estimates against a sidecar's truth "
                                      "(exit 1 when a verdict is not ok)")
    sc.add_argument("truth", help="sidecar JSON with a truth section")
    sc.add_argument("estimates", help="your estimates: JSON of name, value, error (see sigmasim.score)")
    sc.set_defaults(func=cmd_score)
    v = sub.add_parser("vacua", help="tree-level vacuum branches of a config's potential")
    v.add_argument("config", nargs="?", default=None, help="TOML config (its [model] is used)")
    v.add_argument("--nf", type=int)
    v.add_argument("--group", choices=["U", "SU"])
    v.add_argument("--mass", type=float, nargs="+", help="one mass or nf masses")
    v.add_argument("--kappa", type=float)
    v.add_argument("--theta", type=float)
    v.add_argument("--placement", choices=["mass", "anomaly", "split"])
    v.add_argument("--points", type=int, default=241, help="theta grid points over [0, 4 pi]")
    v.add_argument("--plot", action="store_true", help="draw E_k(theta) for every branch")
    v.add_argument("--out", default="vacua", help="figure path without suffix (default: vacua)")
    v.add_argument("--quiet", action="store_true", help="no progress line")
    v.set_defaults(func=cmd_vacua)
    val = sub.add_parser("validate", help="compare the installed engine with exact results")
    val.add_argument("--thorough", action="store_true", help="also the longer checks (O(4) ratio)")
    val.add_argument("--quiet", action="store_true", help="no progress bar")
    val.set_defaults(func=cmd_validate)
    c = sub.add_parser("config-reference",
                       help="print every config key with its default, and the keys of the protocol tables")
    c.set_defaults(func=cmd_config_reference)
    return p


def _terminate_as_interrupt() -> None:
    """SIGTERM before a run installs its own handler stops the command like Ctrl-C (exit 130);
    :func:`sigmasim.interrupt.handler` keeps it out of the middle of an import."""
    from sigmasim import interrupt

    if signal.getsignal(signal.SIGTERM) in (signal.SIG_DFL, None):
        interrupt.install((signal.SIGTERM,))  # main thread only (install checks)


def main(argv=None) -> int:
    _terminate_as_interrupt()
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
    except KeyboardInterrupt:
        sys.stderr.write("sigmasim: interrupted\n")
        return 130
    try:
        return int(args.func(args) or 0)
    except SigmasimError as exc:
        sys.stderr.write(f"sigmasim: error: {exc}\n")
        return 2
    except BrokenPipeError:  # output piped into head and closed early
        sys.stderr.close()
        return 0
    except OSError as exc:  # a file system refusal this code did not foresee: still one line
        from sigmasim.errors import shown

        name = f" {shown(exc.filename)}" if getattr(exc, "filename", None) is not None else ""
        sys.stderr.write(f"sigmasim: error: {exc.strerror or type(exc).__name__}{name}\n")
        return 2
    except KeyboardInterrupt:
        sys.stderr.write("sigmasim: interrupted\n")
        return 130
