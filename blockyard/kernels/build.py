"""Build and load the C++ kernels (``scan_cpu.cpp``, ``rglru_cpu.cpp``, ``conv_cpu.cpp``, ...) once per machine.

The kernel is compiled by ``torch.utils.cpp_extension.load`` into a build folder under
``$TORCH_EXTENSIONS_DIR`` if set, else ``$BLOCKYARD_CACHE/torch_ext``, else
``~/.cache/blockyard/torch_ext``. The folder and the operator namespace are named by a hash of the
source, the flags, the torch version and the machine, so a changed kernel never loads a stale
build and two builds never share a folder.

Concurrent first builds (several training processes of one grid) are serialised by an OS file
lock (``blockyard.fs.hold_lock``): the first process compiles, the others wait and then load the result.
The kernel of the OS releases that lock when its holder dies, unlike torch's own lock file, which
a killed build leaves behind and every later build would wait on forever; under our lock such a
leftover file is stale by construction and is removed.

Any failure (no compiler, no ninja, missing headers, a compile error) is recorded, not raised:
``load_kernels()`` returns None and ``build_status()`` says why, so the scan falls back to the
pure-PyTorch backend.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import platform
import shutil
import sys
import sysconfig
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import torch

from blockyard import fs

SOURCES = tuple(Path(__file__).with_name(name) for name in ("scan_cpu.cpp", "rglru_cpu.cpp", "conv_cpu.cpp",
                                                              "geglu_cpu.cpp", "rmsnorm_cpu.cpp"))
# Headers the sources include: part of the hash that names the build, not compiled on their own.
HEADERS = tuple(Path(__file__).with_name(name) for name in ("vecmath.h", "cpu_common.h"))
# -O3: the inner loops vectorise; -ffp-contract=off: a * h + b rounds twice (no fused multiply-add),
# as the sequential PyTorch reference does, so the forward matches it bit for bit; -fopenmp: the
# ATen parallel_for in the headers is OpenMP here, the same runtime as torch's. -O2 leaves the loops
# scalar with GCC 12 (measured 2-3x slower). No -march=native: a cached build must run on any machine
# of the architecture; the source picks AVX2 / AVX-512 at load time instead (target_clones), which
# measured as fast as -march=native. -fno-math-errno (errno is never read) makes sqrt one vector
# instruction, -fno-trapping-math (floating-point exception flags are never read) lets GCC compute
# both sides of a select: without them the RG-LRU loops stay scalar. Neither changes any rounding.
CFLAGS = ("-O3", "-ffp-contract=off", "-fno-math-errno", "-fno-trapping-math", "-fopenmp")
LDFLAGS = ("-fopenmp",)
LOCK_TIMEOUT_S = 900.0


def extension_root() -> Path:
    """Where extension builds live: $TORCH_EXTENSIONS_DIR, else $BLOCKYARD_CACHE/torch_ext, else ~/.cache."""
    if os.environ.get("TORCH_EXTENSIONS_DIR"):
        return Path(os.environ["TORCH_EXTENSIONS_DIR"])
    if os.environ.get("BLOCKYARD_CACHE"):
        return Path(os.environ["BLOCKYARD_CACHE"]) / "torch_ext"
    return Path.home() / ".cache" / "blockyard" / "torch_ext"


def extension_name() -> str:
    """Module (and operator namespace) name: a hash of everything that changes the binary."""
    digest = hashlib.sha256()
    for part in (
        *(source.read_bytes() for source in (*SOURCES, *HEADERS)),
        repr(CFLAGS).encode(),
        repr(LDFLAGS).encode(),
        torch.__version__.encode(),
        platform.machine().encode(),
        sys.version.encode(),
    ):
        digest.update(part)
        digest.update(b"\0")
    return f"blockyard_scan_{digest.hexdigest()[:12]}"


def find_ninja() -> str | None:
    """The ninja executable torch's loader needs: on PATH, or beside this Python (pip's ``ninja``)."""
    on_path = shutil.which("ninja")
    if on_path:
        return on_path
    beside = Path(sysconfig.get_path("scripts")) / "ninja"
    return str(beside) if beside.is_file() and os.access(beside, os.X_OK) else None


def find_compiler() -> str | None:
    """The C++ compiler torch's loader will call ($CXX, else c++)."""
    return shutil.which(os.environ.get("CXX", "c++"))


