"""A fake clock for timing tests: time passes only when a timed callable says so, and every clock read and every
call is logged, so the order of the interleaving and the medians are known exactly (no machine timing)."""

from __future__ import annotations

from torch import nn


class FakeClock:
    """Callable like :func:`time.perf_counter` (seconds); ``spend(who, ms)`` advances it and logs ``who``."""

    def __init__(self) -> None:
        self.now = 0.0
        self.log: list[str] = []

    def __call__(self) -> float:
        self.log.append("read")
        return self.now

    def spend(self, who: str, ms: float) -> None:
        self.log.append(who)
        self.now += ms / 1000.0


class Costly(nn.Module):
    """A linear layer whose forward pass costs ``ms`` milliseconds on ``clock``."""

    def __init__(self, clock: FakeClock, ms: float, name: str, d_in: int = 4, d_out: int = 3) -> None:
        super().__init__()
        self.fc = nn.Linear(d_in, d_out)
        self.clock, self.ms, self.label = clock, ms, name

    def forward(self, x):
        self.clock.spend(self.label, self.ms)
        return self.fc(x)
