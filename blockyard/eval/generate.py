"""Text generation through each mixer's ``step`` path, and loading a trained run for it.

Generation never calls the full-sequence ``forward``: the prompt is prefilled by stepping it one
token at a time, so what is exercised is exactly the state path (KV cache, ring buffer, recurrent
state + convolution tail) whose size ``blockyard.cost.state_bytes`` predicts. A test checks the
step logits against a full-forward recomputation of the same tokens.
"""

from __future__ import annotations

import dataclasses
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

import torch

from blockyard.errors import UserError

if TYPE_CHECKING:
    from blockyard.config import Config
    from blockyard.data import TokenData
    from blockyard.model import LanguageModel


@dataclasses.dataclass(frozen=True)
class Generation:
    """The prompt plus the generated tokens, and the logits the step path produced on the way."""

    tokens: torch.Tensor  # (B, T_prompt + n) int64
    logits: torch.Tensor  # (B, T_prompt + n, vocab): logits[:, t] predicts token t + 1 (as model(tokens) would)
    states: list[Any]  # the step states after every token of ``tokens``


def filter_top_k(logits: torch.Tensor, k: int) -> torch.Tensor:
    """Logits with all but the ``k`` largest per row set to -inf (k <= 0 or >= vocab: unchanged)."""
    if k <= 0 or k >= logits.shape[-1]:
        return logits
    kth = torch.topk(logits, k, dim=-1).values[..., -1:]
    return logits.masked_fill(logits < kth, float("-inf"))


def sample_next(
    logits: torch.Tensor, *, temperature: float, top_k: int = 0, generator: torch.Generator | None = None
) -> torch.Tensor:
    """Next tokens ``(B,)`` from logits ``(B, V)``: argmax at temperature 0, else softmax(logits / T) sampling."""
    if temperature < 0:
        raise UserError(f"--temperature {temperature}: must be >= 0")
    if temperature == 0:
        return logits.argmax(dim=-1)
    probs = torch.softmax(filter_top_k(logits.float() / temperature, top_k), dim=-1)
    return torch.multinomial(probs, 1, generator=generator).squeeze(-1)


@torch.no_grad()
def prefill(model: LanguageModel, prompt: torch.Tensor, states: list[Any]) -> tuple[torch.Tensor, list[Any]]:
    """Step the prompt ``(B, T)`` through the model; returns logits ``(B, T, V)`` and the states after it."""
    logits = []
    for t in range(prompt.shape[1]):
        out, states = model.step(prompt[:, t], states)
        logits.append(out)
    return torch.stack(logits, dim=1), states


@torch.no_grad()
def generate(
    model: LanguageModel,
    prompt: torch.Tensor,
    n_tokens: int,
    *,
    temperature: float = 1.0,
    top_k: int = 0,
    seed: int | None = None,
) -> Generation:
    """Extend ``prompt`` ``(B, T >= 1)`` by ``n_tokens`` sampled tokens, using the step path only."""
    if prompt.ndim != 2 or prompt.shape[1] < 1:
        raise UserError("the prompt must hold at least one token")
    generator = None
    if seed is not None:
        generator = torch.Generator(device=prompt.device)
        generator.manual_seed(seed)
    states = model.init_state(prompt.shape[0], device=prompt.device)
    logits, states = prefill(model, prompt, states)
    all_logits = [logits]
    tokens = [prompt]
    last = logits[:, -1]
    for _ in range(n_tokens):
        nxt = sample_next(last, temperature=temperature, top_k=top_k, generator=generator)
        tokens.append(nxt[:, None])
        # Feeding the last sampled token too costs one step but leaves the states (and logits)
        # covering every returned token, ready for a continuation.
        last, states = model.step(nxt, states)
        all_logits.append(last[:, None])
    return Generation(tokens=torch.cat(tokens, dim=1), logits=torch.cat(all_logits, dim=1), states=states)


# ----------------------------------------------------------------------------- trained runs


