"""Sending a recorded session to an arm side, and re-running it closed loop
(`jogwire replay`; the open-loop re-run is `runtime.sessions.rerun`).

Sending moves an arm: `check_start` wants the target at the recorded start pose (within 1°
or 1 mm) and `check_speed` refuses a playback speed whose scaled rates or accelerations
would break the arm's limits. `paced_send` sends each record's rates at its recorded time.
"""

from __future__ import annotations

import math
import time
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from ..arm.cell import Cell
from ..arm.model import Arm
from ..control.intent import InputFrame
from ..control.loop import wait_until
from ..errors import ConfigError, TransportError
from ..link.protocol import cell_hello_for, rates_message
from ..link.transport import ArmClient
from ..operator.progress import Progress
from .lockstep import LockstepSim, run_closed_loop
from .log_schema import CycleRecord
from .rerun import CycleSettings, RecordedInputs

__all__ = ["ReplayLink", "check_speed", "check_start", "paced_send", "rerun_closed_loop"]

START_TOLERANCE = {"revolute": math.radians(1.0), "prismatic": 1e-3}   # rad, m
STATE_TIMEOUT_S = 0.5       # no state from the target this long: stop sending
SPIN_S = 3e-4               # sleep until this long before a send, then spin (loop.py)


def rerun_closed_loop(settings: CycleSettings, records: Sequence[CycleRecord],
                      frames: Sequence[InputFrame], arm: Arm, *, arm_spec: str,
                      step_hz: float, label: str, cell: Cell | None = None,
                      cell_spec: str | None = None, link: str = "auto") -> dict[str, Any]:
    """The recorded inputs through today's cycle in lockstep with the simulated arm
    (loading `arm_spec`, in `cell` loaded from `cell_spec` if any, over `link`:
    `lockstep.link_kind`): per joint the largest rate difference and pose deviation."""
    cycle = settings.control_cycle(arm, cell)
    inputs = RecordedInputs(records, frames, cycle.dt_s)
    n_cycles = len(records)
    recorded = np.array([r.rates for r in records])
    recorded_q = np.array([r.q for r in records])
    rates = np.zeros_like(recorded)
    q_dev = np.zeros(arm.n)
    bar = Progress(f"re-run {label}", n_cycles * cycle.dt_s)
    start_q = recorded_q[0] if records[0].q else None
    with LockstepSim(arm_spec, arm, rate_hz=settings.run.rate_hz, step_hz=step_hz,
                     start_q=start_q, cell_spec=cell_spec,
                     cell=None if cell is None else cell_hello_for(cell), link=link) as sim:
        for c in run_closed_loop(cycle, sim, inputs.frame_at, n_cycles,
                                 state_lag=settings.run.effective_state_lag):
            rates[c.k] = c.out.rates
            q_dev = np.maximum(q_dev, np.abs(c.q_used - recorded_q[c.k]))
            bar.update((c.k + 1) * cycle.dt_s)
        bar.close()
    diff = np.abs(rates - recorded)
    worst = diff.argmax(axis=0)
    differs = np.flatnonzero(diff.max(axis=1) > 0.0)
    return {"mode": "closed loop (lockstep simulated arm)", "cycles": n_cycles,
            "largest_difference": float(diff.max()),
            "differing_cycles": int(differs.size),
            "first_difference_t_s": float(records[differs[0]].t_s) if differs.size else None,
            "joints": [{"name": name, "max_abs_difference": float(diff[i, j]),
                        "at_t_s": float(records[i].t_s) if diff[i, j] > 0 else None,
                        "max_pose_deviation": float(q_dev[j])}
                       for j, (name, i) in enumerate(zip(arm.joint_names, worst.tolist()))]}



class ReplayLink:
    """The runtime's end of the arm link while sending: the client and its sequence."""

    def __init__(self, client: ArmClient) -> None:
        self.client = client
        self.seq = 0

    def send(self, qd: np.ndarray, reduced: bool = False) -> bool:
        self.seq += 1
        return self.client.send(rates_message(self.seq, time.monotonic_ns(), qd,
                                              reduced=reduced))



