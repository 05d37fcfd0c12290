"""The report's prose, section by section: summary, verdicts and their notes, the noise floor, the noise along
training, tuning, the ladder, the variants with their costs, the cells left out, the method and the caution.

Each section writes into a ``Doc`` from a ``GridResults``; the wording of every rule stands here beside the
numbers it produced.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

from blockyard.grid import stats
from blockyard.grid.fairness import MATCH_TOLERANCE
from blockyard.grid.index import CellRow
from blockyard.grid.ladder import Ladder, rung_of, series_label
from blockyard.grid.ladder import split_point as split_rung
from blockyard.grid.noise import NoiseCurve, resolution_text
from blockyard.grid.report.document import Doc
from blockyard.grid.report.figures import BAND, NOISE_PLOT, TUNING_PLOT
from blockyard.grid.report.results import DEFAULT_LR, GridResults, TuningResults, mean_of
from blockyard.grid.spec import NULL_INIT_OFFSET, NULL_VARIANT
from blockyard.grid.tuning import TunedGroup, Tuning, shared_value_differences
from blockyard.grid.verdicts import Comparison, Family, common_seed_means, group_outcomes, point_text
from blockyard.text import count_text, is_finite_number
from blockyard.text import percent_text as pct

CAUTION = (
    "These verdicts hold for this model size, this data and this training budget only. Effects seen in tiny "
    "models can shrink, vanish or reverse at scale: confirm at the scale you care about before relying on them."
)


# Measured in tests/test_divergence_verdicts.py (test_right_skewed_null_family_error); the Method quotes it.
SKEW_FAMILY_ERROR = "about 10% at 5 pairs and 8% at 10 pairs"


def _fmt(x: float | None, digits: int = 4) -> str:
    return "-" if x is None or not math.isfinite(x) else f"{x:.{digits}f}"


def _signed(x: float | None, digits: int = 4) -> str:
    return "-" if x is None or not math.isfinite(x) else f"{x:+.{digits}f}"


def _count(n: float | None) -> str:
    return "-" if n is None or not math.isfinite(n) else count_text(n)


def _ci_text(iv: stats.Interval | None, signed: bool = False) -> str:
    if iv is None:
        return "-"
    if iv.low is None or iv.high is None:
        return stats.NO_INTERVAL
    f = _signed if signed else _fmt
    return f"[{f(iv.low)}, {f(iv.high)}]"


def lever_items(levers: dict[str, frozenset[Any]]) -> list[str]:
    """The Method's sentences on what the noise levers change about what is measured."""
    items = []
    draws = levers.get("model.init_draws", frozenset())
    if draws == {"by_path"}:
        items.append(
            "Initialisation (`model.init_draws: by_path`): every weight is drawn from a generator keyed by the init "
            "seed and its path in the model (MLPs unit by unit), so at the same seed the modules two variants share "
            "start identical and only what differs starts differently (common random numbers). The null control "
            "runs under another init seed and shares nothing, so its spread is an upper bound of a pair's.")
    elif draws == {"stream"}:
        items.append("Initialisation (`model.init_draws: stream`): one random stream in module order, so two "
                     "variants at the same seed start differently in every module after the first that differs.")
    elif len(draws) > 1:
        items.append("Initialisation: the cells mix `model.init_draws` values; pairs across them share less.")
    ema = sorted(float(v) for v in levers.get("train.ema_half_life", frozenset()))
    if any(v > 0 for v in ema):
        items.append(
            "Weight average (`train.ema_half_life` " + ", ".join(f"{v:g}" for v in ema) + " of the run): the loss "
            "is that of an exponential moving average of the weights, not of the last trained weights (whose loss "
            "is `raw_loss` in each run's metrics). It measures the averaged model, which lags the trained one.")
    rates = sorted(float(v) for v in levers.get("train.lr", frozenset()))
    if len(rates) == 1:
        lower = (f"; it is below the trainer's default {DEFAULT_LR:g}, which trades loss for less seed-to-seed "
                 "noise (README, \"What cuts the noise\")") if rates[0] < DEFAULT_LR else ""
        items.append(f"Learning rate (`train.lr: {rates[0]:g}`): the same peak rate for every variant, not tuned "
                     f"per variant{lower}. Every loss is that of a model trained at this rate, and a verdict holds for "
                     "this rate only: another rate can move a comparison.")
    return items


def _adjust_text(adjustments: dict[str, Any]) -> str:
    if not adjustments:
        return "-"
    parts = []
    for k, v in adjustments.items():
        value = f"{v:.4g}" if isinstance(v, float) else f"{v:,d}" if isinstance(v, int) else str(v)
        parts.append(f"{k} = {value}")
    return "; ".join(parts)


