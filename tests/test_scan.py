"""The scan backends against the sequential loop h_t = a_t h_{t-1} + b_t.

The outside reference is the recurrence itself, the first-order linear recurrence of Martin &
Cundy 2018 (eq. 1), which Blelloch 1990 (sec. 1.4) solves as a scan: ``scan_reference`` is that
loop written out in PyTorch ops, with PyTorch's autograd for its gradients, and every fast path
(chunked, compiled) must agree with it in values and in gradients wrt a, b and h0. The fast
backwards are hand-derived reverse scans (chain rule through h_t = a_t h_{t-1} + b_t:
g_t = dL/dh_t + conj(a_{t+1}) g_{t+1}, dL/da_t = g_t conj(h_{t-1}), dL/db_t = g_t,
dL/dh0 = conj(a_0) g_0), so comparing against autograd checks that derivation; float64
``torch.autograd.gradcheck`` checks it against finite differences as well.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap

import pytest
import torch

from blockyard.kernels import KERNELS, build, check_backend, kernels_info, linear_scan, scan_reference
from blockyard.kernels import scan as scan_mod

FAST = ("torch", "compiled")
SHAPES = [(1, 1, 1), (2, 1, 3), (1, 7, 3), (3, 9, 5), (2, 64, 4), (2, 333, 17), (1, 50, 3)]


@pytest.fixture(scope="session")
def compiled_ops():
    """Build the kernel once per session (tens of seconds on a fresh machine)."""
    if build.find_compiler() is None:
        pytest.skip("no C++ compiler on this machine")
    ops = build.load_kernels()
    assert ops is not None, f"the C++ scan kernel did not build: {build.build_status()['error']}"
    return ops


@pytest.fixture
def backend(request):
    """The backend under test; only ``compiled`` needs the kernel (the chunked comparisons run
    on machines without a compiler too)."""
    if request.param == "compiled":
        request.getfixturevalue("compiled_ops")
    return request.param


def random_inputs(shape, dtype=torch.float32, seed=0, h0=True):
    gen = torch.Generator().manual_seed(seed)
    batch, _, channels = shape
    real = torch.float64 if dtype in (torch.float64, torch.complex128) else torch.float32
    a = torch.rand(shape, generator=gen, dtype=real)
    b = torch.randn(shape, generator=gen, dtype=real)
    start = torch.randn(batch, channels, generator=gen, dtype=real) if h0 else None
    if dtype.is_complex:  # a stable complex diagonal recurrence: |a| < 1, any phase
        a = torch.polar(a, 6.283 * torch.rand(shape, generator=gen, dtype=real))
        b = torch.complex(b, torch.randn(shape, generator=gen, dtype=real))
        start = None if start is None else torch.complex(start, torch.randn(batch, channels, generator=gen, dtype=real))
    return a, b, start


def values_and_grads(a, b, h0, backend, seed=1):
    """h and the gradients of a fixed random linear loss of h wrt (a, b, h0)."""
    leaves = [t.detach().clone().requires_grad_() for t in (a, b) + ((h0,) if h0 is not None else ())]
    h = linear_scan(*leaves[:2], leaves[2] if h0 is not None else None, backend=backend)
    weight = torch.randn(h.shape, generator=torch.Generator().manual_seed(seed), dtype=h.dtype)
    (h * weight).real.sum().backward()
    return [h.detach()] + [t.grad for t in leaves]


def assert_all_close(got, want, **tol):
    assert len(got) == len(want)
    for name, x, y in zip(("h", "dL/da", "dL/db", "dL/dh0")[: len(got)], got, want, strict=True):
        torch.testing.assert_close(x, y, msg=lambda m, name=name: f"{name}: {m}", **tol)


# ----------------------------------------------------------------------------- agreement with the loop


@pytest.mark.parametrize("backend", FAST, indirect=True)
@pytest.mark.parametrize("shape", SHAPES, ids=str)
@pytest.mark.parametrize("with_h0", [True, False], ids=["h0", "no-h0"])
def test_fast_backend_matches_reference(backend, shape, with_h0):
    a, b, h0 = random_inputs(shape, h0=with_h0, seed=sum(shape))
    got = values_and_grads(a, b, h0, backend)
    want = values_and_grads(a, b, h0, "reference")
    assert_all_close(got, want, rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_compiled_forward_is_bitwise_the_loop(compiled_ops, dtype):
    # Built with -ffp-contract=off, a * h + b rounds after the multiply and after the add, like the
    # two IEEE-754 operations of the reference loop, so the values must be identical, not close.
    a, b, h0 = random_inputs((3, 40, 33), dtype=dtype)
    assert torch.equal(linear_scan(a, b, h0, backend="compiled"), scan_reference(a, b, h0))


@pytest.mark.parametrize("backend", FAST, indirect=True)
@pytest.mark.parametrize("dtype", [torch.complex64, torch.complex128])
def test_complex_matches_reference(backend, dtype):
    a, b, h0 = random_inputs((2, 37, 5), dtype=dtype, seed=3)
    got = values_and_grads(a, b, h0, backend)
    want = values_and_grads(a, b, h0, "reference")
    tol = 1e-5 if dtype == torch.complex64 else 1e-12
    assert_all_close(got, want, rtol=tol, atol=tol)


@pytest.mark.parametrize("backend", FAST, indirect=True)
@pytest.mark.parametrize("with_h0", [True, False], ids=["h0", "no-h0"])
def test_gradcheck_float64(backend, with_h0):
    # Finite differences against the hand-written backward (torch.autograd.gradcheck).
    # T = 11 > SEQUENTIAL_MAX_STEPS, so the chunked path cuts time into chunks (with padding).
    a, b, h0 = random_inputs((2, 11, 3), dtype=torch.float64, h0=with_h0)
    inputs = [t.requires_grad_() for t in (a, b) + ((h0,) if with_h0 else ())]

    def fn(*xs):
        return linear_scan(xs[0], xs[1], xs[2] if with_h0 else None, backend=backend)

    assert torch.autograd.gradcheck(fn, inputs)


def test_gradcheck_complex128_chunked():
    a, b, h0 = random_inputs((1, 10, 2), dtype=torch.complex128)
    inputs = [t.requires_grad_() for t in (a, b, h0)]
    assert torch.autograd.gradcheck(lambda *xs: linear_scan(*xs, backend="torch"), inputs)


def test_chunked_double_backward():
    # Its backward is built from differentiable ops (a reverse chunked scan), so second
    # derivatives exist; torch.autograd.gradgradcheck checks them by finite differences.
    a, b, h0 = random_inputs((1, 10, 2), dtype=torch.float64)
    inputs = [t.requires_grad_() for t in (a, b, h0)]
    assert torch.autograd.gradgradcheck(lambda *xs: linear_scan(*xs, backend="torch"), inputs)


@pytest.mark.parametrize("backend", FAST, indirect=True)
def test_partial_requires_grad(backend):
    a, b, h0 = random_inputs((2, 20, 4))
    b.requires_grad_()
    linear_scan(a, b, h0, backend=backend).sum().backward()
    ref_b = b.detach().clone().requires_grad_()
    scan_reference(a, ref_b, h0).sum().backward()
    torch.testing.assert_close(b.grad, ref_b.grad)
    assert a.grad is None and h0.grad is None


@pytest.mark.parametrize("backend", FAST, indirect=True)
def test_non_contiguous_inputs(backend):
    # (B, C, T) storage seen as (B, T, C): what a transpose upstream hands the scan.
    a, b, _ = random_inputs((2, 5, 30))
    a, b = a.transpose(1, 2), b.transpose(1, 2)
    h0 = torch.randn(2, 5)
    assert not a.is_contiguous()
    got = values_and_grads(a, b, h0, backend)
    want = values_and_grads(a, b, h0, "reference")
    assert_all_close(got, want, rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize("backend", ("reference",) + FAST, indirect=True)
def test_no_grad_and_empty_time(backend):
    a, b, h0 = random_inputs((2, 12, 3))
    with torch.no_grad():
        h = linear_scan(a.requires_grad_(), b, h0, backend=backend)
    assert h.grad_fn is None
    torch.testing.assert_close(h, scan_reference(a.detach(), b, h0))
    empty = torch.zeros(2, 0, 3)
    assert linear_scan(empty, empty, backend=backend).shape == (2, 0, 3)


@pytest.mark.skipif(not torch.cuda.is_available(), reason="needs a CUDA device")
def test_chunked_on_cuda_matches_cpu_reference():
    # auto sends CUDA tensors to the chunked backend; it must give the loop's values and gradients there too.
    a, b, h0 = random_inputs((2, 100, 8))
    assert scan_mod.resolve_backend(a.cuda()) == "torch"
    got = [t.cpu() for t in values_and_grads(a.cuda(), b.cuda(), h0.cuda(), "auto")]
    assert_all_close(got, values_and_grads(a, b, h0, "reference"), rtol=1e-5, atol=1e-5)


# ----------------------------------------------------------------------------- numerical stability


def _decays(kind: str, shape, gen) -> torch.Tensor:
    u = torch.rand(shape, generator=gen, dtype=torch.float64)
    a = 1e-3 * u if kind == "near0" else 1 - 1e-3 * u
    # Exact 0s and 1s too: 0 is where a formulation that divides by a running product breaks.
    a[:, ::97, 0] = 0.0 if kind == "near0" else 1.0
    return a


@pytest.mark.parametrize("backend", FAST, indirect=True)
@pytest.mark.parametrize("kind", ["near0", "near1"])
def test_long_sequence_stability(backend, kind):
    gen = torch.Generator().manual_seed(7)
    shape = (2, 4096, 6)
    a64 = _decays(kind, shape, gen)
    b64 = torch.randn(shape, generator=gen, dtype=torch.float64)
    h0 = torch.randn(2, 6, generator=gen, dtype=torch.float64)
    want = scan_reference(a64, b64, h0)  # float64 loop: ~1e-16 relative, the truth for float32
    got = linear_scan(a64.float(), b64.float(), h0.float(), backend=backend).double()
    assert torch.isfinite(got).all()
    # Tolerance: float32 rounding of the inputs and T = 4096 steps; with decays near 1 the state
    # remembers ~1000 steps, so errors of a few float32 ulps per step add up (estimate, no source).
    err = (got - want).abs().max() / want.abs().max()
    assert err < 2e-5, f"relative error {err:.2e}"
    # Gradients through the long sequence too: dL/da for L = sum(h).
    leaves = [a64.float().requires_grad_(), b64.float()]
    linear_scan(*leaves, h0.float(), backend=backend).sum().backward()
    ref_a = a64.clone().requires_grad_()
    scan_reference(ref_a, b64, h0).sum().backward()
    err = (leaves[0].grad.double() - ref_a.grad).abs().max() / ref_a.grad.abs().max()
    assert err < 2e-5, f"dL/da relative error {err:.2e}"


# ----------------------------------------------------------------------------- inputs and backend choice


@pytest.mark.parametrize(
    ("args", "error", "words"),
    [
        ((torch.rand(2, 5, 3), torch.rand(2, 5, 4), None), ValueError, "b must have a's shape"),
        ((torch.rand(2, 5, 3), torch.rand(2, 5, 3), torch.rand(3, 3)), ValueError, "h0 must be (B, C)"),
        ((torch.rand(5, 3), torch.rand(5, 3), None), ValueError, "a must be (B, T, C)"),
        ((torch.rand(2, 5, 3), torch.rand(2, 5, 3, dtype=torch.float64), None), TypeError, "share one dtype"),
        ((torch.ones(2, 5, 3, dtype=torch.int64),) * 2 + (None,), TypeError, "floating or complex"),
        (([1.0], torch.rand(2, 5, 3), None), TypeError, "a must be a tensor"),
    ],
    ids=["b-shape", "h0-shape", "a-2d", "dtype-mix", "int", "not-tensor"],
)
@pytest.mark.parametrize("backend", KERNELS)
def test_invalid_inputs_raise_clear_errors(args, error, words, backend):
    with pytest.raises(error, match=words.replace("(", r"\(").replace(")", r"\)")):
        linear_scan(*args, backend=backend)


def test_unknown_backend_names_the_allowed_ones():
    with pytest.raises(ValueError, match="allowed: auto, compiled, torch, reference"):
        check_backend("nope")
    a, b, _ = random_inputs((1, 3, 2))
    with pytest.raises(ValueError, match="allowed: auto, compiled, torch, reference"):
        linear_scan(a, b, backend="fast")


def test_the_backend_is_explicit_with_no_process_default(compiled_ops, monkeypatch):
    # Issue 14: no module-global backend; what a call gets depends on its own argument only.
    assert not hasattr(scan_mod, "set_scan_backend") and not hasattr(scan_mod, "_default_backend")
    a, b, h0 = random_inputs((2, 6, 3))
    calls = []
    monkeypatch.setattr(scan_mod, "scan_chunked", lambda *xs: calls.append("torch") or scan_reference(*xs))
    linear_scan(a, b, h0, backend="torch")
    linear_scan(a, b, h0)  # auto, unaffected by the call before: compiled here
    assert calls == ["torch"] and scan_mod.resolve_backend(a) == "compiled"
    assert kernels_info("torch")["requested"] == "torch"
    assert kernels_info()["resolved_cpu_float32"] == "compiled"


def test_auto_rules_by_device_and_dtype(compiled_ops):
    cpu = torch.empty(0)
    assert scan_mod.resolve_backend(cpu) == "compiled"
    assert scan_mod.resolve_backend(cpu.to(torch.complex64)) == "compiled"
    assert scan_mod.resolve_backend(cpu.to(torch.bfloat16)) == "torch"
    assert scan_mod.resolve_backend(torch.empty(0, device="meta")) == "torch"
    with pytest.raises(TypeError, match="supports"):
        linear_scan(
            torch.ones(1, 2, 1, dtype=torch.bfloat16), torch.ones(1, 2, 1, dtype=torch.bfloat16), backend="compiled"
        )


def test_backend_info_reports_the_build(compiled_ops):
    info = kernels_info()
    assert info["resolved_cpu_float32"] == "compiled" and info["rg_lru_cpu"] == "fused C++ op"
    assert info["compiled"]["state"] == "built" and info["compiled"]["error"] is None
    assert "-O3" in info["compiled"]["cflags"]


@pytest.fixture
def fresh_build_state(monkeypatch, tmp_path):
    """A process that has not tried the build yet, building into an empty folder (under a name of
    its own: the real kernel may already be loaded in this process and would be reused)."""
    monkeypatch.setattr(build, "_STATE", build._BuildState())
    monkeypatch.setattr(build, "extension_name", lambda: "blockyard_scan_fallback_test")
    monkeypatch.setenv("TORCH_EXTENSIONS_DIR", str(tmp_path))


def _check_fallback(reason: str) -> None:
    a, b, h0 = random_inputs((2, 30, 3))
    assert scan_mod.resolve_backend(a) == "torch"
    torch.testing.assert_close(linear_scan(a, b, h0), scan_reference(a, b, h0), rtol=1e-5, atol=1e-5)
    status = kernels_info()["compiled"]
    assert status["state"] == "failed" and reason in status["error"]
    with pytest.raises(RuntimeError, match="runtime.kernels: compiled is unavailable"):
        linear_scan(a, b, h0, backend="compiled")


def test_auto_falls_back_when_the_build_fails(fresh_build_state, monkeypatch):
    def broken(name, build_dir):
        raise RuntimeError("Error building extension: no compiler here")

    monkeypatch.setattr(build, "_compile", broken)
    _check_fallback("no compiler here")


def test_auto_falls_back_without_ninja(fresh_build_state, monkeypatch):
    monkeypatch.setattr(build, "find_ninja", lambda: None)
    _check_fallback("ninja not found")


def test_auto_falls_back_with_a_missing_compiler(fresh_build_state, monkeypatch):
    # The real loader with a compiler that does not exist: its error must be caught and recorded.
    monkeypatch.setenv("CXX", "/nonexistent/c++")
    _check_fallback("Error")


@pytest.mark.slow
def test_ninja_beside_python_is_found_without_path(monkeypatch):
    # CI runs .venv/bin/python without activating the venv: pip's ninja (a project dependency)
    # is then not on PATH, and torch's loader would not find it on its own.
    monkeypatch.setattr(build.shutil, "which", lambda name: None)
    found = build.find_ninja()
    assert found is not None and os.access(found, os.X_OK)
    assert subprocess.run([found, "--version"], capture_output=True, check=True).stdout.strip()


_CHILD = textwrap.dedent(
    """
    import torch
    from blockyard.kernels import build, linear_scan, scan_reference
    assert build.load_kernels() is not None, build.build_status()["error"]
    a, b = torch.rand(2, 50, 3), torch.randn(2, 50, 3)
    assert torch.equal(linear_scan(a, b, backend="compiled"), scan_reference(a, b))
    print("ok")
    """
)


@pytest.mark.slow
def test_concurrent_first_builds_and_a_stale_lock(compiled_ops, tmp_path):
    # Two processes building into one empty folder at once, which also holds the lock file that
    # a killed build leaves behind (torch's loader alone would wait on it forever). Both must load
    # a working kernel: one compiles, the other waits on the OS lock, then loads.
    build_dir = tmp_path / build.extension_name()
    build_dir.mkdir()
    (build_dir / "lock").touch()
    env = {**os.environ, "TORCH_EXTENSIONS_DIR": str(tmp_path), "OMP_NUM_THREADS": "1"}
    children = [
        subprocess.Popen([sys.executable, "-c", _CHILD], env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT)
        for _ in range(2)
    ]
    for child in children:
        out, _ = child.communicate(timeout=300)
        assert child.returncode == 0 and out.decode().strip().endswith("ok"), out.decode()[-2000:]
    assert len(list(build_dir.glob("*.so"))) == 1
