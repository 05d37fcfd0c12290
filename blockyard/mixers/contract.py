"""The mixer contract as pure checks, each returning a result with the figure it measured.

One definition, used by the parametrised test over every registered mixer
(``tests/test_mixers_contract.py``), by ``blockyard check`` and by the gate in front of training
(``blockyard/check.py``). The properties are those of an autoregressive model: output t is a
function of inputs <= t, and generating token by token computes the same function (common
practice, no source). Checked:

- ``causality``: changing input t changes no output before t (every t is tried, in one batched
  forward); the first output position that sees a later input is reported. It proves nothing
  when no input moves any output at all (outputs that depend on no input): that fails too. An
  input that moves nothing inside the window is fine (a one-step delay's last input).
- ``mixes_in_time``: some output s > t moves when input t moves; a block where none does is
  token-local (a per-position map), which an ablation would silently read as "no mixing". It
  fails unless the class declares ``token_local = True`` (a deliberate no-mixing baseline).
- ``step``: the step path, token by token from ``init_state``, reproduces ``forward``; the
  largest difference and its position are reported.
- ``gradients``: a backward pass gives every parameter a finite, non-zero gradient.
- ``determinism``: two forwards of the same input are equal.
- ``state``: step states are frozen dataclasses whose tensors are batch-first, and a step never
  changes the state it was given (values and torch's in-place version counters).
- ``residual_out``: the mixer declares the projection(s) writing into the residual stream; a
  warning, not a failure, when none is marked (the mark only scales that projection's init).
- ``params`` / ``state_bytes`` / ``flops``: the analytic cost hooks against the counted
  parameters, the measured state tensors, and sanity (finite, never falling with context);
  "n/a" with the measured figure where a plugin gives no formula.

Tolerances are relative to the largest output magnitude (fp32 arithmetic: the same values
computed in a different order differ by ~1e-7 relative).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Collection, Iterator
from typing import Any, Protocol, runtime_checkable

import torch
from torch import nn

from blockyard.mixers.base import Mixer, gives_hook, is_residual_out, state_nbytes

# Largest output change before t, relative to the output scale, that still counts as causal.
LEAK_TOL = 1e-6
# Largest |step - forward|, relative to max(1, output scale).
STEP_TOL = 1e-5
# Smallest change an input must make to some output at or after it, relative to the output scale.
EFFECT_TOL = 1e-4
# Every check of one mixer, of an assembled model, and the ones the training gate runs (seconds).
MIXER_CHECKS = ("causality", "mixes_in_time", "step", "gradients", "determinism", "state", "residual_out", "params",
                "state_bytes", "flops")
MODEL_CHECKS = ("causality", "step", "gradients", "determinism")
FAST_CHECKS = ("causality", "mixes_in_time", "step")
# Sizes of the contract run: long enough for blocked paths, short enough to stay cheap.
SEQ_LEN = 40
BATCH = 2

Forward = Callable[[torch.Tensor], torch.Tensor]
StepFn = Callable[[torch.Tensor, Any], tuple[torch.Tensor, Any]]


@runtime_checkable
class Steps(Protocol):
    """The step path a mixer, and a model assembled from mixers, gives: a fresh state, then one token at a time."""

    def init_state(self, batch: int) -> Any: ...

    def step(self, x_t: torch.Tensor, state: Any) -> tuple[torch.Tensor, Any]: ...


@dataclasses.dataclass(frozen=True)
class CheckResult:
    """One check: passed (None: not applicable), the measured figure in words, and the figure itself."""

    check: str
    passed: bool | None
    figure: str
    value: float | None = None
    position: int | None = None  # causality: first leaking output; step: position of the largest difference
    source: int | None = None  # causality: the later input that output sees
    warning: bool = False  # passed, with something the user should know (an unmarked output projection)

    @property
    def status(self) -> str:
        if self.passed is None:
            return "n/a"
        return ("warn" if self.warning else "pass") if self.passed else "FAIL"


# ----------------------------------------------------------------------------- inputs


def mixer_inputs(width: int, seq_len: int = SEQ_LEN, batch: int = BATCH, seed: int = 1) -> torch.Tensor:
    return torch.randn(batch, seq_len, width, generator=torch.Generator().manual_seed(seed))


def perturb_features(seed: int = 7) -> Callable[[torch.Tensor, int], torch.Tensor]:
    """x with position t moved by 3 standard normals per feature (a large change in any block)."""

    def perturb(x: torch.Tensor, t: int) -> torch.Tensor:
        g = torch.Generator().manual_seed(seed + t)
        out = x.clone()
        out[:, t] += 3.0 * torch.randn(out[:, t].shape, generator=g)
        return out

    return perturb


def perturb_tokens(vocab: int) -> Callable[[torch.Tensor, int], torch.Tensor]:
    """tokens with position t replaced by the next token id."""

    def perturb(tokens: torch.Tensor, t: int) -> torch.Tensor:
        out = tokens.clone()
        out[:, t] = (out[:, t] + 1) % vocab
        return out

    return perturb


def run_steps(step: StepFn, state: Any, xs: torch.Tensor) -> tuple[torch.Tensor, list[Any]]:
    """Drive ``step`` over ``xs`` along dim 1: the stacked outputs and the state after each token."""
    outs, states = [], []
    for t in range(xs.shape[1]):
        y, state = step(xs[:, t], state)
        outs.append(y)
        states.append(state)
    return torch.stack(outs, dim=1), states


def state_tensors(state: Any, prefix: str = "state") -> Iterator[tuple[str, torch.Tensor]]:
    """(path, tensor) for every tensor in a state (dataclass, tuple, list or dict, nested)."""
    if isinstance(state, torch.Tensor):
        yield prefix, state
    elif dataclasses.is_dataclass(state) and not isinstance(state, type):
        for f in dataclasses.fields(state):
            yield from state_tensors(getattr(state, f.name), f"{prefix}.{f.name}")
    elif isinstance(state, (tuple, list)):
        for i, s in enumerate(state):
            yield from state_tensors(s, f"{prefix}[{i}]")
    elif isinstance(state, dict):
        for k, s in state.items():
            yield from state_tensors(s, f"{prefix}[{k!r}]")


def _scale(y: torch.Tensor) -> float:
    return float(y.detach().abs().max()) if y.numel() else 0.0


# ----------------------------------------------------------------------------- behaviour


@torch.no_grad()
def perturbation_effects(forward: Forward, x: torch.Tensor, perturb: Callable[[torch.Tensor, int], torch.Tensor]
                         ) -> tuple[torch.Tensor, float]:
    """moved[t, s]: the largest change of output s when input t is perturbed (every t in one batched
    forward), and the output scale (largest |output| of the unperturbed input)."""
    batch, seq = x.shape[:2]
    copies = torch.cat([x, *(perturb(x, t) for t in range(seq))])
    y = forward(copies)
    y = y.reshape(seq + 1, batch, seq, -1).float()
    base = y[0]
    return (y[1:] - base).abs().amax(dim=(1, 3)), _scale(base)


def _degenerate(name: str, scale: float) -> CheckResult | None:
    if scale == 0 or not math.isfinite(scale):
        return CheckResult(name, False, f"output is {'all zero' if scale == 0 else 'not finite'}", scale)
    return None


@torch.no_grad()
def check_causality(forward: Forward, x: torch.Tensor, perturb: Callable[[torch.Tensor, int], torch.Tensor]
                    ) -> CheckResult:
    """Perturb each position t of ``x`` (all in one batch) and find outputs before t that move."""
    seq = x.shape[1]
    moved, scale = perturbation_effects(forward, x, perturb)
    if bad := _degenerate("causality", scale):
        return bad
    leaks = torch.tril(moved > LEAK_TOL * scale, diagonal=-1)  # output s < input t
    if leaks.any():
        first_out = int(leaks.any(dim=0).nonzero()[0])
        src = int(leaks[:, first_out].nonzero()[0])
        value = float(moved[src, first_out]) / scale
        return CheckResult("causality", False, f"output {first_out} changes when input {src} does "
                           f"(by {value:.2g} x output scale; limit {LEAK_TOL:g})", value, first_out, src)
    effect = float(torch.triu(moved).max()) / scale  # the largest change at s >= t, over every input t
    if effect <= EFFECT_TOL:
        return CheckResult("causality", False, f"no input changes any output (max change {effect:.2g} x output "
                           "scale): the outputs depend on no input, the check would prove nothing", effect)
    worst = float(torch.tril(moved, diagonal=-1).max()) / scale if seq > 1 else 0.0
    return CheckResult("causality", True, f"no output moves before its input ({seq} positions tried; largest "
                       f"change before t {worst:.2g} x output scale)", worst)


def is_token_local(cls: type) -> bool:
    """True when the mixer class declares itself token-local on purpose (``token_local = True``)."""
    return bool(getattr(cls, "token_local", False))


@torch.no_grad()
def check_mixes_in_time(forward: Forward, x: torch.Tensor, perturb: Callable[[torch.Tensor, int], torch.Tensor],
                        token_local: bool = False) -> CheckResult:
    """Some output s > t moves when input t moves (the block carries information forward in time).

    A block that declares ``token_local`` passes either way; one that declares it and mixes all the
    same passes with a warning (the declaration would mislabel it in reports).
    """
    moved, scale = perturbation_effects(forward, x, perturb)
    if bad := _degenerate("mixes_in_time", scale):
        return bad
    later = torch.triu(moved, diagonal=1)  # output s > input t
    value = float(later.max()) / scale if x.shape[1] > 1 else 0.0
    mixes = value > EFFECT_TOL
    if token_local:
        if mixes:
            return CheckResult("mixes_in_time", True, f"declared token_local, but a later output moves by "
                               f"{value:.2g} x output scale (drop the declaration?)", value, warning=True)
        return CheckResult("mixes_in_time", True, f"declared token_local: no output after t moves (max "
                           f"{value:.2g} x output scale); reports mark it", value)
    if not mixes:
        return CheckResult("mixes_in_time", False, f"no output after t moves when input t does (max {value:.2g} x "
                           f"output scale, limit {EFFECT_TOL:g}): a token-local block; set the class attribute "
                           "token_local = True if it is a no-mixing baseline on purpose", value)
    src, out = divmod(int(later.argmax()), later.shape[1])
    return CheckResult("mixes_in_time", True, f"output {out} moves by {value:.2g} x output scale when input {src} "
                       "does", value, out, src)


@torch.no_grad()
def check_step(forward: Forward, init_state: Any, step: StepFn, x: torch.Tensor) -> CheckResult:
    """Token-by-token ``step`` from ``init_state`` against ``forward`` on the whole sequence."""
    full = forward(x).float()
    stepped, _ = run_steps(step, init_state, x)
    scale = _scale(full)
    if scale < 1e-30:
        return CheckResult("step", False, "forward output is ~0: the comparison would prove nothing", scale)
    diff = (stepped.float() - full).abs()
    per_t = diff.reshape(*diff.shape[:2], -1).amax(dim=(0, 2))
    t = int(per_t.argmax())
    value = float(per_t[t])
    limit = STEP_TOL * max(1.0, scale)
    ok = bool(math.isfinite(value) and value <= limit)
    return CheckResult("step", ok, f"max |step - forward| {value:.2g} at t={t} (limit {limit:.2g})", value, t)


def check_gradients(module: nn.Module, forward: Forward, x: torch.Tensor) -> CheckResult:
    """Backward of a random weighting of the output: every parameter (and a float input) gets a finite,
    non-zero gradient."""
    module.zero_grad(set_to_none=True)
    x = x.detach().clone().requires_grad_(x.is_floating_point())
    y = forward(x)
    weights = torch.randn(y.shape, generator=torch.Generator().manual_seed(2))
    (y.float() * weights).sum().backward()
    problems = []
    if x.requires_grad and (x.grad is None or not torch.isfinite(x.grad).all() or x.grad.abs().sum() == 0):
        problems.append("input: no finite non-zero gradient")
    params = list(module.named_parameters())
    for name, p in params:
        if p.grad is None:
            problems.append(f"{name}: no gradient (unused parameter?)")
        elif not torch.isfinite(p.grad).all():
            problems.append(f"{name}: non-finite gradient")
        elif p.grad.abs().sum() == 0:
            problems.append(f"{name}: all-zero gradient")
    module.zero_grad(set_to_none=True)
    if problems:
        more = f" (+{len(problems) - 1} more)" if len(problems) > 1 else ""
        return CheckResult("gradients", False, problems[0] + more, float(len(problems)))
    return CheckResult("gradients", True, f"{len(params)} parameter tensors, all finite and non-zero", 0.0)


@torch.no_grad()
def check_determinism(forward: Forward, x: torch.Tensor) -> CheckResult:
    diff = float((forward(x).float() - forward(x).float()).abs().max())
    return CheckResult("determinism", diff == 0.0, f"two forwards differ by {diff:.2g}", diff)


def is_frozen_dataclass(obj: object) -> bool:
    """Whether ``obj`` is an instance of a dataclass declared ``frozen=True``."""
    params = getattr(obj, "__dataclass_params__", None)  # what dataclasses sets on the class it makes
    return dataclasses.is_dataclass(obj) and not isinstance(obj, type) and bool(params is not None and params.frozen)


@torch.no_grad()
def check_state(mixer: Mixer, x: torch.Tensor) -> CheckResult:
    """States are frozen dataclasses of batch-first tensors, and ``step`` leaves its input state as it was."""
    for batch in (1, 3):
        for path, tensor in state_tensors(mixer.init_state(batch)):
            if tensor.dim() == 0 or tensor.shape[0] != batch:
                return CheckResult("state", False, f"{path} has shape {tuple(tensor.shape)} for batch {batch}: "
                                   "state tensors are batch-first")
    state = mixer.init_state(x.shape[0])
    for t in range(x.shape[1]):
        if not is_frozen_dataclass(state):
            return CheckResult("state", False, f"the state before token {t} is a {type(state).__name__}, "
                               "not a frozen dataclass", position=t)
        before = [(path, tensor, tensor._version, tensor.clone()) for path, tensor in state_tensors(state)]
        _, new_state = mixer.step(x[:, t], state)
        for path, tensor, version, copy in before:
            if tensor._version != version or not torch.equal(tensor, copy):
                return CheckResult("state", False, f"step {t} changed {path} of the state it was given "
                                   "(in-place update)", position=t)
        for path, tensor in state_tensors(new_state):
            if tensor.dim() == 0 or tensor.shape[0] != x.shape[0]:
                return CheckResult("state", False, f"after step {t}, {path} has shape {tuple(tensor.shape)}: "
                                   "state tensors are batch-first", position=t)
        state = new_state
    n = sum(1 for _ in state_tensors(state))
    return CheckResult("state", True, f"{n} tensor(s), batch-first, none changed by {x.shape[1]} steps", float(n))


#: What marking the output projection changes (check's warning row, train's note).
RESIDUAL_OUT_EFFECT = ("the mark draws the output projection's initial weights with std init_std / sqrt(2 x depth) "
                       "instead of init_std (Radford et al. 2019, sec. 2.3), so the residual stream's variance "
                       "does not grow with depth; unmarked, it trains with the unscaled init")


def check_residual_out(mixer: Mixer) -> CheckResult:
    """A warning, not a failure, when no module is marked: the block trains either way."""
    names = [name for name, m in mixer.named_modules() if is_residual_out(m)]
    if not names:
        return CheckResult("residual_out", True, "no module marked residual_out (mark the output projection "
                           f"with blockyard.mixers.mark_residual_out): {RESIDUAL_OUT_EFFECT}", 0.0, warning=True)
    return CheckResult("residual_out", True, f"marked: {', '.join(names)}", float(len(names)))


# ----------------------------------------------------------------------------- cost hooks


def check_param_count(mixer: Mixer) -> CheckResult:
    cls, counted = type(mixer), sum(p.numel() for p in mixer.parameters())
    if not gives_hook(cls, "param_count"):
        return CheckResult("params", None, f"no formula; counted {counted:,d} (the cost model counts them)",
                           float(counted))
    analytic = int(cls.param_count(mixer.width, mixer.options))
    return CheckResult("params", analytic == counted, f"formula {analytic:,d}, counted {counted:,d}",
                       float(analytic - counted))


@torch.no_grad()
def check_state_bytes(mixer: Mixer, x: torch.Tensor) -> CheckResult:
    """``state_bytes`` after 1, 5 and all tokens of ``x`` against the bytes of the real states."""
    cls, batch = type(mixer), x.shape[0]
    _, states = run_steps(mixer.step, mixer.init_state(batch), x)
    lengths = sorted({1, min(5, len(states)), len(states)})
    measured = {n: state_nbytes(states[n - 1]) for n in lengths}
    if not gives_hook(cls, "state_bytes"):
        return CheckResult("state_bytes", None, f"no formula; measured {measured[lengths[-1]]:,d} B after "
                           f"{lengths[-1]} tokens, batch {batch}", float(measured[lengths[-1]]))
    for n in lengths:
        analytic = int(cls.state_bytes(mixer.width, mixer.options, n, batch=batch))
        if analytic != measured[n]:
            return CheckResult("state_bytes", False, f"after {n} tokens: formula {analytic:,d} B, state holds "
                               f"{measured[n]:,d} B", float(analytic - measured[n]), n)
    return CheckResult("state_bytes", True, f"formula = measured at {', '.join(map(str, lengths))} tokens "
                       f"({measured[lengths[-1]]:,d} B at {lengths[-1]})", 0.0)


def check_flops(cls: type[Mixer], width: int, options: Any) -> CheckResult:
    """The analytic extra FLOPs: finite, >= 0, never falling as the context grows (more context never
    makes a token cheaper to train on: common practice, no source)."""
    if not gives_hook(cls, "extra_flops_per_token"):
        return CheckResult("flops", None, "no formula (the cost model measures FLOPs with torch's counter)")
    contexts = (1, 16, 256, 4096)
    flops = [float(cls.extra_flops_per_token(width, options, n)) for n in contexts]
    ok = all(f >= 0 and math.isfinite(f) for f in flops) and flops == sorted(flops)
    return CheckResult("flops", ok, "extra FLOPs/token at seq_len " + ", ".join(
        f"{n}: {f:.3g}" for n, f in zip(contexts, flops, strict=True)))


# ----------------------------------------------------------------------------- whole runs


def build_mixer(cls: type[Mixer], width: int, options: Any, seed: int = 0) -> Mixer:
    """A mixer as the contract checks it: seeded, its special parameters initialised."""
    torch.manual_seed(seed)
    mixer = cls(width, options, layer=0, depth=1)
    mixer.reset_special_parameters()
    return mixer


def mixer_contract(cls: type[Mixer], width: int, options: Any, *, seq_len: int = SEQ_LEN, batch: int = BATCH,
                   checks: Collection[str] = MIXER_CHECKS) -> list[CheckResult]:
    """The named ``checks`` (default: all of ``MIXER_CHECKS``) on one mixer of ``cls`` at ``width``.

    A check that raises is a failed check with the exception as its figure.
    """
    mixer = build_mixer(cls, width, options)
    x = mixer_inputs(width, seq_len, batch)
    run: dict[str, Callable[[], CheckResult]] = {
        "causality": lambda: check_causality(mixer, x, perturb_features()),
        "mixes_in_time": lambda: check_mixes_in_time(mixer, x, perturb_features(), is_token_local(cls)),
        "step": lambda: check_step(mixer, mixer.init_state(batch), mixer.step, x),
        "gradients": lambda: check_gradients(mixer, mixer, x),
        "determinism": lambda: check_determinism(mixer, x),
        "state": lambda: check_state(mixer, x),
        "residual_out": lambda: check_residual_out(mixer),
        "params": lambda: check_param_count(mixer),
        "state_bytes": lambda: check_state_bytes(mixer, x),
        "flops": lambda: check_flops(cls, width, options),
    }
    return [_guarded(name, run[name]) for name in checks]


def model_contract(model: nn.Module, vocab: int, *, seq_len: int = 32, batch: int = BATCH,
                   checks: Collection[str] = MODEL_CHECKS) -> list[CheckResult]:
    """Causality, step == forward, gradients and determinism of an assembled model (token ids in)."""
    if not isinstance(model, Steps):
        raise TypeError(f"{type(model).__name__} has no step path (init_state and step)")
    tokens = torch.randint(0, vocab, (batch, seq_len), generator=torch.Generator().manual_seed(3))
    was_training = model.training
    model.eval()
    try:
        run: dict[str, Callable[[], CheckResult]] = {
            "causality": lambda: check_causality(model, tokens, perturb_tokens(vocab)),
            "step": lambda: check_step(model, model.init_state(batch), model.step, tokens),
            "gradients": lambda: check_gradients(model, model, tokens),
            "determinism": lambda: check_determinism(model, tokens),
        }
        return [_guarded(name, run[name]) for name in checks]
    finally:
        model.train(was_training)


def _guarded(name: str, fn: Callable[[], CheckResult]) -> CheckResult:
    try:
        return fn()
    except Exception as e:  # a mixer that crashes under a check fails that check, with the reason
        first = str(e).strip().splitlines()[0] if str(e).strip() else ""
        return CheckResult(name, False, f"raised {e.__class__.__name__}{': ' + first[:200] if first else ''}")
