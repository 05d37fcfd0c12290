"""The benchmark's targets: a measured figure, a bound, and whether this run met it."""

from __future__ import annotations

import dataclasses
from typing import Any


@dataclasses.dataclass(frozen=True)
class Target:
    """A target: ``value`` compared with ``bound`` (">=" or "<=" or ">"); ``note`` says why it is n/a."""

    name: str
    value: float | None
    op: str
    bound: float
    note: str = ""

    @property
    def met(self) -> bool | None:
        if self.value is None:
            return None
        return {">=": self.value >= self.bound, "<=": self.value <= self.bound, ">": self.value > self.bound}[self.op]


def speed_targets(result: dict[str, Any]) -> list[Target]:
    """The speed targets, evaluated on the figures of this run."""
    r = result["ratios"]
    scan = result.get("scan", {})
    auto = scan.get("backends", {}).get(scan.get("auto", ""), {})
    machine = result.get("machine", {})
    no_bf16 = "" if machine.get("bf16", True) else f"not measurable here: {machine.get('bf16_reason')}"
    targets = [
        Target("blockyard / plain loop tokens/s, global attention fp32", r["blockyard_over_plain_fp32"], ">=", 0.95),
        Target("scan fwd+bwd / multiply-add fwd+bwd, (16, 256, 256)", auto.get("ratio_to_floor"), "<=", 3.0),
        Target("recurrence / global attention tokens/s, seq 256", r["recurrence_over_attention_s256"], ">=", 0.9),
        Target("recurrence / global attention tokens/s, seq 2048", r["recurrence_over_attention_s2048"], ">", 1.0),
        Target("bf16 / fp32 tokens/s, global attention", r["bf16_over_fp32_attention"], ">=", 1.8, no_bf16),
    ]
    return [t if t.value is not None or t.note else dataclasses.replace(t, note="not measured in this run")
            for t in targets]


def interval_within(low: float, high: float, bound: float) -> bool | None:
    """Is |x| <= ``bound`` for an x known only to lie in [low, high]?

    True where the whole interval lies within +-bound, False where it lies wholly outside,
    None (unsure) where it straddles the bound.
    """
    if max(abs(low), abs(high)) <= bound:
        return True
    if low > bound or high < -bound:
        return False
    return None
