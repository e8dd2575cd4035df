"""Progress: the run sink's tqdm bar and a plain bar for the other long commands (the only tqdm import)."""

from __future__ import annotations

__all__ = ["ProgressBar", "task_bar", "Steps"]


def task_bar(total: int | None, desc: str, quiet: bool = False, unit: str = "step"):
    """A tqdm bar on stderr for a command's long loop.

    Off under ``--quiet`` (``quiet``) and whenever stderr is not a terminal (tqdm's
    ``disable=None``), so pipes and log files stay clean.  Close it (or use it as a context).
    """
    import sys

    from tqdm import tqdm

    return tqdm(total=total, desc=desc, unit=unit, disable=True if quiet else None, dynamic_ncols=True,
                leave=False, file=sys.stderr)


class Steps:
    """``progress(done, total)`` callback that drives a :func:`task_bar` (created on first call)."""

    def __init__(self, desc: str, quiet: bool = False, unit: str = "step"):
        self.desc, self.quiet, self.unit = desc, quiet, unit
        self.bar = None

    def __call__(self, done: int, total: int, what: str | None = None) -> None:
        if self.bar is None:
            self.bar = task_bar(total, self.desc, self.quiet, self.unit)
        if what is not None:
            self.bar.set_postfix_str(what, refresh=done == self.bar.n)
        self.bar.update(done - self.bar.n)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
            self.bar = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class ProgressBar:
    """Sink showing sweeps done, sweeps/s and the latest acceptance rates.

    The bar switches itself off when the output is not a terminal.
    """

    def __init__(self, label: str = "", disable: bool | None = None):
        self.label = label
        self.disable = disable
        self.bar = None

    def start(self, sim) -> None:
        from tqdm import tqdm

        self.bar = tqdm(total=sim.total_sweeps, initial=sim.state.sweep, desc=self.label,
                        unit="sweep", disable=self.disable, dynamic_ncols=True, leave=False)

    def record(self, sim, record) -> None:
        self.bar.update(1)
        if record is not None and sim.state.n_meas % 50 == 1:
            post = {}
            if record["accept_metropolis"] == record["accept_metropolis"]:
                post["acc"] = f"{record['accept_metropolis']:.2f}"
            if record["accept_phase"] == record["accept_phase"]:
                post["acc_phase"] = f"{record['accept_phase']:.2f}"
            if post:
                self.bar.set_postfix(post, refresh=False)

    def checkpoint(self, sim) -> None:
        pass

    def finish(self, sim) -> None:
        self.close()

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
            self.bar = None