def build_report(grid_dir: Path, res: GridResults, plots: list[tuple[str, str]],
                 noise: tuple[list[NoiseCurve], bool] = ([], False)) -> Doc:
    """The report, section by section: verdicts first (what a reader acts on), the method last; ``noise``: each
    comparison's noise along training and whether noise.png was written."""
    doc = Doc()
    doc.h(1, f"Grid {res.name}")
    if res.description:
        doc.p(res.description)
    _summary_section(doc, res)
    _verdicts_section(doc, res)
    _null_section(doc, res.family)
    noise_section(doc, noise[0], res.design.smallest_effect, noise[1])
    _tuning_section(doc, res, plots)
    _ladder_section(doc, res)
    _variants_section(doc, res)
    _excluded_section(doc, res.rows)
    plots = [p for p in plots if p[0] != TUNING_PLOT]  # shown in the Tuning section
    if plots:
        doc.h(2, "Plots")
        for name, caption in plots:
            doc.img(name, caption)
    _method_section(doc, res)
    doc.h(2, "Caution")
    doc.p(CAUTION if res.ladder is None else CAUTION + " The Ladder section measures how each gap moved over the "
          "rungs run; a trend is a line through a few small sizes, and the further past the largest rung, the "
          "more it is a guess.")
    return doc


def _summary_section(doc: Doc, res: GridResults) -> None:
    counts: dict[str, int] = {}
    for r in res.rows:
        counts[r["status"]] = counts.get(r["status"], 0) + 1
    seeds = sorted({r["seed"] for r in res.rows})
    schedule = res.design.schedule
    most = f"{schedule.most} (auto, budget_hours {schedule.budget_hours:g})" if schedule and schedule.auto else (
        schedule.most if schedule else None)
    seeds_text = (f"seeds until decided (first {schedule.first}, most {most}, {schedule.step} per round; "
                  f"seeds run: {', '.join(map(str, seeds))})" if schedule else f"seeds {', '.join(map(str, seeds))}")
    doc.p(f"{len(res.rows)} cells ({', '.join(f'{n} {s}' for s, n in sorted(counts.items()))}); {seeds_text}; "
          f"reference: {res.reference or 'none (no variants)'}; fairness: {_match_text(res.match)}; smallest effect "
          f"that matters: {res.design.smallest_effect:g} nats/token.")
    if res.rounds:
        doc.p(f"Rounds: {res.rounds}.")
    if res.design_changed:
        doc.p("**Note:** the verdict rules (smallest effect, seed schedule or null control) were changed with "
              "--force after cells had run; the error guarantee below assumes they were fixed in advance.")


def _verdict_cell(c: Comparison) -> str:
    marks = [m for m in (c.note, "fragile" if c.fragile else "") if m]
    return f"**{c.verdict}**" + (f" ({'; '.join(marks)})" if marks else "")


def _needed_text(c: Comparison) -> str:
    if c.planning is None:
        return "-"
    return f">{stats.MAX_SEEDS}" if c.planning.seeds_needed is None else str(c.planning.seeds_needed)


def _diverged_text(c: Comparison) -> str:
    return f"{len(c.variant_outcomes.diverged)} / {len(c.reference_outcomes.diverged)}"


def _comparison_row(c: Comparison) -> list[str]:
    detectable = c.planning.detectable if c.planning else None
    return [c.variant, c.point_text, str(len(c.seeds)), _signed(c.mean_diff), _ci_text(c.interval, signed=True),
            _verdict_cell(c), _ci_text(c.unadjusted, signed=True), _needed_text(c),
            "-" if detectable is None else f"±{detectable:.4f}", _diverged_text(c)]


COMPARISON_HEADER = ["variant", "axis point", "pairs", "difference (mean)", f"{pct(stats.LEVEL)} simultaneous CI",
                     "verdict", "unadjusted 95% CI", "seeds needed", "detectable (80% power)",
                     "diverged (variant / ref)"]


def _verdicts_section(doc: Doc, res: GridResults) -> None:
    fam = res.family
    doc.h(2, "Verdicts")
    if not fam.comparisons:
        doc.p("No comparisons: the grid has no variants besides the reference.")
        return
    counts = {v: sum(c.verdict == v for c in fam.comparisons) for v in stats.VERDICTS}
    doc.p(f"**{sum(counts[v] for v in stats.VERDICTS[:3])} of {fam.size} comparison(s) decided**: "
          + ", ".join(f"{n} {v}" for v, n in counts.items() if n) + ".")
    doc.p(f"Final validation loss (nats/token), paired by seed: variant minus **{res.reference}** at the same axis "
          f"point, on the seeds both finished; negative is better. The {fam.size} comparison(s) share one "
          f"{pct(stats.LEVEL)} error budget: each interval is a {pct(1 - fam.look_alpha)} paired t interval, so all "
          f"hold at once with probability ≥ {pct(stats.LEVEL)} (see Method). Better / worse: the whole interval below "
          f"/ above 0. Equivalent: the whole interval inside ±{res.design.smallest_effect:g}. Otherwise undecided. "
          "Where the two groups diverged on different seeds, a rank test on the worst-rank composite decides "
          "instead (a diverged cell ranks worse than every finished loss; never equivalent). **Fragile**: the "
          "verdict changes when some single seed is left out.")
    doc.table(COMPARISON_HEADER, [_comparison_row(c) for c in fam.comparisons])
    notes = [n for c in fam.comparisons for n in _comparison_notes(c)]
    if notes:
        doc.ul(notes)


