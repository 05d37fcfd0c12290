"""Where and how a run computes: device, thread count, precision, C++ kernels or torch ops.

Each is resolved from ``cfg.runtime`` before anything touches the run dir, so a bad value
fails with a ConfigError naming the key and leaves earlier records alone. What was resolved
(and why, for precision) goes into env.json.
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import torch

from blockyard.config import RuntimeConfig
from blockyard.errors import ConfigError


@dataclass(frozen=True)
class Runtime:
    device: torch.device
    threads: int
    precision: str  # effective: fp32, bf16 or bf16_emulated
    precision_reason: str
    kernels: str  # runtime.kernels as requested; passed to build_model (no process-wide default)
    kernels_info: dict[str, Any]  # what it resolves to and the kernels' build status, for env.json
    compile: bool = False  # runtime.compile: torch.compile the model for training (blockyard.train.compile)

    @contextlib.contextmanager
    def autocast(self) -> Iterator[None]:
        """bf16 autocast around the forward pass (with :meth:`numerics` for bf16_emulated), or nothing for fp32."""
        if self.precision == "fp32":
            yield
            return
        with self.numerics(), torch.autocast(device_type=self.device.type, dtype=torch.bfloat16):
            yield

    def numerics(self) -> contextlib.AbstractContextManager:
        """For bf16_emulated the bf16 GEMM emulation, which must also cover ``backward()``; else nothing."""
        if self.precision == "bf16_emulated":
            from blockyard.train.bf16_emulation import emulated_bf16_gemms

            return emulated_bf16_gemms()
        return contextlib.nullcontext()

    def facts(self) -> dict[str, Any]:
        """The env.json entries of this runtime."""
        return {
            "device": str(self.device),
            "threads": self.threads,
            "precision": self.precision,
            "precision_reason": self.precision_reason,
            "kernels": self.kernels_info,
        }


def resolve_device(name: str) -> torch.device:
    """``runtime.device`` as a torch device that exists here (cpu, or cuda[:N] where present)."""
    allowed = "cpu, or cuda / cuda:N where a CUDA device is present"
    try:
        device = torch.device(name)
    except (RuntimeError, ValueError):
        raise ConfigError("runtime.device", f"{name!r} is not a torch device (allowed: {allowed})") from None
    if device.type == "cpu":
        return device
    if device.type == "cuda":
        if not torch.cuda.is_available():
            raise ConfigError("runtime.device", f"{name!r}: no CUDA device is available here (allowed: cpu)")
        if device.index is not None and device.index >= torch.cuda.device_count():
            raise ConfigError("runtime.device", f"{name!r}: only {torch.cuda.device_count()} CUDA device(s) here")
        return device
    raise ConfigError("runtime.device", f"{name!r} is not supported (allowed: {allowed})")


def resolve_threads(threads: int) -> int:
    """``runtime.threads``, 0 meaning every core of this machine."""
    return threads if threads > 0 else (os.cpu_count() or 1)


def _cpu_flags() -> set[str] | None:
    try:
        for raw in Path("/proc/cpuinfo").read_text().splitlines():
            key, _, value = raw.partition(":")
            if key.strip() == "flags":
                return set(value.split())
    except OSError:
        pass
    return None


def _bf16_matmul_works(device: torch.device) -> bool:
    # Fixed operands (no RNG draw, so the check cannot shift the run's random stream).
    a = (torch.arange(64, dtype=torch.float32, device=device).reshape(8, 8) % 7) / 7
    try:
        got = (a.bfloat16() @ a.bfloat16()).float()
    except RuntimeError:
        return False
    return bool(torch.allclose(got, a @ a, rtol=2e-2, atol=2e-2))


def cpu_bf16_support() -> tuple[bool, str]:
    """Whether this CPU computes bf16 natively (AVX512-BF16 or AMX), and why (for env.json).

    Without those instructions torch emulates bf16, which is slower than fp32 and so defeats
    the point (common practice, no source).
    """
    capability = torch.backends.cpu.get_cpu_capability()
    flags = _cpu_flags()
    if flags is not None:
        native = sorted(flags & {"avx512_bf16", "amx_bf16"})
        if not native:
            return False, f"CPU capability {capability} lacks avx512_bf16 / amx_bf16"
        if not _bf16_matmul_works(torch.device("cpu")):
            return False, f"CPU has {', '.join(native)} but a bf16 matmul test failed"
        return True, f"CPU capability {capability} with {', '.join(native)}"
    if capability == "DEFAULT" or not _bf16_matmul_works(torch.device("cpu")):
        return False, f"CPU capability {capability}, no bf16 support found"
    return True, f"CPU capability {capability} (instruction flags unknown), bf16 matmul test passed"


EMULATION_REASON = ("requested: bf16 autocast with its matmuls and convolutions computed in fp32 on bf16 values "
                    "and rounded once (blockyard.train.bf16_emulation): bf16 numerics, not bf16 speed")


def resolve_precision(requested: str, device: torch.device) -> tuple[str, str, str | None]:
    """(effective precision, reason, warning or None) for ``runtime.precision`` on ``device``."""
    if requested == "fp32":
        return "fp32", "requested", None
    if requested == "bf16_emulated":
        return "bf16_emulated", EMULATION_REASON, None
    if device.type == "cuda":
        ok, why = torch.cuda.is_bf16_supported(), f"CUDA device {torch.cuda.get_device_name(device)}"
    else:
        ok, why = cpu_bf16_support()
    if ok:
        return "bf16", why, None
    warning = (f"runtime.precision: bf16 unsupported here ({why}); using fp32 "
               "(bf16_emulated gives bf16 numerics at about 0.6x fp32 speed)")
    return "fp32", f"bf16 requested but unsupported: {why}", warning


def describe_kernels(name: str) -> dict[str, Any]:
    """What ``runtime.kernels`` resolves to here (builds the kernels on first use).

    ``compiled`` where the kernels do not build is a ConfigError at start-up, not an error in the
    middle of the first forward pass.
    """
    from blockyard.kernels import build, kernels_info

    if name == "compiled" and build.load_kernels() is None:
        why = str(build.build_status().get("error") or "unknown").strip().splitlines() or ["unknown"]
        raise ConfigError("runtime.kernels", f"compiled: the C++ kernels do not build here ({why[0]}); "
                          "write auto (falls back to torch ops) or torch")
    return dict(kernels_info(name))


def resolve_runtime(cfg: RuntimeConfig) -> tuple[Runtime, list[str]]:
    """The Runtime for ``cfg`` and any warnings to show; changes no process-wide state."""
    device = resolve_device(cfg.device)
    precision, reason, warning = resolve_precision(cfg.precision, device)
    runtime = Runtime(device=device, threads=resolve_threads(cfg.threads), precision=precision,
                      precision_reason=reason, kernels=cfg.kernels, kernels_info=describe_kernels(cfg.kernels),
                      compile=cfg.compile)
    return runtime, [warning] if warning else []
