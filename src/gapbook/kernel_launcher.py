"""Start the IPython kernel a stage runs on, with no TCP socket at all.

Run as ``python -m gapbook.kernel_launcher -f CONNECTION_FILE`` by the kernelspec that
:mod:`gapbook.kernels` writes for each run. The kernel's channels use the transport of the
connection file (Unix domain sockets in the run's private folder). ipykernel also opens a
TCP port on 127.0.0.1 to forward the output of forked child processes to the notebook;
the stages never fork (their workers are started by joblib's spawning backend), so that
forwarding is turned off here and the kernel listens on nothing another user can reach.
"""
from __future__ import annotations

import sys
from pathlib import Path

__all__ = ["main"]


def main() -> None:
    # As ipykernel's own launcher: do not import modules from the working directory.
    """Start an IPython kernel for a run's private kernelspec (no fork pipe, no TCP).

    The kernel reads its connection file from the command line as ipykernel's launcher does.
    """
    if sys.path and (sys.path[0] == "" or Path(sys.path[0]) == Path.cwd()):
        del sys.path[0]
    from ipykernel import kernelapp
    from ipykernel.iostream import IOPubThread

    def iopub_without_fork_pipe(socket, pipe=False, session=False):
        return IOPubThread(socket, pipe=False, session=session)

    kernelapp.IOPubThread = iopub_without_fork_pipe
    kernelapp.launch_new_instance()


if __name__ == "__main__":
    main()