@dataclasses.dataclass
class LoadedRun:
    """A trained run ready for inference: its config, data (tokenizer, windows) and model at ``step``."""

    path: Path
    cfg: Config
    data: TokenData
    model: LanguageModel
    step: int


def read_run_config(run_dir: Path) -> Any:
    """The resolved config a run dir was trained with (its ``config.yaml``)."""
    from blockyard.config import config_from_dict, read_yaml, saved_config_data

    if not run_dir.is_dir():
        raise UserError(f"{run_dir}: no such run dir")
    path = run_dir / "config.yaml"
    if not path.is_file():
        raise UserError(f"{run_dir}: not a run dir (no config.yaml)")
    return config_from_dict(saved_config_data(read_yaml(path)))


def newest_checkpoint(run_dir: Path, cfg_hash: str) -> Any:
    """The newest readable checkpoint of the run (through the trainer's reader); read-only.

    Unlike resuming, inference never renames a broken checkpoint: it skips it with a warning.
    """
    from blockyard.train.checkpoint import list_checkpoints, read_checkpoint

    found = list_checkpoints(run_dir / "checkpoints")
    for _step, path in reversed(found):
        try:
            return read_checkpoint(path, cfg_hash)
        except ValueError as e:
            print(f"warning: checkpoint {path} is {e}; trying the previous one", file=sys.stderr)
    raise UserError(f"{run_dir}: no readable checkpoint in {run_dir / 'checkpoints'}"
                    + ("" if found else " (has it trained past its first checkpoint?)"))


def load_run(run_dir: str | Path) -> LoadedRun:
    """Config, data and model of ``run_dir`` with the weights of its newest checkpoint, on the CPU, in eval mode."""
    from blockyard.config import config_hash
    from blockyard.data import load_data
    from blockyard.model import build_model

    run_dir = Path(run_dir)
    cfg = read_run_config(run_dir)
    ckpt = newest_checkpoint(run_dir, config_hash(cfg))
    data = load_data(cfg)
    model = build_model(cfg.model, data.vocab_size)
    model.load_state_dict(ckpt.state["model"])
    model.eval()
    return LoadedRun(path=run_dir, cfg=cfg, data=data, model=model, step=ckpt.step)


def encode_prompt(tokenizer: Any, prompt: str) -> torch.Tensor:
    """``prompt`` as a (1, T) id tensor; an empty or unencodable prompt is a UserError."""
    try:
        ids = tokenizer.encode(prompt)
    except ValueError as e:
        raise UserError(f"--prompt: cannot be encoded by this run's tokenizer ({e})") from None
    if len(ids) == 0:
        raise UserError("--prompt: must encode to at least one token")
    return torch.as_tensor(ids, dtype=torch.long).reshape(1, -1)


def sample_command(
    run_dir: str | Path, prompt: str, tokens: int, *, temperature: float, top_k: int, seed: int, threads: int = 1
) -> str:
    """``blockyard sample``: the prompt and its continuation as text, on ``threads`` torch threads
    (0 = torch's default; one by default: a batch-1 decode step is too small to share)."""
    if threads < 0:
        raise UserError(f"--threads {threads}: must be >= 0 (0 = torch's default)")
    if tokens < 0:
        raise UserError(f"--tokens {tokens}: must be >= 0")
    if top_k < 0:
        raise UserError(f"--top-k {top_k}: must be >= 0 (0 = no filter)")
    if temperature < 0:
        raise UserError(f"--temperature {temperature}: must be >= 0 (0 = argmax)")
    run = load_run(run_dir)
    ids = encode_prompt(run.data.tokenizer, prompt)
    before = torch.get_num_threads()
    if threads:
        torch.set_num_threads(threads)
    try:
        out = generate(run.model, ids, tokens, temperature=temperature, top_k=top_k, seed=seed)
    finally:
        torch.set_num_threads(before)
    return run.data.tokenizer.decode(out.tokens[0].tolist())