def _who(c: Comparison) -> str:
    return f"{c.variant}" + (f" at {c.point_text}" if c.point else "")


def _comparison_notes(c: Comparison) -> list[str]:
    notes = []
    d = c.divergence
    if d is not None:
        v, r = c.variant_outcomes, c.reference_outcomes
        line = (f"{_who(c)}: diverged on {len(v.diverged)} seed(s), the reference on {len(r.diverged)}. The verdict "
                f"is the worst-rank composite's: on {d.pairs} pair(s), {d.variant_only} where only the variant "
                f"diverged, {d.reference_only} where only the reference did; exact signed-rank p = "
                f"{d.rank.p_less:.3g} (better) / {d.rank.p_greater:.3g} (worse), McNemar exact p of the counts "
                f"alone {d.mcnemar_p:.3g}.")
        if not d.reachable:
            line += (f" No rank test on {d.pairs} pair(s) can reach the look's level: the smallest one-sided p is "
                     f"{d.rank.smallest_p:.3g}, above {pct(c_alpha(c) / 2)}; at least "
                     f"{math.ceil(math.log2(2 / c_alpha(c)))} pairs not lost by both are needed.")
        notes.append(line)
    if c.fragile:
        notes.append(f"{_who(c)}: **fragile**: leaving out one of its seeds changes the verdict "
                     f"{c.verdict}; read it as resting on that seed.")
    if not c.decided and c.planning is not None:
        pl = c.planning
        need = lambda n: f">{stats.MAX_SEEDS}" if n is None else str(n)  # noqa: E731
        notes.append(f"{_who(c)} is undecided at {len(c.seeds)} pairs: about {need(pl.seeds_needed)} seeds per group "
                     f"would decide it with 80% power if the true difference is 0 (equivalent; "
                     f"{need(pl.seeds_for_equivalence)} seeds) or at least ±{c.smallest_effect:g} (better or worse; "
                     f"{need(pl.seeds_for_difference)} seeds){_halfway_text(c)}. Planned at the level the verdicts use "
                     f"({pct(c_alpha(c))} two-sided), with the paired sd's upper bound {pl.sd_upper:.4f}.")
    elif c.planning is None and not c.decided and d is None:
        notes.append(f"{_who(c)}: {c.note}; at least 2 finished pairs are needed for an interval.")
    return notes


def c_alpha(c: Comparison) -> float:
    """The two-sided level a comparison's verdict used (the look's): 1 - its interval's confidence."""
    return 1 - c.interval.confidence if c.interval is not None else 1 - stats.LEVEL


def _halfway_text(c: Comparison) -> str:
    """'; at a true difference of +-delta/2 the chance is only X%': the power sentence's blind spot."""
    pl = c.planning
    if pl is None or pl.seeds_needed is None or not pl.sd_upper:
        return ""
    chance = stats.decision_probability(c.smallest_effect / 2, pl.sd_upper, pl.seeds_needed, c_alpha(c),
                                        c.smallest_effect)
    return (f"; at a true difference in between, ±{c.smallest_effect / 2:g}, the chance with {pl.seeds_needed} seeds "
            f"is {pct(chance)}")


def _null_section(doc: Doc, fam: Family) -> None:
    if not fam.null:
        return
    doc.h(2, "Noise floor (null control)")
    doc.p("`null_control: true`: the reference trained again with another initialisation seed (`train.init_seed`) "
          "on the same data seeds, so its true difference to the reference is 0. It is not part of the family "
          "above; its interval uses the same per-comparison level, so it shows what this design calls noise.")
    doc.table(COMPARISON_HEADER, [_comparison_row(c) for c in fam.null])
    rate = stats.null_flag_rate(fam.comparison_alpha, len(fam.null))  # sequential: the looks hold it at most this
    for c in fam.null:
        if c.interval is None or c.interval.sd is None:
            continue
        where = f" at {c.point_text}" if c.point else ""
        line = (f"Two runs of the same model{where} differ by {_signed(c.interval.mean)} nats/token on average "
                f"(interval {_ci_text(c.interval, signed=True)}; paired sd {c.interval.sd:.4f}).")
        if c.verdict in (stats.BETTER, stats.WORSE):
            line = (f"**Flagged:** the null control{where} came out **{c.verdict}**, a false positive. " + line +
                    " Under a true null this happens in at most "
                    f"{pct(rate)} of grids (about 1 in {1 / rate:,.0f}): {len(fam.null)} null comparison(s), each at "
                    f"the per-comparison level {pct(fam.comparison_alpha)} = {pct(1 - stats.LEVEL)} / {fam.size}. "
                    "If it comes up more often than that, the cells are probably not exchangeable across seeds "
                    "(e.g. a run depends on the init seed in another way) or the paired differences are far from "
                    "normal (see Method), and the verdicts are suspect.")
        doc.p(line)


