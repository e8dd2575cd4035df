"""Progress sinks: a tqdm bar (the only tqdm import) and nothing else."""

from __future__ import annotations

__all__ = ["ProgressBar"]


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
