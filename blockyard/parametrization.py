"""Width scaling of the maximal update parametrization, muP (Yang et al. 2022, arXiv:2203.03466).

Under ``model.parametrization: mup`` the init, the Adam learning rate of each parameter and the
output multiplier depend on width so that a learning rate tuned at one width stays near-optimal
at others (their Table 3, Adam column; quoted from memory). Everything is relative to
``model.base_width``: at that width mup and standard are the same model.

The one rule that classifies a parameter: compare its shape with the same parameter of the model
built at the base width. A dimension "scales" when the two differ. The fan-in dimension is dim 1
of every matrix (``nn.Linear`` (out, in), torch's LSTM (4H, in), block-diagonal (blocks, in, out))
except embedding tables, whose input is a one-hot over the vocabulary (fan-in = dim 0).

    role    what scales                       examples                               init std   Adam lr
    fixed   nothing                           (none today)                           x 1        x 1
    vector  one dimension, not the fan-in     norm gains, biases, embeddings,        x 1        x 1
            (Table 3's "input weights &       per-channel decays and convolutions,
            all biases")                      gate blocks when their number scales
    hidden  the fan-in and another dimension  every projection inside a block        x r^-1/2   x 1/r
    output  the fan-in only (width -> fixed)  (none inside blocks today)             x 1/r      x 1/r
    readout the head (tied or not)            logits multiplied by base/width        x 1        x 1

with r = fan_in / base_fan_in. The readout uses Table 3's equivalent multiplier form (Yang et al.
2022 note that scaling a weight by c, its Adam lr by c and its multiplier by 1/c leaves training
unchanged), because a tied head shares its matrix with the input embedding. The init factor
applies to weights the backbone initialises with the width-free ``model.init_std``; mixers that
initialise their own matrices already use a std proportional to fan_in^-1/2 (LeCun normal, torch's
LSTM), which is muP's hidden scaling. Attention logits use 1/head_dim instead of 1/sqrt(head_dim)
(Yang et al. 2022, sec. 4, from memory), relative to the base head dim (``Mixer.use_base_width``).

muP is about width only: changing depth between sizes is not covered (common practice, no source).
"""

from __future__ import annotations

import dataclasses

ROLES = ("fixed", "vector", "hidden", "output", "readout")


@dataclasses.dataclass(frozen=True)
class ParamScaling:
    """How one parameter scales with width: its role, fan-in ratio r and the two multipliers."""

    role: str
    fan_in_ratio: float
    init_mult: float
    lr_mult: float


def classify(shape: tuple[int, ...], base_shape: tuple[int, ...], *, fan_in_dim: int = 1) -> str:
    """The role of a parameter of ``shape`` whose base-width twin has ``base_shape`` (see the module table)."""
    if len(shape) != len(base_shape):
        raise ValueError(f"shape {shape} and base shape {base_shape} differ in rank")
    scales = [a != b for a, b in zip(shape, base_shape, strict=True)]
    if len(shape) < 2:
        return "vector" if any(scales) else "fixed"
    fan_in = scales[fan_in_dim]
    other = any(s for i, s in enumerate(scales) if i != fan_in_dim)
    if fan_in and other:
        return "hidden"
    if fan_in:
        return "output"
    return "vector" if other else "fixed"


def scaling(
    shape: tuple[int, ...], base_shape: tuple[int, ...], *, fan_in_dim: int = 1, readout: bool = False
) -> ParamScaling:
    """The :class:`ParamScaling` of one parameter; ``readout`` marks the head (multiplier form)."""
    role = "readout" if readout else classify(shape, base_shape, fan_in_dim=fan_in_dim)
    if role not in ("hidden", "output"):
        return ParamScaling(role, 1.0, 1.0, 1.0)
    r = shape[fan_in_dim] / base_shape[fan_in_dim]
    init_mult = r**-0.5 if role == "hidden" else 1.0 / r
    return ParamScaling(role, r, init_mult, 1.0 / r)


def readout_multiplier(width: int, base_width: int) -> float:
    """muP's output multiplier relative to the base: base_width / width (1 at the base width)."""
    return base_width / width
