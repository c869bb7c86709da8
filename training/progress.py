"""A dependency-free progress bar on stderr: one line, rewritten in place on a terminal, a line per update otherwise."""

from __future__ import annotations

import sys
import time


class Progress:
    def __init__(self, total: int | None, budget_s: float | None, *, stream=None, enabled: bool = True):
        self.total, self.budget_s = total, budget_s
        self.stream = stream or sys.stderr
        self.enabled = enabled
        self.start = time.monotonic()
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()

    def fraction(self, step: int) -> float:
        by_steps = step / self.total if self.total else 0.0
        by_time = (time.monotonic() - self.start) / self.budget_s if self.budget_s else 0.0
        return min(1.0, max(by_steps, by_time))

    def update(self, step: int, **values: float) -> None:
        if not self.enabled:
            return
        frac = self.fraction(step)
        elapsed = time.monotonic() - self.start
        left = elapsed / frac - elapsed if frac > 0 else float("nan")
        bar = "#" * int(frac * 24) + "." * (24 - int(frac * 24))
        stats = "  ".join(f"{k} {v:.4g}" for k, v in values.items())
        line = f"[{bar}] {frac:4.0%} step {step}  {elapsed:5.0f}s, ~{left:4.0f}s left  {stats}"
        self.stream.write(("\r" + line + "\x1b[K") if self.tty else line + "\n")
        self.stream.flush()

    def close(self) -> None:
        if self.enabled and self.tty:
            self.stream.write("\n")
            self.stream.flush()