def check_speed(arm: Arm, records: Sequence[CycleRecord], speed: float) -> None:
    """Refuse a playback speed whose scaled rates would break the arm's limits.

    Rates scale with X and accelerations with X², so only X ≤ 1 is always safe."""
    if speed <= 1.0:
        return
    rates = np.array([r.rates for r in records])
    t = np.array([r.t_s for r in records])
    peak_speed = np.abs(rates).max(axis=0)
    dt = np.diff(t)
    ok = dt > 0
    peak_accel = (np.abs(np.diff(rates, axis=0))[ok] / dt[ok, None]).max(axis=0) \
        if ok.any() else np.zeros(arm.n)
    with np.errstate(divide="ignore"):
        fastest = min(float(np.min(arm.max_speed / peak_speed)),
                      float(np.sqrt(np.min(arm.max_accel / peak_accel))))
    fastest *= 1.0 + 1e-9          # a rate scaled onto a limit lands on it ± rounding
    if speed > fastest:
        raise ConfigError(f"at --speed {speed:g} the replay would command rates or "
                          f"accelerations above {arm.name}'s limits (rates scale with the "
                          f"speed, accelerations with its square); the fastest allowed is "
                          f"--speed {math.floor(fastest * 100) / 100:g}", field="speed")


def check_start(arm: Arm, q: np.ndarray, start_q: np.ndarray | None, from_here: bool) -> None:
    if start_q is None or from_here:
        return
    tol = np.array([START_TOLERANCE[j.kind] for j in arm.joints])
    off = np.abs(q - start_q)
    if np.any(off > tol):
        i = int(np.argmax(off / tol))
        j = arm.joints[i]
        k = math.degrees(1.0) if j.is_revolute else 1.0
        unit = "deg" if j.is_revolute else "m"
        raise ConfigError(
            f"the target is not at the recorded start pose: {j.name} is at "
            f"{q[i] * k:.3f} {unit}, the recording starts at {start_q[i] * k:.3f} {unit}; move "
            f"the arm there first, or pass --from-here to replay the rates from where it is",
            field="from-here")


def paced_send(link: ReplayLink, records: Sequence[CycleRecord], *, speed: float,
               target: str, label: str) -> dict[str, Any]:
    """Each record's rates (× speed) at its recorded time (÷ speed) after the start.

    A record whose successor is already due when it comes up is skipped, never sent late
    (the wire's rule: a late command is dropped, not queued), so the replay keeps the
    recorded timing on a busy machine and the arm follows the newest rates."""
    client = link.client
    rates = np.array([r.rates for r in records]) * speed
    times = (np.array([r.t_s for r in records]) - records[0].t_s) / speed
    n = len(records)
    recorded_q = np.array([r.q for r in records]) if records[0].q else None
    deviation = np.zeros(rates.shape[1])
    bar = Progress(f"replay {Path(label).name}", float(times[-1]) if n else 0.0)
    clock = time.perf_counter
    start = clock() + 0.02
    last_state = clock()
    latest_q = None
    sent = skipped = 0
    for k in range(n):
        if k + 1 < n and clock() >= start + times[k + 1]:
            skipped += 1
            continue
        wait_until(start + times[k], clock, spin_s=SPIN_S)
        link.send(rates[k], records[k].reduced)
        sent += 1
        inbox = client.receive()
        now = clock()
        if inbox.state is not None:
            latest_q, last_state = np.array(inbox.state.q), now
        elif now - last_state > STATE_TIMEOUT_S:
            raise TransportError(f"no state from {target} for {STATE_TIMEOUT_S:g} s; replay "
                                 f"stopped at t = {records[k].t_s:.3f} s")
        if inbox.refuse is not None and inbox.refuse.code != "no_hello":
            raise TransportError(f"{target} refused the replay ({inbox.refuse.code}): "
                                 f"{inbox.refuse.reason}")
        if latest_q is not None and recorded_q is not None:
            deviation = np.maximum(deviation, np.abs(latest_q - recorded_q[k]))
        bar.update(float(times[k]))
    bar.close()
    wall = clock() - start
    return {"log": label, "target": target, "cycles": n, "sent": sent,
            "skipped_late": skipped, "recorded_s": float(records[-1].t_s - records[0].t_s),
            "speed": speed, "wall_s": wall, "dropped_sends": client.send_dropped,
            "joints": [{"name": name, "max_pose_deviation": float(d)}
                       for name, d in zip(client.hello.joints, deviation)]}