def _tokens_text(tokens: float | None) -> str:
    return "-" if tokens is None else f"{tokens / 1e6:.3g}M"


def noise_section(doc: Doc, curves: list[NoiseCurve], smallest_effect: float, plotted: bool) -> None:
    """The Noise section: each comparison's paired sd and detectable difference, first and last evaluation."""
    measured = [c for c in curves if c.final is not None]
    if not measured:
        return
    doc.h(2, "Noise")
    doc.p("Every pair of cells (variant and reference, same seed) logs its validation loss at each evaluation, so "
          "the noise of each comparison is known along training at no extra cost. Paired sd: the sd over seeds of "
          "variant minus reference (nats/token); detectable: the smallest true difference these pairs find with "
          "80% power at the level the verdict uses. Every step is in noise.csv.")
    rows = []
    for c in measured:
        first = next(p for p in c.points if p.sd is not None)
        end = c.final
        assert end is not None
        rows.append([c.label, str(end.pairs),
                     f"{_tokens_text(first.tokens)} -> {_tokens_text(end.tokens)}",
                     f"{first.sd:.4f} -> {end.sd:.4f}", f"{first.mean_diff:+.4f} -> {end.mean_diff:+.4f}",
                     f"±{first.detectable:.4f} -> ±{end.detectable:.4f}",
                     "yes" if end.detectable is not None and end.detectable <= smallest_effect else "no"])
    doc.table(["comparison", "pairs", "tokens (first -> last evaluation)", "paired sd", "mean difference",
               "detectable (80% power)", f"detects {smallest_effect:g}?"], rows)
    advice = [t for c in measured if not c.null_control and (t := resolution_text(c, c.label))]
    if advice:
        doc.ul(advice)
    if plotted:
        doc.img(NOISE_PLOT, "Left: detectable difference (80% power, at the verdicts' level) against training tokens, "
                "one line per comparison; dotted: the smallest effect. Right: the paired sd; dashed: the null "
                "control's A/A sd, where the grid has one.")


def _tuning_section(doc: Doc, res: GridResults, plots: list[tuple[str, str]]) -> None:
    """Stage 1: each variant's chosen value, the loss-vs-value plot, edge and basin, and the exploratory
    comparison at shared values."""
    if res.tuning is None:
        return
    t, groups = res.tuning.tuning, res.tuning.groups
    delta = res.design.smallest_effect
    doc.h(2, "Tuning")
    doc.p(f"Stage 1 trained every variant at {len(t.values)} values of `{t.key}` with tuning seeds "
          f"{', '.join(map(str, t.seeds))} ({pct(t.budget)} of the verdict cells' token budget) and chose, for "
          "each variant and axis point, **the value with the lowest mean final validation loss over the tuning "
          "seeds among the values whose next larger value did not diverge or fail on any tuning seed** (a "
          "one-step stability margin, which assumes, as for a learning rate, that larger values are the less stable "
          "ones). The largest value searched has no larger neighbour to vouch for it and is "
          "never chosen; a value that diverged on some seed is not chosen either; ties go to the smaller value; "
          "with no such value, the smallest value searched. Why: the lowest mean alone picks the largest value "
          "that happened to survive the few tuning seeds, the edge of a stability cliff, which then diverges on "
          "the verdict seeds. The verdict cells above "
          "ran at these values on seeds disjoint from the tuning seeds, so the verdicts are not measured on the "
          "noise the choice used.")
    if t.carried:
        _carried_text(doc, res, t)
    if groups is None:
        doc.p("Stage 1 has not finished: no value is chosen yet.")
        return
    header = ["variant", "axis point", f"chosen {t.key}", f"basin (within {delta:g} of the best)"]
    header += [f"loss at {v:g}" for v in t.values]
    table = []
    for g in groups:
        means = g.means
        table.append([g.variant + (" (reference)" if g.variant == res.reference else ""), point_text(g.point),
                      f"{g.chosen:g}", _basin_text(g)]
                     + [("**" if v == g.chosen else "") + (_fmt(means.get(v)) if math.isfinite(means.get(v, math.inf))
                                                           else "diverged/failed") + ("**" if v == g.chosen else "")
                        for v in t.values])
    doc.table(header, table)
    if t.carried and res.ladder is not None:
        _carried_table(doc, res.ladder, groups, t, res.reference)
    warnings = [w for g in groups for w in _tuning_warnings(g, t)]
    if warnings:
        doc.ul(warnings)
    for name, caption in plots:
        if name == TUNING_PLOT:
            doc.img(name, caption)
    if len(t.seeds) >= 2 and res.reference is not None:
        _shared_value_table(doc, res, groups)