@contextlib.contextmanager
def _path_with(directory: str) -> Iterator[None]:
    """PATH with ``directory`` in front for the duration (torch runs ``ninja`` from PATH)."""
    old = os.environ.get("PATH", "")
    os.environ["PATH"] = directory + os.pathsep + old
    try:
        yield
    finally:
        os.environ["PATH"] = old


def _compile(name: str, build_dir: Path) -> None:
    """Compile (or find up to date) and load the kernel library; its operators land in ``torch.ops.<name>``."""
    from torch.utils import cpp_extension

    ninja = find_ninja()
    if ninja is None:
        raise RuntimeError("ninja not found (pip install ninja)")
    with _path_with(str(Path(ninja).parent)):
        cpp_extension.load(
            name=name,
            sources=[str(source) for source in SOURCES],
            extra_cflags=[*CFLAGS, f"-DBLOCKYARD_SCAN_NS={name}"],
            extra_ldflags=list(LDFLAGS),
            build_directory=str(build_dir),
            is_python_module=False,
            verbose=False,
        )


def _registered_ops(name: str) -> Any:
    """``torch.ops.<name>`` if this process already holds the kernel's operators, else None.

    Loading a second library that registers the same namespace aborts the process, so a kernel
    loaded once (e.g. before a test reset the build state) must be reused, never loaded again.
    """
    try:
        namespace = getattr(torch.ops, name)
        namespace.forward  # noqa: B018 (raises when the operator is not registered)
    except (AttributeError, RuntimeError):
        return None
    return namespace


class _BuildState:
    """What this process knows about the kernel: not tried yet, loaded, or failed (and why)."""

    def __init__(self) -> None:
        self.lock = threading.Lock()
        self.state = "not built"
        self.ops: Any = None
        self.error: str | None = None
        self.seconds: float | None = None
        self.build_dir: Path | None = None


_STATE = _BuildState()


def load_kernels() -> Any:
    """``torch.ops.<namespace>`` with ``forward`` and ``backward``, building on first call; None if it fails."""
    state = _STATE
    with state.lock:
        if state.state == "not built":
            start = time.perf_counter()
            name = extension_name()
            state.build_dir = extension_root() / name
            try:
                if _registered_ops(name) is None:
                    _build_and_load(name, state.build_dir)
                state.ops = _registered_ops(name)
                if state.ops is None:
                    raise RuntimeError(f"the kernel library loaded but torch.ops.{name}.forward is missing")
                state.state = "built"
            except Exception as exc:  # any build failure means: fall back, and say why
                state.state = "failed"
                state.error = f"{type(exc).__name__}: {_first_lines(str(exc))}"
            state.seconds = round(time.perf_counter() - start, 3)
        return state.ops


def _build_and_load(name: str, build_dir: Path) -> None:
    """Compile under the OS lock (or find the build up to date) and load it."""
    build_dir.mkdir(parents=True, exist_ok=True)
    lock = build_dir / "blockyard.flock"
    held = contextlib.ExitStack()
    try:
        held.enter_context(fs.hold_lock(lock, wait_s=LOCK_TIMEOUT_S))
    except fs.LockBusy:
        raise TimeoutError(f"waited {LOCK_TIMEOUT_S:.0f} s for the build lock {lock}") from None
    with held:
        # Under our lock nobody else is building here: a torch lock file is a leftover.
        (build_dir / "lock").unlink(missing_ok=True)
        _compile(name, build_dir)


def _first_lines(text: str, limit: int = 800) -> str:
    text = " | ".join(line.strip() for line in text.strip().splitlines() if line.strip())
    return text if len(text) <= limit else text[: limit - 3] + "..."


def build_status() -> dict[str, Any]:
    """The kernel's build state for env.json: state, error, folder, seconds, flags, tools found."""
    state = _STATE
    return {
        "state": state.state,
        "error": state.error,
        "build_dir": str(state.build_dir) if state.build_dir else str(extension_root() / extension_name()),
        "build_s": state.seconds,
        "cflags": list(CFLAGS),
        "compiler": find_compiler(),
        "ninja": find_ninja(),
    }
