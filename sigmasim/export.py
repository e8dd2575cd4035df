r"""Export a run file as plain arrays with a JSON sidecar that carries the known answers.

``sigmasim export RUN.h5 --format npz|csv|hdf5 [--out PREFIX] [--reference]``

Output
------
With ``PREFIX`` (default: the run file's path without ``.h5`` plus ``_export``):

* ``npz``:  ``PREFIX.npz``, one array per observable (complex kept complex);
* ``hdf5``: ``PREFIX.h5``, a flat HDF5 file with one dataset per observable at the root
  (complex kept complex, attrs ``description``);
* ``csv``:  ``PREFIX_<name>.csv`` per observable, a header line with the column names
  and one row per configuration; complex values are split into ``_re`` / ``_im``
  columns and trailing axes are flattened into the column name
  (``condensate_1_re`` is ``Re condensate[:, 1]``, ``slice_U_3_0_1_im`` is
  ``Im slice_U[:, 3, 0, 1]``);

and always the sidecar ``PREFIX.json``.  Every array has the configurations along
its first axis.  Array names: the run's series under their own names
(``sweep``, ``action``, ``omega``, ``condensate``, ...) and the per-time-slice sums
as ``slice_U`` (``(n, T, nf, nf)``) and ``slice_det`` (``(n, T)``).

Sidecar (format ``sigmasim-sidecar``, version 1; the same layout is written by
:mod:`sigmasim.synth`)::

    {"format": "sigmasim-sidecar", "format_version": 1,
     "kind": "run export" | "ar1" | "free-field" | "telegraph",
     "data_format": "npz" | "csv" | "hdf5",
     "files": [...],                       # data files, relative to the sidecar
     "arrays": [{"name", "shape", "dtype", "description", "convention", "units",
                 "file", "columns" (CSV only)}, ...],
     "conventions": "...", "units": "...",
     "config": {...}, "seed": int, "provenance": {...},
     "truth": {NAME: {"value": float | list, "error": float | null,
                      "how": "exact" | "tree level" | "high-statistics estimate",
                      "source": str, "description": str}, ...},
     "notes": [...]}

Truth names are scalar column names (``omega_re``, ``condensate_0_im``, ``mass_pion``);
list-valued entries (a correlator ``C(t)``) are addressed as ``NAME[t]`` by
:mod:`sigmasim.score`.  ``error`` is ``null`` for exact and tree-level values.

Which truths a run gets
-----------------------
* ``beta = 0``: every site is an independent one-site integral, so every
  site-averaged observable has its exact expectation from
  :func:`sigmasim.exact.one_site_u` (U(nf)) or :func:`sigmasim.exact.one_site_su`
  (SU(nf), degenerate masses).  Per-flavour condensates and ``action_mass`` need
  degenerate masses (the one-site functions give the trace only);
  ``action_beta`` is exactly 0.
* ``d = 1``, U(1): the periodic chain is solved by the transfer matrix of
  :func:`sigmasim.exact.u1_chain` (one-point functions, link energy, and the
  connected correlator of ``slice_U[:, :, 0, 0]``).
* ``beta >= TREE_LEVEL_MIN_BETA``, degenerate ``h > 0``, theta = 0: tree-level
  masses (expanding ``U = exp(i phi)``, ``phi = sum_a phi_a T_a``,
  ``Tr T_a T_b = delta_ab / 2``, ``T_0 = 1/sqrt(2 nf)``, the quadratic action is
  ``beta/4 sum_a [sum_mu (Delta_mu phi_a)^2 + m_a^2 phi_a^2]`` with
  ``m_pi^2 = h/beta`` and ``m_eta'^2 = (h + 2 kappa nf)/beta``, because
  ``-Re Tr(h U) = -nf h + (h/4) sum_a phi_a^2 + ...`` and
  ``-2 kappa Re det U = -2 kappa + kappa (Tr phi)^2 + ... = ... + (kappa nf / 2) phi_0^2``);
  the lattice energy of a free scalar of bare mass^2 ``m2`` is
  ``2 asinh(sqrt(m2)/2)`` (:func:`sigmasim.exact.free_scalar_mass`).
* ``beta >= TREE_LEVEL_MIN_BETA``, any masses and theta: the tree-level vacuum
  branches (local minima of the potential per site,
  :func:`sigmasim.vacua.find_local_minima`), their energy per site (to compare
  with ``<action_mass + action_det>`` of a run that stays in the branch) and their
  ``omega_h``.
* ``--reference``: for every physics series without a better truth, the run's
  own mean with its Gamma-method error, labelled ``"high-statistics estimate"``.
  It is only as good as the run: use a long run of the same config.
"""