def _carried_text(doc: Doc, res: GridResults, t: Tuning) -> None:
    """``tune.rungs: first``: where the values were tuned, and whether the parametrization lets them transfer."""
    rung1 = f" ({res.ladder.overrides_text(1)})" if res.ladder is not None else ""
    doc.p(f"**Tuned on rung 1 only** (grid key `tune.rungs: first`): stage 1 ran on the smallest rung of the "
          f"ladder{rung1} alone, and each variant's chosen `{t.key}` was carried up the ladder: its verdict cells "
          "at every rung ran at the value chosen on rung 1, not at a value tuned at that rung.")
    variants = [v for v in dict.fromkeys(g.variant for g in res.groups) if v != NULL_VARIANT]
    standard = [v for v in variants if res.parametrizations.get(v) != "mup"]
    if standard:
        who = "no variant ran" if len(standard) == len(variants) else f"{', '.join(standard)} did not run"
        doc.p(f"**Caution:** {who} under `model.parametrization: mup`. A learning rate tuned at one width need not "
              "transfer to other widths under the standard parametrization: its best value drifts with width, "
              "which muP is built to prevent (Yang et al. 2022, arXiv:2203.03466). At the larger rungs a variant "
              f"may have trained far from its best `{t.key}`, and unequally so for different variants, which bends "
              "the gaps and trends of the Ladder section.")


def _carried_table(doc: Doc, ladder: Ladder, groups: list[TunedGroup], t: Tuning, reference: str | None) -> None:
    """Each variant's value at every rung under ``tune.rungs: first``: chosen on rung 1, carried to the others."""
    rows = []
    for g in groups:
        _, rest = split_rung(g.point)
        for k in range(1, len(ladder.rungs) + 1):
            rows.append([g.variant + (" (reference)" if g.variant == reference else ""), str(k),
                         ladder.overrides_text(k), point_text(rest) or "-", f"{g.chosen:g}",
                         "tuned on rung 1" if k == 1 else "carried from rung 1"])
    doc.p(f"`{t.key}` used at each rung:")
    doc.table(["variant", "rung", "overrides", "other axes", t.key, "how"], rows)


def _basin_text(g: TunedGroup) -> str:
    low, high = g.basin
    if not math.isfinite(g.means[g.chosen]):
        return "-"
    if low == high:
        return f"{low:g} only (narrower than the spacing of the values)"
    factor = f"; a factor {high / low:.3g}" if low > 0 else ""
    return f"{low:g} to {high:g}{factor}"


def _tuning_warnings(g: TunedGroup, t: Tuning) -> list[str]:
    who = g.variant + (f" at {point_text(g.point)}" if g.point else "")
    if g.all_failed:
        return [f"**{who}**: every searched value diverged or failed; the verdict cells ran at the smallest "
                f"({g.chosen:g}): search smaller values of `{t.key}`."]
    if g.no_margin:
        return [f"**{who}**: no searched value had a larger neighbour that survived every tuning seed; the verdict "
                f"cells ran at the smallest ({g.chosen:g}): search smaller values of `{t.key}`."]
    if g.best_at_largest:
        return [f"**{who}**: the lowest loss was at the largest value searched ({max(g.scores):g}), which the "
                f"stability margin never chooses; the verdict cells ran at {g.chosen:g}: widen `values` upwards."]
    if g.at_edge:
        return [f"**{who}**: the chosen {t.key} {g.chosen:g} is the smallest value searched: the optimum may lie "
                "outside: widen `values`."]
    return []


def _shared_value_table(doc: Doc, res: GridResults, groups: list[TunedGroup]) -> None:
    assert res.tuning is not None and res.reference is not None
    t = res.tuning.tuning
    doc.h(3, "At a shared value (exploratory)")
    doc.p(f"Each variant against **{res.reference}** with both at the same `{t.key}`, paired by tuning seed "
          "(variant minus reference; negative is better). **Exploratory**: measured on the tuning seeds, the same "
          "noise the choice used; plain 95% intervals, not adjusted for the many values; not part of the verdict "
          "family. It shows whether the verdict depends on the tuning: a sign that flips across values means the "
          "comparison at any one shared value would depend on which value was picked.")
    rows = []
    for d in shared_value_differences(groups, res.reference):
        iv = stats.mean_interval(list(d.diffs)) if d.diffs else None
        rows.append([d.variant, point_text(d.point), f"{d.value:g}", str(len(d.seeds)),
                     _signed(iv.mean) if iv else "-", _ci_text(iv, signed=True)])
    doc.table(["variant", "axis point", t.key, "pairs", "difference (mean)", "95% CI (unadjusted)"], rows)
