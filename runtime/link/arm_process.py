"""Start the arm side (simulated arm or bridge stub) as a child process, never as an import.

`runtime` must not import `sim` or pybullet, so `jogwire sim`, `jogwire drive`, preflight
and the tests run `python -m sim.arm …` / `python -m sim.bridge …` in a child and talk to it
over the wire. The child prints one ready line on stdout once its socket is bound:

    jogwire sim ready: arm=reach7 joints=7 endpoint=tcp://127.0.0.1:47810 step_s=0.001 …

`ArmProcess` waits for that line and exposes the bound endpoint (useful with
`--endpoint tcp://127.0.0.1:*`, which lets the child pick a free port).
"""

from __future__ import annotations

import os
import re
import selectors
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import IO, Any, Sequence

from ..errors import TransportError

PROJECT_ROOT = Path(__file__).resolve().parents[2]
MODULES = {"sim": "sim.arm", "bridge": "sim.bridge"}


def child_env() -> dict[str, str]:
    """The environment for a child: this checkout first on PYTHONPATH (same code both ends)."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(PROJECT_ROOT), env.get("PYTHONPATH"))
                                        if p)
    return env


def child_argv(kind: str, arm: str, options: list[str]) -> list[str]:
    # -P: the working directory is not put on sys.path, so a stray sim.py there cannot
    # shadow the package (PYTHONPATH from child_env still leads to this checkout).
    return [sys.executable, "-P", "-m", MODULES[kind], arm, *options]


class ArmProcess:
    """A running `sim.arm` / `sim.bridge` child. Use as a context manager; `stop()` ends it."""

    def __init__(self, kind: str, arm: str, options: Sequence[str] = (), *,
                 ready_timeout_s: float = 30.0, stderr: int | IO[Any] | None = None,
                 new_session: bool = False, pass_fds: tuple[int, ...] = ()) -> None:
        # new_session: the child leaves our process group, so a Ctrl-C at the terminal
        # reaches only us and we stop it in order (zero rates first, then the child).
        # pass_fds: file descriptors the child inherits (the ends of a pipe link).
        self.argv = child_argv(kind, arm, list(options))
        self.proc = subprocess.Popen(self.argv, env=child_env(),
                                     stdout=subprocess.PIPE, stderr=stderr, text=True,
                                     start_new_session=new_session, pass_fds=pass_fds)
        self.output = self.errors = ""
        try:
            self.ready_line = self._read_ready(ready_timeout_s)
        except BaseException:
            self.stop()
            raise
        fields = dict(re.findall(r"(\w+)=(\S+)", self.ready_line))
        self.endpoint = fields.get("endpoint", "")
        self.fields = fields

    def _read_ready(self, timeout_s: float) -> str:
        deadline = time.monotonic() + timeout_s
        stdout = self.proc.stdout
        assert stdout is not None                    # (opened as a pipe above)
        with selectors.DefaultSelector() as sel:
            sel.register(stdout, selectors.EVENT_READ)
            while (remaining := deadline - time.monotonic()) > 0:
                if sel.select(remaining):
                    line = stdout.readline()
                    if not line:
                        break
                    if " ready: " in line:
                        return line.strip()
        status = self.proc.poll()
        raise TransportError(f"the arm side ({' '.join(self.argv[2:])}) "
                             + (f"exited with status {status}" if status is not None else
                                f"was not ready within {timeout_s:g} s"))

    @property
    def pid(self) -> int:
        return self.proc.pid

    def stop(self, timeout_s: float = 5.0) -> int | None:
        """SIGTERM, wait, SIGKILL if needed; returns the exit status.

        What the child wrote after its ready line (and its stderr, if piped) ends up in
        `output` and `errors`.
        """
        if self.proc.poll() is None:
            self.proc.terminate()
        try:
            out, err = self.proc.communicate(timeout=timeout_s)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            out, err = self.proc.communicate(timeout=timeout_s)
        self.output, self.errors = out or "", err or ""
        return self.proc.returncode

    def __enter__(self) -> "ArmProcess":
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()


def snapshot_png(arm: str, q: Sequence[float], *, cell: str | None = None,
                 size: tuple[int, int] = (800, 600), timeout_s: float = 60.0) -> bytes:
    """A picture of the simulated arm at pose q (rad or m), in its workcell if `cell` is
    given: `python -m sim.arm ARM --snapshot … --q …` in a child (PyBullet's software
    renderer), the PNG's bytes back. Raises TransportError if the child fails."""
    with tempfile.TemporaryDirectory(prefix="jogwire-snapshot-") as folder:
        path = Path(folder) / "snapshot.png"
        options = ["--snapshot", str(path), "--q=" + ",".join(repr(float(v)) for v in q),
                   "--size", f"{size[0]}x{size[1]}"] + (["--cell", cell] if cell else [])
        try:
            done = subprocess.run(child_argv("sim", arm, options), env=child_env(),
                                  capture_output=True, text=True, timeout=timeout_s)
        except subprocess.TimeoutExpired:
            raise TransportError(f"the snapshot of {arm} took longer than {timeout_s:g} s") \
                from None
        if done.returncode != 0 or not path.exists():
            tail = " / ".join(done.stderr.strip().splitlines()[-2:])
            raise TransportError(f"the snapshot of {arm} failed (status {done.returncode})"
                                 + (f": {tail}" if tail else ""))
        return path.read_bytes()
