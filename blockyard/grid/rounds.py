"""Seeds until decided: which cells a grid with ``seeds: {first, most, step}`` needs, round by round.

Round 1 gives every group seeds 0 .. first - 1. When every cell of the rounds so far has finished
(done or diverged), the comparisons are decided on the data so far (``blockyard.grid.verdicts``,
at the sequential design's nominal level); the next round adds ``step`` seeds to every
still-undecided variant and to the reference (and the null control) at its axis point. It stops
when every comparison of the family is decided or the groups reached ``most`` seeds.

The rounds are replayed from the cell outcomes each time (a pure function of them), so a grid
resumes after any interruption into the same round with the same cells, and the report tells
how many rounds ran and why it stopped without any record of its own. A fixed seed list is one
round with every seed.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterable

from blockyard.grid.spec import NULL_VARIANT, Design
from blockyard.grid.verdicts import GroupKey, GroupOutcomes, compare_all, restrict


@dataclasses.dataclass(frozen=True)
class RoundState:
    """Where a grid stands: the seeds each group needs now, the rounds planned, and whether more will come."""

    rounds: int  # rounds planned so far (the last may still be running)
    seeds: dict[GroupKey, tuple[int, ...]]  # group -> seeds it needs up to this round
    complete: bool  # no further round will be added
    reason: str  # why it stopped, or what it waits for

    def needs(self, key: GroupKey, seed: int) -> bool:
        return seed in self.seeds.get(key, ())


def plan_rounds(design: Design, keys: Iterable[GroupKey], reference: str | None, seed_order: tuple[int, ...],
                outcomes: dict[GroupKey, GroupOutcomes]) -> RoundState:
    """Replay the rounds on ``outcomes`` (the cells recorded so far; absent ones count as not started)."""
    keys = list(keys)
    if design.schedule is None:
        seeds = {k: seed_order for k in keys}
        waiting = _waiting(seeds, outcomes)
        return RoundState(1, seeds, True, f"{waiting} cell(s) to finish" if waiting else "fixed seed list")
    looks = design.schedule.looks()
    seeds = {k: seed_order[: looks[0]] for k in keys}
    for r in range(1, len(looks) + 1):
        waiting = _waiting(seeds, outcomes)
        if waiting:
            return RoundState(r, seeds, False, f"{waiting} cell(s) to finish")
        family = compare_all(restrict(outcomes, seeds), reference, design, with_planning=False)
        open_points = {c.point for c in family.undecided}
        if not family.undecided:
            return RoundState(r, seeds, True, f"every comparison decided after round {r} ({looks[r - 1]} seeds)")
        if r == len(looks):
            return RoundState(r, seeds, True, f"reached seeds.most = {looks[-1]} seeds with "
                                              f"{len(family.undecided)} comparison(s) undecided")
        grow = {c.key for c in family.undecided}
        grow |= {(v, p) for v, p in keys if p in open_points and v in (reference, NULL_VARIANT)}
        seeds = {k: seed_order[: looks[r]] if k in grow else s for k, s in seeds.items()}
    raise AssertionError("unreachable: the last look returns")


def _waiting(seeds: dict[GroupKey, tuple[int, ...]], outcomes: dict[GroupKey, GroupOutcomes]) -> int:
    """Cells of ``seeds`` that have not ended for good (failed ones count: a rerun retries them)."""
    return sum(1 for key, wanted in seeds.items()
               for s in wanted if key not in outcomes or s not in outcomes[key].finished)