def _ladder_section(doc: Doc, res: GridResults) -> None:
    """Does the gap close with size: each variant's fit over the rungs, each gap's trend in one sentence."""
    lad, lt = res.ladder, res.trends
    if lad is None or lt is None:
        return
    from blockyard.grid.trend import METHOD, describe

    doc.h(2, "Ladder: does the gap close with size?")
    budget = (f"each rung trains on {lad.tokens_per_param:g} tokens per non-embedding parameter of the reference"
              if lad.tokens_per_param is not None else "every rung keeps the base's training budget")
    doc.p(f"{len(lad.rungs)} rungs of model size, {budget}; every rung is an axis point of the verdicts above. "
          f"N is a group's non-embedding parameter count. {_ladder_tuning_text(res.tuning)}")
    by_rung: dict[int, list[str]] = {}
    for g in res.groups:
        k = rung_of(g.point)
        n = g.params_non_embedding
        if k is not None and g.variant != NULL_VARIANT:
            by_rung.setdefault(k, []).append(f"{g.variant} {_count(n)}")
    tokens = {rung_of(tuple(tuple(p) for p in r["point"])): r["planned_tokens"] for r in res.rows
              if r["variant"] == res.reference}
    doc.table(["rung", "overrides", "N per variant", "tokens (reference)"],
              [[str(k), lad.overrides_text(k), ", ".join(dict.fromkeys(by_rung.get(k, []))),
                _count(tokens.get(k))] for k in range(1, len(lad.rungs) + 1)])
    if lt.fits:
        doc.p("Loss against size, per variant (fits.csv): L(N) = E + A·N^-alpha by least squares over every seed "
              "with 4 or more rungs; with fewer, log L on log N without E (3 parameters from 3 sizes would fit any "
              "noise). alpha's interval: alpha ± t(n−3)·SE from the least-squares covariance (n−2 and the OLS slope in "
              "the log form); E's and A's: percentile bootstrap over seeds within each rung.")
        doc.table(["variant", "form", "alpha", "interval", "E", "interval", "A", "rungs", "note"],
                  [[series_label(k), f.form, f"{f.alpha:.4f}", _pair(f.alpha_low, f.alpha_high),
                    "-" if f.E is None else f"{f.E:.4f}", "-" if f.E is None else _pair(f.E_low, f.E_high),
                    f"{f.A:.4g}", str(f.n_rungs), f.note or "-"] for k, f in lt.fits.items()])
    if lt.trends:
        doc.p(f"Trend of each gap to {res.reference} (trend.csv): {METHOD}. The rungs, not the seeds, carry the "
              "slope, so a rung's own deviation (tuning noise shared by its seeds, a depth change) widens the "
              "interval instead of faking a trend. The slope is the change of the gap per doubling of parameters, "
              "with its 95% interval (per comparison, not simultaneous). Shrinking / growing: the interval excludes "
              "0 and |gap| falls / rises with N; reverses: it excludes 0 and the fitted gap changes sign inside the "
              "ladder; a positive gap means the variant is worse.")
        doc.ul([f"**{series_label(k)}** vs {res.reference}: {describe(t)}." for k, t in lt.trends.items()])
    if lt.notes:
        doc.ul(lt.notes)


def _ladder_tuning_text(tuned: TuningResults | None) -> str:
    """Which tuning the fits and trends below rest on."""
    if tuned is None:
        return "No tuning: every variant ran at its configured values at every rung."
    key = tuned.tuning.key
    if tuned.tuning.carried:
        return (f"Tuning: each variant's `{key}` was tuned on rung 1 only and carried up the ladder "
                "(`tune.rungs: first`), so the fits and trends compare the variants at their rung-1 values at "
                "every rung.")
    return (f"Tuning: each variant's `{key}` was tuned at every rung on its own (`tune.rungs: all`), so the fits "
            "and trends compare each variant at its best searched value at each size.")


def _pair(low: float | None, high: float | None) -> str:
    if low is None or high is None or not (math.isfinite(low) and math.isfinite(high)):
        return "-"
    return f"[{low:.4g}, {high:.4g}]"