from __future__ import annotations

import io
import json
from pathlib import Path

import numpy as np

from sigmasim.errors import ConfigError, RunFileError
from sigmasim import files
from sigmasim.files import json_text, provenance

__all__ = [
    "SIDECAR_FORMAT",
    "SIDECAR_VERSION",
    "FORMATS",
    "TREE_LEVEL_MIN_BETA",
    "export_run",
    "run_arrays",
    "run_truth",
    "reference_truth",
    "truth_entry",
    "array_entry",
    "write_arrays",
    "read_sidecar",
    "provenance",
    "column_names",
]

SIDECAR_FORMAT = "sigmasim-sidecar"
SIDECAR_VERSION = 1
FORMATS = ("npz", "csv", "hdf5")

#: Smallest beta for which tree-level predictions are put into the sidecar.  The
#: expansion is in 1/beta; below beta ~ 1 it is not even qualitatively right
#: (common practice, no source).
TREE_LEVEL_MIN_BETA = 1.0

SRC_ONE_SITE_U = ("sigmasim.exact.one_site_u: Bessel-determinant sums (Brower, Rossi & Tan, "
                  "Phys. Rev. D 23 (1981) 942; Leutwyler & Smilga, Phys. Rev. D 46 (1992) 5607)")
SRC_ONE_SITE_SU = ("sigmasim.exact.one_site_su: sector sum of Bessel determinants (Brower, "
                   "Rossi & Tan, Phys. Rev. D 23 (1981) 942; Leutwyler & Smilga, "
                   "Phys. Rev. D 46 (1992) 5607)")
SRC_U1_CHAIN = "sigmasim.exact.u1_chain: charge-basis transfer matrix (common practice, no source)"
SRC_TREE = ("expansion U = exp(i phi), Tr T_a T_b = delta_ab/2, derived in sigmasim.export "
            "(common practice, no source)")
SRC_VACUA = "sigmasim.vacua.find_local_minima: minima of the tree-level potential (derived there)"
SRC_GAMMA = ("this run's own mean, Gamma-method error (U. Wolff, Comput. Phys. Commun. 156 (2004) "
             "143)")
SRC_TRIVIAL = "identity (common practice, no source)"

AXIS_NOTE = "axis 0 of every array is the measurement (configuration) index"


def run_conventions(config) -> str:
    """The sidecar's ``conventions`` of a run export: the model's action and sign conventions
    (:mod:`sigmasim.models`) and the array axes."""
    from sigmasim import models

    return f"{models.get(config.kind).CONVENTIONS}; {AXIS_NOTE}"


RUN_UNITS = "lattice units (lattice spacing a = 1); actions are per site; slice sums are plain sums"


# --------------------------------------------------------------------------
# sidecar pieces
# --------------------------------------------------------------------------


def truth_entry(value, how: str, source: str, description: str, error=None) -> dict:
    """One entry of a sidecar ``truth`` section.

    ``how`` is ``"exact"``, ``"tree level"`` or ``"high-statistics estimate"``;
    ``value`` a float or a list of floats; ``error`` None unless the value is an estimate.
    """
    if how not in ("exact", "tree level", "high-statistics estimate"):
        raise ValueError(f"unknown kind of truth {how!r}")
    v = np.asarray(value, dtype=float)
    return {
        "value": float(v) if v.ndim == 0 else [float(a) for a in v.ravel()],
        "error": None if error is None else float(error),
        "how": how,
        "source": source,
        "description": description,
    }


def array_entry(name: str, arr: np.ndarray, description: str, convention: str = "",
                units: str = "lattice units") -> dict:
    """Description of one exported array (shape and dtype taken from ``arr``)."""
    return {"name": name, "shape": list(arr.shape), "dtype": str(arr.dtype),
            "description": description, "convention": convention, "units": units}


