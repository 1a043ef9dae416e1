"""Kernels are private to the run (issue 9 section 3), watched from outside the process.

psutil (a dependency of ipykernel) reads the kernel process's sockets and command line,
the way another local user's tools would see them.
"""
from __future__ import annotations

import json
import os
import signal
import stat
import subprocess
import sys
import time
from pathlib import Path

import psutil
import pytest
from conftest import make_demo_study, record_path, run_gapbook

pytestmark = pytest.mark.skipif(sys.platform != "linux", reason="reads Linux process and socket state")


def start(*args, env=None):
    return subprocess.Popen([sys.executable, "-m", "gapbook.cli", *map(str, args)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, env=env)


def wait_for_kernel(process, timeout=120.0):
    """The kernel started by ``process`` once its stage is executing (kernels run in their own session)."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        assert process.poll() is None, process.communicate()
        for child in psutil.Process(process.pid).children(recursive=True):
            try:
                if "gapbook.kernel_launcher" in " ".join(child.cmdline()):
                    return child
            except psutil.NoSuchProcess:
                continue
        time.sleep(0.1)
    raise AssertionError("no kernel started")


def connection_file(kernel) -> Path:
    argv = kernel.cmdline()
    return Path(argv[argv.index("-f") + 1])


def env_with_tmp(tmp: Path):
    env = dict(os.environ)
    env["TMPDIR"] = str(tmp)
    return env


def test_kernel_listens_on_private_unix_sockets_and_sigterm_stops_cleanly(tmp_path):
    study = make_demo_study(tmp_path / "study")
    private_tmp = tmp_path / "tmp"
    private_tmp.mkdir()
    process = start("run", study / "params.yaml", "--only", "audit", "--out", study / "records",
                    env=env_with_tmp(private_tmp))
    try:
        kernel = wait_for_kernel(process)
        connection = connection_file(kernel)
        folder = connection.parent
        info = folder.stat()
        assert stat.S_IMODE(info.st_mode) & 0o777 == 0o700 and info.st_uid == os.getuid()  # jupyter adds the sticky bit
        # a fresh folder per run, in TMPDIR (or /tmp when TMPDIR's path is too long for a socket address)
        assert folder.parent in (private_tmp, Path("/tmp")) and folder.name.startswith(f"gapbook-kernels-{process.pid}-")
        spec = json.loads((folder / "kernels" / "gapbook-python" / "kernel.json").read_text())
        assert spec["argv"][0] == sys.executable  # this installation's interpreter, not another's
        time.sleep(2.0)  # let the kernel bind every channel
        details = json.loads(connection.read_text())
        assert details["transport"] == "ipc" and details["ip"].startswith(str(folder))
        assert not kernel.net_connections(kind="inet")  # no TCP or UDP socket at all, listening or not
        sockets = [p for p in folder.iterdir() if p.is_socket()]
        assert len(sockets) >= 5  # shell, iopub, stdin, control, heartbeat
        assert os.environ.get("JUPYTER_PATH", "") == "" or str(folder) not in os.environ["JUPYTER_PATH"]

        process.send_signal(signal.SIGTERM)
        out, err = process.communicate(timeout=60)
    finally:
        if process.poll() is None:
            process.kill()
    assert process.returncode == 143, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "SIGTERM" in lines[0], err
    deadline = time.monotonic() + 10
    while kernel.is_running() and kernel.status() != psutil.STATUS_ZOMBIE and time.monotonic() < deadline:
        time.sleep(0.1)
    assert not kernel.is_running() or kernel.status() == psutil.STATUS_ZOMBIE
    assert not folder.exists()  # connection files and sockets gone
    assert not (study / "records").exists() or not any((study / "records").iterdir())


def test_after_sigkill_the_next_run_removes_what_the_dead_run_left(tmp_path):
    """A SIGKILL leaves a partial record and a kernel folder; the next run of the same user removes them,
    keeps those of live processes, and never reads a template planted in the old shared folder."""
    study = make_demo_study(tmp_path / "study")
    private_tmp = tmp_path / "tmp"
    private_tmp.mkdir()
    env = env_with_tmp(private_tmp)
    planted = private_tmp / f"gapbook-kernels-{os.getuid()}" / "nbconvert" / "templates" / "lab"
    planted.mkdir(parents=True)
    (planted / "index.html.j2").write_text("PLANTED-TEMPLATE {{ 7 * 6 }}")
    (planted / "conf.json").write_text('{"base_template": "base"}')

    process = start("run", study / "params.yaml", "--only", "audit", "--out", study / "records", env=env)
    try:
        kernel = wait_for_kernel(process)
        folder = connection_file(kernel).parent
        process.send_signal(signal.SIGKILL)
        process.communicate(timeout=30)
    finally:
        if process.poll() is None:
            process.kill()
    try:
        kernel.kill()  # the orphaned kernel would stop by itself once it sees its parent gone
    except psutil.NoSuchProcess:
        pass
    partial = [p for p in (study / "records").iterdir() if ".partial-" in p.name]
    assert len(partial) == 1 and folder.exists()
    dead = subprocess.Popen(["true"])
    dead.wait()
    scratch = private_tmp / f"gapbook-verify-{dead.pid}-x"  # a verify re-run folder whose process died
    scratch.mkdir()
    (scratch / ".gapbook-owner").write_text(f"{dead.pid}\n")
    alive = study / "records" / ".someone.partial-alive"
    alive.mkdir()
    (alive / ".gapbook-owner").write_text(f"{os.getpid()}\n")

    record = record_path(run_gapbook("run", study / "params.yaml", "--only", "audit", "--out", study / "records",
                                     env=env))
    assert not partial[0].exists() and not folder.exists() and not scratch.exists()
    assert alive.exists()  # its owner is still running
    # only the planted folder (no owner file: not ours to remove) is left
    assert [p.name for p in private_tmp.iterdir() if p.name.startswith("gapbook-kernels-")] == [planted.parents[2].name]
    pages = "".join(p.read_text() for p in (record / "report").glob("*.html"))
    assert "PLANTED-TEMPLATE" not in pages
