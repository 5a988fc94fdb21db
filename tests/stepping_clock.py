"""A test clock for ledgers: each reading is ``step_s`` later than the last (no wall clock involved)."""

from __future__ import annotations

T0 = 1_790_000_000.0  # 2026-09-21, an arbitrary fixed start


class SteppingClock:
    def __init__(self, t0: float = T0, step_s: float = 0.5):
        self.t, self.step_s = float(t0), float(step_s)

    def __call__(self) -> float:
        self.t += self.step_s
        return self.t