def column_names(name: str, arr: np.ndarray) -> list[str]:
    """CSV column names of ``arr`` (first axis = rows): trailing indices, then ``_re``/``_im``."""
    idx = list(np.ndindex(*arr.shape[1:]))
    cols = []
    for i in idx:
        base = name + "".join(f"_{k}" for k in i)
        cols += [base + "_re", base + "_im"] if np.iscomplexobj(arr) else [base]
    return cols


def _csv_matrix(arr: np.ndarray) -> np.ndarray:
    flat = arr.reshape(arr.shape[0], -1)
    if np.iscomplexobj(flat):
        out = np.empty((flat.shape[0], 2 * flat.shape[1]))
        out[:, 0::2] = flat.real
        out[:, 1::2] = flat.imag
        return out
    return flat


def _prefix(out) -> Path:
    p = Path(out)
    if p.suffix.lower() in (".npz", ".h5", ".hdf5", ".csv", ".json"):
        p = p.with_suffix("")
    return p


def write_arrays(prefix, arrays: dict, entries: list[dict], fmt: str, sidecar: dict,
                 protect: tuple = (), overwrite: bool = True) -> list[Path]:
    """Write ``arrays`` (name -> ndarray) in ``fmt`` and the sidecar ``PREFIX.json``.

    ``entries`` are the :func:`array_entry` dicts (in the order of ``arrays``);
    ``sidecar`` the remaining sidecar keys.  Paths in ``protect`` are never
    written; with ``overwrite`` false no existing file is.  Returns the written paths (sidecar last).
    """
    if fmt not in FORMATS:
        raise ConfigError(f"unknown export format {fmt!r}; choose one of {', '.join(FORMATS)}")
    prefix = _prefix(prefix)
    folder = prefix.parent
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise RunFileError(f"cannot create the output folder {folder}: {exc.strerror}") from None
    targets = {"npz": [prefix.with_name(prefix.name + ".npz")],
               "hdf5": [prefix.with_name(prefix.name + ".h5")],
               "csv": [prefix.with_name(f"{prefix.name}_{k}.csv") for k in arrays]}[fmt]
    side = prefix.with_name(prefix.name + ".json")
    protected = {Path(p).resolve() for p in protect}
    for t in targets + [side]:
        if t.resolve() in protected:
            raise RunFileError(f"refusing to overwrite {t}: choose another --out")
    if not overwrite:
        for t in targets + [side]:
            if t.exists() or t.is_symlink():
                raise RunFileError(f"refusing to overwrite {t}: it exists (use --overwrite to replace it)")
    entries = [dict(e) for e in entries]
    from sigmasim.storage import hdf5_bytes

    # every file is rendered in memory first, so the free space is checked for the whole export
    # before the first one is written
    if fmt == "npz":
        buf = io.BytesIO()
        np.savez(buf, **arrays)
        blobs = [buf.getvalue()]
        for e in entries:
            e["file"] = targets[0].name
    elif fmt == "hdf5":
        def save_h5(f):
            f.attrs["format"] = "sigmasim-export"
            f.attrs["sidecar"] = side.name
            for e, (k, a) in zip(entries, arrays.items()):
                d = f.create_dataset(k, data=a)
                d.attrs["description"] = e["description"]
                d.attrs["convention"] = e["convention"]
                e["file"] = targets[0].name

        blobs = [hdf5_bytes(save_h5)]
    else:
        blobs = []
        for e, t, (k, a) in zip(entries, targets, arrays.items()):
            cols = column_names(k, a)
            mat = _csv_matrix(a)
            fmt_ = "%d" if np.issubdtype(mat.dtype, np.integer) else "%.17g"
            buf = io.StringIO()
            np.savetxt(buf, mat, delimiter=",", header=",".join(cols), comments="", fmt=fmt_)
            blobs.append(buf.getvalue().encode("latin1"))  # what np.savetxt writes to a file name
            e["file"] = t.name
            e["columns"] = cols
    doc = {"format": SIDECAR_FORMAT, "format_version": SIDECAR_VERSION, **sidecar,
           "data_format": fmt, "files": [t.name for t in targets], "arrays": entries}
    text = json_text(doc)
    outputs = list(zip(targets, blobs)) + [(side, text.encode())]
    files.check_space(targets[0], sum(len(d) + 4096 for _, d in outputs), what="export")
    written = []
    try:
        for t, data in outputs:
            files.atomic_output(t, lambda tmp, data=data: tmp.write_bytes(data),
                                what="export sidecar" if t == side else "export")
            written.append(t)
    except BaseException:
        for t in written:  # only the files this call wrote, so a failed export leaves nothing
            try:
                t.unlink()
            except OSError:
                pass
        raise
    return targets + [side]