def _variants_section(doc: Doc, res: GridResults) -> None:
    outcomes = group_outcomes(res.rows)
    means = common_seed_means(outcomes)
    table = []
    for g in res.groups:
        o = outcomes[g.key]
        pairs, iv = means[g.key]
        first = g.rows[0]
        fpt = first.get("flops_per_token")
        tokens = mean_of([r["tokens_seen"] for r in g.done]) or first["planned_tokens"]
        name = g.variant + (" (reference)" if g.variant == res.reference else "") + \
            (" (token-local)" if g.variant in res.token_local else "")
        table.append([
            name, g.point_text, f"{len(o.losses)} / {len(o.diverged)} / {len(o.failed)}", str(pairs),
            _fmt(iv.mean) if iv else "-", _ci_text(iv) if iv else "-",
            _count(g.params_non_embedding),
            _count(g.params_total),
            _count(fpt), _count(tokens), _count(fpt * tokens if fpt is not None and tokens else None),
            _count(mean_of([r["tokens_per_s"] for r in g.done])), _fmt(mean_of([r["wall_s"] for r in g.done]), 1),
            _adjust_text(first["adjustments"]),
        ])
    doc.h(2, "Variants")
    doc.p("Final validation loss: mean over the seeds that *every* group at the same axis point finished (column "
          "'common seeds'), so the gap between two rows is the mean paired difference on the same seeds; a group "
          "that lost its worst seeds to divergence cannot look better for it.")
    doc.table(["variant", "axis point", "seeds done / diverged / failed", "common seeds", "final val loss", "95% CI",
               "params (non-emb)", "params (total)", "FLOPs/token", "train tokens", "train FLOPs", "tokens/s",
               "wall s per cell", "fairness adjustment"], table)
    if res.match == "params":
        doc.p("Parameter matching changed `model.mlp_expansion` (the MLP hidden size) of every non-reference "
              f"variant so that its non-embedding parameters are within {MATCH_TOLERANCE:.0%} of the reference's; "
              "the column 'fairness adjustment' gives the value used.")
    elif res.match == "flops":
        doc.p("FLOP matching changed `train.tokens` (the token budget) of every non-reference variant so that "
              "FLOPs/token x tokens equals the reference's training FLOPs (up to whole optimizer steps); the "
              "column 'fairness adjustment' gives the budget used.")
    if res.cost_note:
        doc.p(res.cost_note)
    if res.token_local:
        doc.p("Variants marked (token-local) use a block that declares it mixes nothing in time (output t depends "
              "on input t alone): a no-mixing baseline on purpose, not a block that failed to mix.")


def _excluded_section(doc: Doc, rows: list[CellRow]) -> None:
    excluded = [r for r in rows if not (r["status"] == "done" and is_finite_number(r["final_val_loss"]))]
    doc.h(2, "Cells without a final loss")
    if not excluded:
        doc.p("None: every cell finished.")
        return
    doc.p("These cells diverged, failed or have not finished. Diverged cells are outcomes: they are counted per "
          "group above, and where the compared groups diverged on different seeds the verdict comes from the "
          "worst-rank composite, in which a diverged cell ranks worse than every finished loss (see Method). Failed "
          "cells (an error, not the training) are retried by a rerun and are not outcomes.")
    doc.table(["cell", "status", "exit code", "message"],
              [[r["id"], r["status"], "-" if r["exit_code"] is None else str(r["exit_code"]),
                (r["message"] or "-")[:200]] for r in excluded])


