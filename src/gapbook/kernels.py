"""Kernels private to one run.

Each run makes a fresh folder (``mkdtemp``: mode 0700, owner checked) holding the
kernelspec for this very interpreter, the kernels' connection files and, where the
platform has them, the Unix domain sockets the kernels listen on (ZeroMQ's IPC
transport), so no other local user can connect to a kernel and read what it computes.
Nothing is added to ``JUPYTER_PATH`` or any other shared search path: papermill is given
a kernel manager whose kernelspec comes from this folder only. Two installations
running at once therefore never execute on each other's interpreter.

The folder records the pid that owns it; a later run removes folders whose owner died
(e.g. killed with SIGKILL) when they belong to the same user.
"""
from __future__ import annotations

import itertools
import json
import os
import shutil
import signal
import stat
import sys
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, List

from .errors import AnalysisError
from .record import OWNER_FILE, owned_by_dead_process

__all__ = ["KERNEL_NAME", "scratch_folder", "PrivateKernels"]

KERNEL_NAME = "gapbook-python"
FOLDER_PREFIX = "gapbook-kernels-"
SCRATCH_PREFIX = "gapbook-verify-"  # verify's re-run folder, cleaned up the same way
# A Unix socket path is limited to about 107 bytes; ours are <folder>/ipc-<n>-<port>.
SOCKET_PATH_BUDGET = 100


def ipc_available() -> bool:
    if os.name != "posix":
        return False
    import zmq

    return bool(zmq.has("ipc"))


def _parents() -> List[Path]:
    """Where private kernel folders are made: the temporary folder, or /tmp when its path is too long."""
    return list(dict.fromkeys(Path(p) for p in (tempfile.gettempdir(), "/tmp") if os.path.isdir(p)))


def remove_stale_folders() -> List[Path]:
    """Remove private kernel folders (and verify's scratch folders) left by this user's processes that
    died (e.g. SIGKILL)."""
    removed = []
    candidates = []
    for parent in _parents():
        try:
            candidates += [p for p in parent.iterdir() if p.name.startswith((FOLDER_PREFIX, SCRATCH_PREFIX))]
        except OSError:
            continue
    for folder in candidates:
        if owned_by_dead_process(folder):
            shutil.rmtree(folder, ignore_errors=True)
            removed.append(folder)
    return removed


def scratch_folder() -> Path:
    """A private scratch folder that records its owner, so a later run removes it if this process dies.

    Returns
    -------
    Path
        A new 0700 folder under the system's temporary folder.
    """
    folder = Path(tempfile.mkdtemp(prefix=f"{SCRATCH_PREFIX}{os.getpid()}-"))
    (folder / OWNER_FILE).write_text(f"{os.getpid()}\n")
    return folder


def _private_folder() -> Path:
    """A fresh folder only this user can enter, short enough for socket paths."""
    for parent in _parents():
        folder = Path(tempfile.mkdtemp(prefix=f"{FOLDER_PREFIX}{os.getpid()}-", dir=parent))
        if len(str(folder)) + 16 <= SOCKET_PATH_BUDGET or parent == Path("/tmp"):
            return folder
        shutil.rmtree(folder, ignore_errors=True)
    return Path(tempfile.mkdtemp(prefix=f"{FOLDER_PREFIX}{os.getpid()}-"))


def _check_private(folder: Path) -> None:
    info = folder.lstat()
    if stat.S_ISLNK(info.st_mode) or not stat.S_ISDIR(info.st_mode):
        raise AnalysisError(f"{folder}: the private kernel folder is not a plain folder; refusing to start kernels")
    if hasattr(os, "getuid") and info.st_uid != os.getuid():
        raise AnalysisError(f"{folder}: the private kernel folder belongs to another user; refusing to start kernels")
    if stat.S_IMODE(info.st_mode) & 0o077:
        raise AnalysisError(f"{folder}: the private kernel folder is open to other users; refusing to start kernels")


@dataclass
class PrivateKernels:
    """The private folder of one run and the kernel managers started from it."""

    root: Path
    ipc: bool
    executable: str = sys.executable
    managers: List[Any] = field(default_factory=list)
    _counter: Any = field(default_factory=lambda: itertools.count(1))

    @classmethod
    def create(cls) -> "PrivateKernels":
        remove_stale_folders()
        root = _private_folder()
        os.chmod(root, 0o700)
        _check_private(root)
        (root / OWNER_FILE).write_text(f"{os.getpid()}\n")
        spec_dir = root / "kernels" / KERNEL_NAME
        spec_dir.mkdir(parents=True, mode=0o700)
        launcher = "gapbook.kernel_launcher" if ipc_available() else "ipykernel_launcher"
        spec = {"argv": [sys.executable, "-m", launcher, "-f", "{connection_file}",
                         "--IPKernelApp.log_level=CRITICAL"],
                "display_name": "Python (gapbook)", "language": "python",
                "env": {"PYTHONHASHSEED": "0", "MPLBACKEND": "module://matplotlib_inline.backend_inline"}}
        (spec_dir / "kernel.json").write_text(json.dumps(spec, indent=1))
        return cls(root=root, ipc=ipc_available())

    def spec_manager(self) -> Any:
        from jupyter_client.kernelspec import KernelSpecManager

        # Only this run's folder: no user, system or environment kernelspec is consulted.
        return KernelSpecManager(kernel_dirs=[str(self.root / "kernels")], ensure_native_kernel=False)

    def manager_class(self) -> type:
        """A KernelManager class for nbclient whose kernels live in this run's private folder."""
        from jupyter_client.manager import KernelManager

        kernels = self

        class RunKernelManager(KernelManager):
            def __init__(self, **kwargs: Any) -> None:
                _check_private(kernels.root)
                number = next(kernels._counter)
                kwargs["kernel_name"] = KERNEL_NAME
                kwargs["kernel_spec_manager"] = kernels.spec_manager()
                kwargs["connection_file"] = str(kernels.root / f"kernel-{number}.json")
                if kernels.ipc:
                    kwargs["transport"] = "ipc"
                    kwargs["ip"] = str(kernels.root / f"ipc-{number}")
                super().__init__(**kwargs)
                kernels.managers.append(self)

        return RunKernelManager

    def kill_all(self) -> None:
        """Stop every kernel of this run at once (used when the run is interrupted)."""
        for manager in self.managers:
            provisioner = getattr(manager, "provisioner", None)
            pgid = getattr(provisioner, "pgid", None)
            pid = getattr(provisioner, "pid", None)
            try:
                if pgid and hasattr(os, "killpg"):
                    os.killpg(pgid, signal.SIGKILL)
                elif pid:
                    os.kill(pid, signal.SIGKILL)
            except (ProcessLookupError, PermissionError):
                pass

    def close(self, *, kill: bool = False) -> None:
        if kill:
            self.kill_all()
        shutil.rmtree(self.root, ignore_errors=True)