def read_sidecar(path) -> dict:
    """Load a sidecar (or any JSON with a ``truth`` section); ConfigError on bad input."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise ConfigError(f"{p} is not a JSON text file") from None
    except OSError as exc:
        raise ConfigError(f"cannot read {p}: {exc.strerror or exc}") from None
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as exc:
        raise ConfigError(f"{p} is not valid JSON (line {exc.lineno}, column {exc.colno}: "
                          f"{exc.msg})") from None
    return doc


# --------------------------------------------------------------------------
# run -> arrays and truth
# --------------------------------------------------------------------------


def run_arrays(data) -> tuple[dict, list[dict]]:
    """The run's arrays (name -> ndarray) and their :func:`array_entry` descriptions."""
    from sigmasim import models

    model = models.get(data.config.kind)
    arrays, entries = {}, []
    for k, a in data.series.items():
        desc = model.SERIES.get(k, ("", k))[1]
        arrays[k] = np.asarray(a)
        conv = "axis 1: flavour f" if arrays[k].ndim == 2 else ""
        unit = "sweeps" if k == "sweep" else ("fraction" if k.startswith("accept") else
                                              "lattice units, per site")
        entries.append(array_entry(k, arrays[k], desc, conv, unit))
    for k, a in data.slices.items():
        name = "slice_" + k
        arrays[name] = np.asarray(a)
        desc = model.SLICES.get(k, ("", k))[1]
        conv = (f"axes: (configuration, t, a, b): sum over the sites of time slice t of ({k}_x)_ab"
                if k == model.FIELD_SLICE else "axes: (configuration, t)")
        entries.append(array_entry(name, arrays[name], desc, conv, "plain sum over a time slice"))
    return arrays, entries


def _degenerate(cfg) -> bool:
    return len(set(float(m) for m in cfg.mass)) == 1


def _put_complex(truth, name, z, how, source, desc):
    truth[name + "_re"] = truth_entry(z.real, how, source, f"Re {desc}")
    truth[name + "_im"] = truth_entry(z.imag, how, source, f"Im {desc}")


def _beta0_truth(cfg) -> dict:
    from sigmasim import exact

    tm, ta = cfg.theta_angles
    nf, kappa = cfg.nf, cfg.kappa
    t: dict = {}
    how = "exact"
    if cfg.special:
        if not _degenerate(cfg):
            return t
        h = float(cfg.mass[0])
        r = exact.one_site_su(nf, h, tm)
        src = SRC_ONE_SITE_SU
        det_u = 1.0 + 0.0j
        thetaa_det = complex(np.exp(1j * ta))
        src_det = "det U = 1 in SU(nf) (common practice, no source)"
    else:
        h = [float(m) for m in cfg.mass]
        r = exact.one_site_u(nf, h if not _degenerate(cfg) else h[0], kappa, tm, ta)
        src = src_det = SRC_ONE_SITE_U
        det_u = complex(r["re_det_u"], r["im_det_u"])
        thetaa_det = complex(r["re_thetaa_det_u"], r["im_thetaa_det_u"])
    omega = complex(r["re_tr_u"], r["im_tr_u"])
    omega_h = complex(r["re_tr_thetam_u"], r["im_tr_thetam_u"])
    _put_complex(t, "omega", omega, how, src, "<Omega> = <Tr U>/nf (one site, beta = 0)")
    _put_complex(t, "omega_h", omega_h, how, src, "<e^{i theta_m} Tr U>/nf (one site, beta = 0)")
    _put_complex(t, "det", det_u, how, src_det, "<det U> (one site, beta = 0)")
    t["action_beta"] = truth_entry(0.0, how, SRC_TRIVIAL, "<action_beta> = 0 at beta = 0")
    a_det = -2.0 * kappa * thetaa_det.real
    t["action_det"] = truth_entry(a_det, how, src_det,
                                  "<-2 kappa Re(e^{i theta_a} det U)> per site (beta = 0)")
    if _degenerate(cfg):
        hh = float(cfg.mass[0])
        for f in range(nf):  # flavour permutation symmetry: every (U)_ff has the mean Tr U / nf
            _put_complex(t, f"condensate_{f}", omega, how, src + "; flavour permutation symmetry",
                         f"<(U)_{f}{f}> (one site, beta = 0, degenerate masses)")
        a_mass = -nf * hh * omega_h.real
        t["action_mass"] = truth_entry(a_mass, how, src, "<-Re Tr(H U)> per site (beta = 0)")
        t["action"] = truth_entry(a_mass + a_det, how, src, "<S>/V (beta = 0)")
    return t