def _method_section(doc: Doc, res: GridResults) -> None:
    fam, design = res.family, res.design
    items = [
        "Final validation loss: the trainer's last evaluation on the fixed validation windows, in nats per token.",
        "Pairing: a cell's seed sets its initialisation, its batches and its validation windows; variants are "
        "compared seed by seed (variant minus reference at the same axis point), on the seeds both finished. "
        "Grids may not override `train.seed`, `train.data_seed` or `train.init_seed`, so pairs stay pairs.",
        f"Family: the grid's {fam.size} comparison(s) (every non-reference variant at every axis point) share one "
        f"error budget of {pct(1 - stats.LEVEL)}. Bonferroni: each comparison gets {pct(fam.comparison_alpha)} "
        "(two-sided), so the chance that any interval in the grid misses its true difference is at most "
        f"{pct(1 - stats.LEVEL)}, whatever the correlation between comparisons (they share the reference). Every "
        "verdict read off intervals that all cover is right, so this bounds the chance of any wrong verdict.",
        f"Interval: mean ± t · sd / √n over the n paired differences (Student t, n−1 degrees of freedom), at "
        f"{pct(1 - fam.look_alpha)} per comparison. The unadjusted column is the plain 95% interval, "
        "for reading one comparison alone; verdicts never use it.",
        "Assumptions of the error bound: the paired differences are independent across seeds (each seed its own "
        "run) and close enough to normal for the t interval. Skew breaks it: in the project's simulation with "
        "right-skewed (lognormal, σ 0.5) paired differences, no true difference and 6 comparisons, the "
        f"family error was {SKEW_FAMILY_ERROR} instead of ≤ 5%, nearly all false 'better' (tests/"
        "test_divergence_verdicts.py). A few seeds far from the rest (see the curves) are the warning sign; the "
        "fragile mark shows verdicts that rest on one seed.",
        f"Verdicts, at the smallest effect that matters δ = {design.smallest_effect:g} nats/token (grid key "
        "`smallest_effect`): **better** when the whole interval is below 0, **worse** when above 0, **equivalent** "
        "when it lies inside −δ..+δ (two one-sided tests, Schuirmann 1987; this wins when both hold, and the note "
        "says 'lower by less than the smallest effect'), **undecided** otherwise. Undecided is not 'no difference'.",
    ]
    items += lever_items(res.levers)
    if design.schedule is not None:
        sch = design.schedule
        items.append(
            f"Seeds until decided: round 1 trains {sch.first} seeds per group; each further round adds {sch.step} "
            "seed(s) to every undecided variant and to the reference (and null control) at its axis point, until "
            f"every comparison is decided or {sch.most} seeds are reached (looks after "
            f"{', '.join(map(str, sch.looks()))} pairs). Looking several times would inflate the error, so every "
            f"look uses one nominal level ({pct(fam.look_alpha)}, Pocock 1977) chosen so that the intervals of all "
            "looks hold at once (repeated confidence intervals, Jennison & Turnbull 2000, ch. 9); it is computed by "
            "simulating the looks' t statistics, whose joint law under normal differences depends on neither mean "
            "nor sd. A comparison's verdict is final once decided: it gets no more seeds.")
    if res.tuning is not None:
        t = res.tuning.tuning
        items.append(
            f"Tuning (grid key `tune`): each variant's `{t.key}` was chosen in stage 1 (see Tuning, which states the "
            "rule: the lowest mean among values whose next larger value never diverged) on tuning seeds "
            f"{', '.join(map(str, t.seeds))}, disjoint from the verdict seeds: choosing and measuring on the same "
            "seeds would bias the verdict towards the variant whose noise flattered it (the winner's curse). "
            "Fairness matching was done before tuning, on the untuned configs. The verdicts compare each variant "
            "at its own chosen value; the exploratory table at shared values is outside the family."
            + (" With `tune.rungs: first` only rung 1 was tuned; every other rung ran at its variant's rung-1 "
               "value." if t.carried else ""))
    items += [
        f"Seeds needed: the pairs at which a paired t test at the level the verdicts use ({pct(fam.look_alpha)}, "
        "the look's level) reaches 80% power, both to call better/worse if the true difference is at least δ in "
        "size and to call equivalent if it is 0 (the larger is shown; for a true difference between 0 and δ the "
        "chance is lower, and the undecided notes say how much at δ/2), "
        f"from the power solver of statsmodels (TTestPower). The sd is the {pct(stats.SD_BOUND_CONFIDENCE)} upper "
        "confidence bound of the paired sd (chi-square), not its estimate, and never the observed difference "
        "(observed power only restates the p-value). 'Detectable': the smallest true difference these pairs find "
        f"with 80% power, same sd bound. '>{stats.MAX_SEEDS}': beyond {stats.MAX_SEEDS} seeds.",
        "Divergence is an outcome, counted per group. Where the compared groups diverged on the same seeds (or "
        "on none), the verdict uses the seeds both finished with a loss. Where they diverged on different seeds, "
        "dropping those seeds would hide the variant's worst runs, so the verdict comes from a worst-rank "
        "composite (Lachin 1999, Stat. Med. 18:1867): on every seed both finished, a diverged cell ranks worse "
        "than every finished loss (only the variant diverged: +∞; only the reference: −∞; both: left out), "
        "tested by the exact Wilcoxon signed-rank test (Wilcoxon 1945), one-sided at half the look's two-sided "
        "level. It gives better or worse, never equivalent (a diverged run has no loss to put inside a band), "
        "and no loss is imputed. When no sign pattern of so few pairs could reach that level the verdict is "
        "undecided (divergence differs), with the counts and McNemar's exact test of them (McNemar 1947); "
        "more seeds can decide it.",
        "Fragile: the verdict is computed again with each seed left out in turn (same level, same rule); a "
        "decided verdict that changes for some left-out seed is marked fragile.",
        f"Curves: {BAND}, over the evaluations every seed of a group has.",
        f"Fairness: {_match_text(res.match)}.",
    ]
    if fam.null:
        items.append(f"Null control: the reference again under init seed {NULL_INIT_OFFSET:,d} + seed and the same "
                     "data seeds (a true null), shown apart from the family.")
    doc.h(2, "Method")
    doc.ul(items)


def _match_text(match: str) -> str:
    return {
        "none": "none (variants as configured)",
        "params": f"parameters matched by adjusting model.mlp_expansion (non-embedding params within "
                  f"{MATCH_TOLERANCE:.0%})",
        "flops": "training FLOPs matched by adjusting train.tokens",
    }.get(match, match)
