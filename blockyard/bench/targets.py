"""The benchmark's targets: a measured figure, a bound, and whether this run met it."""

from __future__ import annotations

import dataclasses
from typing import Any

# Issue 19: the compiled scan's forward + backward stays within 1.2x one elementwise multiply-add's
# forward + backward (the memory-bandwidth floor of scripts/bench_scan.py); it was 3.0 before.
SCAN_TARGET_RATIO = 1.2


@dataclasses.dataclass(frozen=True)
class Target:
    """A target: ``value`` compared with ``bound`` (">=" or "<=" or ">"); ``note``: why it is n/a, or what bounds it.

    With a confidence ``interval`` (low, high) around ``value``, the target is met only where the
    whole interval is on the right side of the bound, missed where the whole of it is on the wrong
    side, and unsure (``met`` None) where it straddles the bound.
    """

    name: str
    value: float | None
    op: str
    bound: float
    note: str = ""
    interval: tuple[float, float] | None = None

    def _holds(self, x: float) -> bool:
        return {">=": x >= self.bound, "<=": x <= self.bound, ">": x > self.bound}[self.op]

    @property
    def met(self) -> bool | None:
        if self.value is None:
            return None
        if self.interval is None:
            return self._holds(self.value)
        low, high = (self._holds(x) for x in self.interval)
        return low if low == high else None


def speed_targets(result: dict[str, Any]) -> list[Target]:
    """The speed targets, evaluated on the figures of this run."""
    r = result["ratios"]
    scan = result.get("scan", {})
    auto = scan.get("backends", {}).get(scan.get("auto", ""), {})
    machine = result.get("machine", {})
    no_bf16 = "" if machine.get("bf16", True) else f"not measurable here: {machine.get('bf16_reason')}"
    # Every ratio reads its paired steps where measured (blockyard.bench.paired). Without them, the
    # trainer / plain ratios are each blockyard figure over the mean of the plain ones measured just
    # before and after it, median over rounds (the interleaved comparison); the others best / best.
    bracketed = result.get("ratios_median_of_rounds", r)
    equal = result.get("ratios_at_equal_mfu", {})
    paired = result.get("ratios_paired", {})

    def at_equal_mfu(key: str) -> str:  # (compiled/eager, trainer/plain: the same model, 1.00 by definition)
        same_model = key.startswith(("compiled", "blockyard"))
        return "" if equal.get(key) is None or same_model else f"at equal MFU {equal[key]:.2f}"

    def paired_target(name: str, key: str, bound: float, unavailable: str = "",
                      fallback: dict[str, Any] | None = None) -> Target:
        """The paired-step median and its 95% interval where measured, else ``fallback`` (default best/best)."""
        p = paired.get(key)
        if unavailable or p is None or p["low"] is None or p["high"] is None:
            figure = "" if p is None else f"paired median {p['median']:.2f} (too few pairs for an interval)"
            note = unavailable or "; ".join(x for x in (figure, at_equal_mfu(key)) if x)
            value = None if unavailable else ((fallback or r)[key] if p is None else p["median"])
            return Target(name, value, ">=", bound, note)
        loop = "" if p.get("loop_efficiency", 1.0) == 1.0 else f" x the loop's efficiency {p['loop_efficiency']:.3f}"
        note = f"paired steps{loop}, {p['pairs']} pairs, 95% interval {p['low']:.2f}-{p['high']:.2f}"
        eq = at_equal_mfu(key)
        return Target(name, p["median"], ">=", bound, f"{note}; {eq}" if eq else note, (p["low"], p["high"]))
    # Issue 19's targets (ratios of one run, side by side).
    targets = [
        paired_target("blockyard train / plain loop tokens/s, global attention fp32", "blockyard_over_plain_fp32",
                      0.98, fallback=bracketed),
        paired_target("blockyard train / plain loop tokens/s, global attention bf16", "blockyard_over_plain_bf16",
                      0.98, no_bf16, fallback=bracketed),
        Target("scan fwd+bwd / multiply-add fwd+bwd, (16, 256, 256)", auto.get("ratio_to_floor"), "<=",
               SCAN_TARGET_RATIO),
        paired_target("recurrence / global attention tokens/s, seq 256", "recurrence_over_attention_s256", 1.25),
        paired_target("recurrence / global attention tokens/s, seq 2048", "recurrence_over_attention_s2048", 2.0),
        paired_target("bf16 / fp32 tokens/s, global attention", "bf16_over_fp32_attention", 1.8, no_bf16),
        paired_target("bf16 / fp32 tokens/s, recurrence", "bf16_over_fp32_recurrence", 2.5, no_bf16),
        paired_target("compiled / eager tokens/s, global attention (runtime.compile)", "compiled_over_eager_attention",
                      1.1),
        paired_target("compiled / eager tokens/s, recurrence (runtime.compile)", "compiled_over_eager_recurrence", 1.1),
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