def _u1_chain_truth(cfg) -> dict:
    from sigmasim import exact

    tm, ta = cfg.theta_angles
    n = int(cfg.shape[0])
    r = exact.u1_chain(n, cfg.beta, float(cfg.mass[0]), cfg.kappa, tm, ta)
    u = complex(r["re_u"], r["im_u"])
    h, kappa, beta = float(cfg.mass[0]), cfg.kappa, cfg.beta
    how, src = "exact", SRC_U1_CHAIN
    t: dict = {}
    _put_complex(t, "omega", u, how, src, "<U> (periodic U(1) chain)")
    _put_complex(t, "det", u, how, src, "<det U> = <U> (periodic U(1) chain)")
    _put_complex(t, "condensate_0", u, how, src, "<U> (periodic U(1) chain)")
    _put_complex(t, "omega_h", np.exp(1j * tm) * u, how, src,
                 "<e^{i theta_m} U> (periodic U(1) chain)")
    a_beta = -beta * r["energy"]
    a_mass = -h * (np.exp(1j * tm) * u).real
    a_det = -2.0 * kappa * (np.exp(1j * ta) * u).real
    t["action_beta"] = truth_entry(a_beta, how, src, "-beta <cos(phi_x - phi_{x+1})> per site")
    t["action_mass"] = truth_entry(a_mass, how, src, "<-Re(h e^{i theta_m} U)> per site")
    t["action_det"] = truth_entry(a_det, how, src, "<-2 kappa Re(e^{i theta_a} U)> per site")
    t["action"] = truth_entry(a_beta + a_mass + a_det, how, src, "<S>/V")
    t["correlator_U"] = truth_entry(
        r["g_conn"], how, src,
        "connected correlator C(t) = <cos(phi_0 - phi_t)> - |<U>|^2, t = 0..T-1, of the slice sums "
        "slice_U[:, :, 0, 0] as in sigmasim.analysis.connected_correlator (V_s = 1)")
    return t


def _tree_truth(cfg) -> dict:
    from sigmasim.exact import free_scalar_mass

    t: dict = {}
    h = float(cfg.mass[0])
    if _degenerate(cfg) and h > 0 and cfg.theta == 0.0:
        m2 = h / cfg.beta
        t["m2_pion"] = truth_entry(m2, "tree level", SRC_TREE,
                                   "pion bare mass^2 h/beta (leading order in 1/beta)")
        t["mass_pion"] = truth_entry(free_scalar_mass(m2), "tree level", SRC_TREE,
                                     "pion lattice energy 2 asinh(sqrt(h/beta)/2)")
        if not cfg.special:
            m2e = (h + 2.0 * cfg.kappa * cfg.nf) / cfg.beta
            t["m2_eta_prime"] = truth_entry(m2e, "tree level", SRC_TREE,
                                            "eta' bare mass^2 (h + 2 kappa nf)/beta")
            t["mass_eta_prime"] = truth_entry(free_scalar_mass(m2e), "tree level", SRC_TREE,
                                              "eta' lattice energy 2 asinh(sqrt(m2)/2)")
    try:
        from sigmasim import vacua

        pot = vacua.make_potential(list(cfg.mass), cfg.kappa, cfg.theta, cfg.theta_placement,
                                   nf=cfg.nf, group=cfg.group)
        found = vacua.find_local_minima(pot)
    except Exception:  # pragma: no cover - a vacuum search failure must not stop an export
        found = []
    for i, v in enumerate(found):
        # i orders the minima by energy; k is the branch number used everywhere else
        k = vacua.branch_label(v.omega_rot, cfg.theta, cfg.nf)
        tag = f"branch k = {k}, " + ("global minimum" if v.is_global else "metastable")
        t[f"vacuum_{i}_energy"] = truth_entry(
            v.energy, "tree level", SRC_VACUA,
            f"potential energy per site of tree-level vacuum {i} ({tag}); compare with "
            "<action_mass + action_det> of a run that stays in this branch")
        _put_complex(t, f"vacuum_{i}_omega_h", complex(v.omega_rot), "tree level", SRC_VACUA,
                     f"omega_h of tree-level vacuum {i} ({tag})")
    return t


