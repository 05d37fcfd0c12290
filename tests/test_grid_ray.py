"""The Ray executor against a real local Ray head on loopback: the same results as local processes."""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import psutil
import pytest

from blockyard.errors import UserError
from blockyard.grid.executors import import_ray
from blockyard.grid.index import open_index
from blockyard.grid.run import run_grid

pytestmark = pytest.mark.slow  # full tier: grids on a Ray cluster

SPEC = """
name: two-cells
base:
  model: {width: 32, depth: 1, pattern: [global_attention], mlp_expansion: 2.0}
  data: {corpus: pydoc, seq_len: 32}
  train: {steps: 12, batch_size: 4, eval_every: 6, eval_windows: 4, log_every: 3, warmup_steps: 2,
          checkpoint_every: 6}
variants:
  attention: {}
  recurrence: {model.pattern: [recurrence]}
reference: attention
seeds: [3]
"""


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _port_open(port: int) -> bool:
    with socket.socket() as s:
        s.settimeout(0.5)
        return s.connect_ex(("127.0.0.1", port)) == 0


def _ray_env() -> dict[str, str]:
    # Token auth off for this loopback-only test cluster: with it on, Ray reads ~/.ray/auth_token,
    # and a token left there by an earlier cluster on the same machine makes every client fail.
    return {**os.environ, "RAY_USAGE_STATS_ENABLED": "0", "RAY_AUTH_MODE": "disabled"}


@pytest.fixture
def ray_head():
    """``ray start --head --block`` on loopback with 2 CPUs; every process it started is ended after."""
    ray_bin = Path(sys.executable).with_name("ray")
    if not ray_bin.exists():
        pytest.skip("the ray command is not installed (pip install '.[ray]')")
    port = _free_port()
    temp_dir = tempfile.mkdtemp(prefix="rayg", dir="/tmp")  # short: Ray's socket paths have a length limit
    env = _ray_env()
    head = subprocess.Popen(
        [str(ray_bin), "start", "--head", f"--port={port}", "--node-ip-address=127.0.0.1", "--num-cpus=2",
         "--include-dashboard=false", "--disable-usage-stats", f"--temp-dir={temp_dir}", "--block"],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env, start_new_session=True)
    try:
        deadline = time.monotonic() + 120
        while not _port_open(port):
            if head.poll() is not None or time.monotonic() > deadline:
                pytest.fail("the Ray head did not start")
            time.sleep(0.5)
        yield f"127.0.0.1:{port}"
    finally:
        if head.poll() is None:
            procs = [psutil.Process(head.pid), *psutil.Process(head.pid).children(recursive=True)]
            head.send_signal(signal.SIGTERM)  # `ray start --block` then stops what it started
            _gone, alive = psutil.wait_procs(procs, timeout=30)
            for p in alive:
                p.kill()
        shutil.rmtree(temp_dir, ignore_errors=True)


def _finals(grid_dir: Path) -> dict[str, float]:
    with open_index(grid_dir, readonly=True) as index:
        return {c["id"]: (c["status"], c["final_val_loss"]) for c in index.cells()}


@pytest.mark.slow
def test_ray_executor_matches_local_processes(tmp_path, ray_head):
    spec = tmp_path / "two.yaml"
    spec.write_text(textwrap.dedent(SPEC))
    assert run_grid(spec, out=tmp_path / "local", workers=2, threads=1, echo=lambda _: None) == 0
    proc = subprocess.run([sys.executable, "-m", "blockyard", "grid", str(spec), "--out", str(tmp_path / "ray"),
                           "--executor", "ray", "--address", ray_head, "--threads", "1"],
                          capture_output=True, text=True, timeout=400, env=_ray_env())
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert "ray executor" in proc.stdout
    local, ray = _finals(tmp_path / "local"), _finals(tmp_path / "ray")
    assert set(local) == {"attention-seed3", "recurrence-seed3"}
    assert all(status == "done" for status, _ in ray.values())
    assert ray == local
    assert (tmp_path / "ray" / "logs" / "attention-seed3.log").read_text().count("(ray)") == 1


@pytest.mark.slow
def test_grid_with_a_plugin_on_ray_matches_local_processes(tmp_path, ray_head):
    # Each Ray task loads the plugin from the grid dir's copy (the same file the local cells load).
    from conftest import LINEAR_ATTENTION
    from test_plugins_grid import plugin_grid

    spec = plugin_grid(tmp_path / "spec", LINEAR_ATTENTION, "linear_attention")
    assert run_grid(spec, out=tmp_path / "local", workers=2, threads=1, echo=lambda _: None) == 0
    proc = subprocess.run([sys.executable, "-m", "blockyard", "grid", str(spec), "--out", str(tmp_path / "ray"),
                           "--executor", "ray", "--address", ray_head, "--threads", "1"],
                          capture_output=True, text=True, timeout=400, env=_ray_env())
    assert proc.returncode == 0, proc.stdout + proc.stderr
    local, ray = _finals(tmp_path / "local"), _finals(tmp_path / "ray")
    assert set(ray) == {"softmax-seed0", "mine-seed0"} and ray == local
    assert "(ray)" in (tmp_path / "ray" / "logs" / "mine-seed0.log").read_text()


def test_missing_ray_is_a_one_line_user_error(monkeypatch):
    monkeypatch.setitem(sys.modules, "ray", None)  # makes `import ray` raise ImportError
    with pytest.raises(UserError, match=r"^--executor ray needs Ray: pip install '\.\[ray\]'"):
        import_ray()
