"""Long commands show a progress bar on a terminal and stay quiet in a pipe or under --quiet."""

import io

import pytest

from sigmasim.cli import main

BASE = """
name = "{name}"
seed = 3
[lattice]
shape = [4, 4]
[model]
nf = 1
beta = 0.5
mass = 0.2
kappa = 0.0
theta = 1.0
[run]
thermalize = 5
measurements = 30
threads = 1
start = "{start}"
"""

TABLES = {
    "hysteresis": "[hysteresis]\nstart = 0.0\nstop = 1.0\nstep = 0.5\nsweeps_per_step = 5\n",
    "temper": "[tempering]\nthetas = [0.5, 1.0]\n",
    "lifetimes": "[lifetimes]\nsizes = [4]\nstarts = 2\nmax_sweeps = 20\nstay = 2\nworkers = 1\n",
}


class _Terminal(io.StringIO):
    def isatty(self):
        return True


class _Pipe(io.StringIO):
    def isatty(self):
        return False


def _command(tmp_path, kind):
    cfg = tmp_path / f"{kind}.toml"
    start = "branch" if kind == "lifetimes" else "cold"
    cfg.write_text(BASE.format(name=kind, start=start).replace("[run]", f"[run]\noutput = \"{tmp_path}\"")
                   + TABLES.get(kind, ""))
    if kind == "analyze":
        assert main(["run", str(cfg), "--quiet"]) == 0
        return ["analyze", str(tmp_path / kind / f"{kind}.h5")]
    return [kind, str(cfg)]


@pytest.mark.parametrize("kind", ["hysteresis", "temper", "lifetimes", "analyze"])
@pytest.mark.parametrize("where", ["terminal", "pipe", "quiet"])
def test_progress_only_on_a_terminal(tmp_path, monkeypatch, capsys, kind, where):
    args = _command(tmp_path, kind)
    capsys.readouterr()
    err = (_Pipe if where == "pipe" else _Terminal)()
    monkeypatch.setattr("sys.stderr", err)
    extra = ["--quiet"] if where == "quiet" else []
    assert main(args + extra) == 0
    text = err.getvalue()
    if where == "terminal":
        assert f"{kind}" in text and "|" in text, text  # a tqdm bar named after the command
    else:
        assert text == "", text


def test_validate_shows_its_groups(monkeypatch, capsys):
    from sigmasim import validation

    monkeypatch.setattr(validation, "_quick_parts", lambda: [list, list, list])
    for where, extra, want in (("terminal", [], True), ("pipe", [], False), ("terminal", ["--quiet"], False)):
        err = (_Pipe if where == "pipe" else _Terminal)()
        monkeypatch.setattr("sys.stderr", err)
        assert main(["validate", *extra]) == 0
        assert ("validate" in err.getvalue() and "/3" in err.getvalue()) == want, err.getvalue()


def test_vacua_shows_a_live_line(monkeypatch, capsys):
    for where, extra, want in (("terminal", [], True), ("pipe", [], False), ("terminal", ["--quiet"], False)):
        err = (_Pipe if where == "pipe" else _Terminal)()
        monkeypatch.setattr("sys.stderr", err)
        assert main(["vacua", "--nf", "2", "--mass", "0.3", "--kappa", "0.5", "--points", "9", *extra]) == 0
        assert ("vacua" in err.getvalue()) == want, err.getvalue()