def run_truth(cfg) -> dict:
    """Known answers for a run config (module docstring lists which)."""
    truth: dict = {}
    if cfg.beta == 0.0:
        truth.update(_beta0_truth(cfg))
    elif len(cfg.shape) == 1 and cfg.nf == 1 and not cfg.special:
        truth.update(_u1_chain_truth(cfg))
    if cfg.beta >= TREE_LEVEL_MIN_BETA:
        truth.update(_tree_truth(cfg))
    return truth


_PHYSICS = ("action", "action_beta", "action_mass", "action_det", "omega", "omega_h",
            "condensate", "det")


def reference_truth(data, skip=()) -> dict:
    """The run's own Gamma-method means of every physics series column not in ``skip``."""
    import warnings

    from sigmasim.analysis import gamma_analysis

    out: dict = {}
    for k in _PHYSICS:
        if k not in data.series:
            continue
        a = np.asarray(data.series[k])
        mat = _csv_matrix(a[:, None] if a.ndim == 1 else a)
        for col, x in zip(column_names(k, a[:, None] if a.ndim == 1 else a), mat.T):
            col = col.replace(f"{k}_0", k, 1) if a.ndim == 1 else col
            if col in skip or x.size < 8 or not np.all(np.isfinite(x)) or np.ptp(x) == 0:
                continue
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                g = gamma_analysis(x)
            out[col] = truth_entry(g.value, "high-statistics estimate", SRC_GAMMA,
                                   f"mean of {col} in this run (tau_int = {g.tau_int:.3g}, "
                                   f"N = {g.n})", error=g.error)
    return out


def export_run(run_path, fmt: str = "npz", out=None, reference: bool = False,
               overwrite: bool = True) -> list[Path]:
    """Export a run file; returns the written paths (sidecar last)."""
    from sigmasim.storage import open_run

    run_path = Path(run_path)
    if fmt not in FORMATS:
        raise ConfigError(f"unknown export format {fmt!r}; choose one of {', '.join(FORMATS)}")
    data = open_run(run_path)
    if len(data) == 0:
        raise RunFileError(f"{run_path} holds no measurements yet; nothing to export")
    cfg = data.config
    arrays, entries = run_arrays(data)
    truth = run_truth(cfg)
    notes = []
    ref = reference_truth(data, skip=set(truth)) if reference else {}
    truth.update(ref)
    if ref:
        notes.append("high-statistics estimates are this run's own means: scoring this run "
                     "against them is circular; score other runs of the same config")
    if data.status != "complete":
        notes.append(f"the run's status is {data.status!r}: it holds {len(data)} of "
                     f"{cfg.measurements} measurements")
    prov = provenance(run_file=str(run_path), run_status=data.status,
                      run_provenance=data.provenance)
    side = {"kind": "run export", "conventions": run_conventions(cfg), "units": RUN_UNITS,
            "config": cfg.to_dict(), "seed": cfg.seed, "provenance": prov, "truth": truth,
            "notes": notes}
    prefix = _prefix(out) if out else run_path.with_name(run_path.stem + "_export")
    return write_arrays(prefix, arrays, entries, fmt, side, protect=(run_path,), overwrite=overwrite)
