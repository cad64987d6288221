"""The simulated arm: PyBullet, built from the arm model's URDF export, behind the wire.

    python -m sim.arm ARM [--endpoint E] [--lockstep] [--step-hz HZ] [--gui] …   (= jogwire sim)
    python -m sim.arm ARM --snapshot arm.png [--q …] [--deg] [--cell C]

`SimulatedArm` is usable in-process with no sockets (set_rates, step, read_state), so a
preflight run can step the pipeline and the arm in one process; `main` serves it on the
wire through `sim.endpoint.ArmEndpoint`.

Physics: fixed base, gravity on, a fixed step (1 kHz by default). Every joint runs
PyBullet's VELOCITY_CONTROL with its effort as the motor's force limit (DEFAULT_EFFORT when
the model has none). PyBullet does not enforce URDF velocity limits in velocity control,
so `guard_rates` clamps speeds (and brakes toward position limits) before each step.
"""

from __future__ import annotations

import argparse
import logging
import math
import os
import struct
import sys
import tempfile
import zlib
from pathlib import Path

import numpy as np
import pybullet as pb

from runtime import palette
from runtime.arm.cell import load_cell
from runtime.arm.load import load_arm
from runtime.arm.model import Arm
from runtime.errors import ConfigError, JogwireError
from runtime.link.pipes import PipeServer, arm_side_channel
from runtime.link.protocol import CellHello, hello_for
from runtime.link.transport import DEFAULT_ARM_ENDPOINT, ArmServer, load_server_keys

from .arm_side import ArmSession, Reading, guard_rates
from .cell_bodies import SimCell, add_static_bodies, read_contacts, sim_cell
from .endpoint import ArmEndpoint, StopFlag
from .urdf import arm_to_urdf

GRAVITY_M_S2 = 9.81
# Motor force limit when the model gives no effort: well above what the URDF sketch's
# inertias need under gravity (so velocity tracking is stiff), our round numbers.
DEFAULT_EFFORT = {"revolute": 500.0, "prismatic": 2000.0}   # N·m, N
TCP_LINK = "tcp"
OBJECTS_IN_VIEW_M = 0.4     # a snapshot shows workcell objects this far beyond the arm
# The PyBullet window's ground in jogwire's palette (options its GUI connect takes).
_GUI_BACKGROUND = " ".join(f"--background_color_{c}={v:.3f}" for c, v in
                           zip(("red", "green", "blue"), palette.unit(palette.GROUND)))

log = logging.getLogger("jogwire.arm")


class SimulatedArm:
    """A PyBullet arm stepped by hand: set_rates(qd), step(), read_state().

    Joint order and names are the model's; q in rad (revolute) or m (prismatic), rates per
    second. DIRECT (headless) unless gui=True. Deterministic for a given command sequence.

    cell: a workcell to hold: its objects become static bodies, the arm's collision model
    (runtime/arm/collision.py: a capsule per link, the tool's capsules) is added as one
    link per capsule, only the pairs the runtime checks may collide, and every step reads
    the contacts PyBullet found (`read_state`).
    """

    def __init__(self, arm: Arm, *, step_s: float = 1e-3, gui: bool = False,
                 q0: np.ndarray | None = None, cell: SimCell | None = None) -> None:
        self.arm = arm
        self.cell = cell
        self.step_s = float(step_s)
        self.client = pb.connect(pb.GUI, options=_GUI_BACKGROUND) if gui else \
            pb.connect(pb.DIRECT)
        if self.client < 0:
            raise ConfigError("PyBullet could not open a " + ("GUI window" if gui else
                                                              "DIRECT session"))
        try:
            self.body = self._load(arm)
            # static body id → object name
            self.objects = add_static_bodies(self.client, cell.objects) if cell else {}
        except Exception:
            pb.disconnect(physicsClientId=self.client)
            raise
        names = {pb.getJointInfo(self.body, i, physicsClientId=self.client)[1].decode(): i
                 for i in range(pb.getNumJoints(self.body, physicsClientId=self.client))}
        self.parts = self._parts() if cell is not None else {}
        self.joint_ids = [names[name] for name in arm.joint_names]
        self.tcp_link = next(i for i in range(pb.getNumJoints(self.body,
                                                              physicsClientId=self.client))
                             if pb.getJointInfo(self.body, i, physicsClientId=self.client
                                                )[12].decode() == TCP_LINK)
        self.forces = [j.effort if j.effort is not None else DEFAULT_EFFORT[j.kind]
                       for j in arm.joints]
        pb.setGravity(0.0, 0.0, -GRAVITY_M_S2, physicsClientId=self.client)
        pb.setTimeStep(self.step_s, physicsClientId=self.client)
        self.reset(arm.home() if q0 is None else q0)

    def _load(self, arm: Arm) -> int:
        fd, path = tempfile.mkstemp(suffix=".urdf", prefix=f"jogwire-{arm.name}-")
        parts = None if self.cell is None else self.cell.parts
        # With a workcell the arm's parts collide with each other too; _parts switches off
        # the pairs the workcell does not check, and the sketch's own shapes altogether
        # (they stay in the file: PyBullet computes the links' inertia from them, so the
        # arm moves exactly as it does without a workcell).
        flags = 0 if self.cell is None else pb.URDF_USE_SELF_COLLISION
        try:
            with os.fdopen(fd, "w", encoding="utf-8") as f:
                f.write(arm_to_urdf(arm, parts=parts))
            return pb.loadURDF(path, useFixedBase=True, flags=flags,
                               physicsClientId=self.client)
        finally:
            os.unlink(path)

    def _parts(self) -> dict[int, str]:
        """PyBullet link index → part name for every part of the collision model. Pairs the
        workcell does not check (neighbours, the mount, excluded pairs) are taken out of
        PyBullet's collision detection, so every contact read is a pair the runtime
        keeps clear of; the sketch's links collide with nothing."""
        c, cell = self.client, self.cell
        assert cell is not None
        links = {pb.getJointInfo(self.body, i, physicsClientId=c)[12].decode(): i
                 for i in range(pb.getNumJoints(self.body, physicsClientId=c))}
        parts = {links[link]: name for link, name in cell.part_names.items()}
        every = [-1, *links.values()]
        for ia in every:
            for ib in every:
                if ia < ib and (parts.get(ia) is None or parts.get(ib) is None or
                                frozenset((parts[ia], parts[ib])) not in cell.checked):
                    pb.setCollisionFilterPair(self.body, self.body, ia, ib, 0,
                                              physicsClientId=c)
        for body, name in self.objects.items():
            for link in every:
                if parts.get(link) is None or frozenset((parts[link], name)) not in cell.checked:
                    pb.setCollisionFilterPair(self.body, body, link, -1, 0, physicsClientId=c)
        return parts

    def reset(self, q: np.ndarray) -> None:
        """Put the joints at q (rad or m) at rest; time restarts at 0."""
        q = np.asarray(q, dtype=np.float64)
        for jid, value in zip(self.joint_ids, q):
            pb.resetJointState(self.body, jid, float(value), 0.0, physicsClientId=self.client)
        self.t_s = 0.0
        self.request = np.zeros(self.arm.n)
        self.command = np.zeros(self.arm.n)
        self.limited = False
        self.contacts: tuple[tuple[str, str, float], ...] = ()
        self._read()

    def set_rates(self, qd: np.ndarray) -> None:
        """The joint rates to follow from the next step on (rad/s or m/s, model order)."""
        qd = np.array(qd, dtype=np.float64)
        # math.isfinite over a list: a few times quicker than numpy's call for 7 values
        if qd.shape != (self.arm.n,) or not all(map(math.isfinite, qd.tolist())):
            raise ValueError(f"expected {self.arm.n} finite joint rates, got {qd!r}")
        self.request = qd

    def step(self) -> None:
        """Guard the requested rates at the arm's own limits, then one physics step."""
        self.command, self.limited = guard_rates(self.arm, self.q, self.request, self.step_s)
        pb.setJointMotorControlArray(self.body, self.joint_ids, pb.VELOCITY_CONTROL,
                                     targetVelocities=self.command.tolist(),
                                     forces=self.forces, physicsClientId=self.client)
        pb.stepSimulation(physicsClientId=self.client)
        self.t_s += self.step_s
        self._read()
        if self.cell is not None:
            self.contacts = read_contacts(self.client, self.body, self.parts,
                                          self.objects)

    def _read(self) -> None:
        states = pb.getJointStates(self.body, self.joint_ids, physicsClientId=self.client)
        self.q = np.array([s[0] for s in states])
        self.qd = np.array([s[1] for s in states])

    def read_state(self) -> Reading:
        return Reading(self.t_s, self.q.copy(), self.qd.copy(), self.command.copy(),
                       self.limited, self.contacts)

    def tcp_pose(self) -> np.ndarray:
        """The TCP frame in the world (4×4), as PyBullet computes it (link frame, not COM)."""
        s = pb.getLinkState(self.body, self.tcp_link, computeForwardKinematics=True,
                            physicsClientId=self.client)
        T = np.eye(4)
        T[:3, :3] = np.array(pb.getMatrixFromQuaternion(s[5])).reshape(3, 3)
        T[:3, 3] = s[4]
        return T

    def render(self, width: int = 800, height: int = 600) -> np.ndarray:
        """The arm in its current pose as an RGBA image (height, width, 4), TinyRenderer,
        on the palette's ground (every pixel no body covers, from the segmentation mask)."""
        c = self.client
        boxes = [pb.getAABB(self.body, i, physicsClientId=c)
                 for i in range(-1, pb.getNumJoints(self.body, physicsClientId=c))]
        lo = np.minimum.reduce([np.array(b[0]) for b in boxes] + [np.array([0.0, 0.0, 0.0])])
        hi = np.maximum.reduce([np.array(b[1]) for b in boxes])
        lo, hi = self._with_objects(lo, hi)
        centre, size = 0.5 * (lo + hi), max(float(np.max(hi - lo)), 0.3)
        props = self._add_props(size) if self.cell is None else []
        try:
            fov_deg = 40.0
            distance = 0.75 * size / math.tan(math.radians(fov_deg / 2.0))
            view = pb.computeViewMatrixFromYawPitchRoll(
                cameraTargetPosition=centre.tolist(), distance=distance, yaw=40.0,
                pitch=-20.0, roll=0.0, upAxisIndex=2)
            proj = pb.computeProjectionMatrixFOV(fov=fov_deg, aspect=width / height,
                                                 nearVal=0.01, farVal=10.0 * distance)
            _, _, rgba, _, seg = pb.getCameraImage(
                width, height, view, proj, renderer=pb.ER_TINY_RENDERER,
                lightDirection=[1.0, -0.6, 2.0], shadow=1, physicsClientId=c)
        finally:
            for body in props:
                pb.removeBody(body, physicsClientId=c)
        image = np.array(rgba, dtype=np.uint8).reshape(height, width, 4)
        image[np.asarray(seg).reshape(height, width) < 0] = (*palette.GROUND, 255)
        return image

    def _with_objects(self, lo: np.ndarray, hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The view's bounds grown to the workcell's objects near the arm (an object's
        box is clipped to OBJECTS_IN_VIEW_M around the arm; a half-space is left out)."""
        near_lo, near_hi = lo - OBJECTS_IN_VIEW_M, hi + OBJECTS_IN_VIEW_M
        for body in self.objects:
            if pb.getCollisionShapeData(body, -1, physicsClientId=self.client)[0][2] \
                    == pb.GEOM_PLANE:
                continue
            b_lo, b_hi = (np.array(v) for v in pb.getAABB(body, physicsClientId=self.client))
            lo = np.minimum(lo, np.clip(b_lo, near_lo, near_hi))
            hi = np.maximum(hi, np.clip(b_hi, near_lo, near_hi))
        return lo, hi

    def _add_props(self, size: float) -> list[int]:
        """Visual-only floor plate at z = 0 and, for a raised base, a column under it (the
        workcell's, so in the palette's cell colours)."""
        c = self.client
        base = self.arm.base[:3, 3]
        plate = pb.createVisualShape(pb.GEOM_BOX, halfExtents=[0.8 * size, 0.8 * size, 0.002],
                                     rgbaColor=palette.unit(palette.CELL_FLOOR),
                                     physicsClientId=c)
        bodies = [pb.createMultiBody(baseMass=0.0, baseVisualShapeIndex=plate,
                                     basePosition=[float(base[0]), float(base[1]), -0.002],
                                     physicsClientId=c)]
        if base[2] > 0.05:
            column = pb.createVisualShape(pb.GEOM_CYLINDER, radius=0.06, length=float(base[2]),
                                          rgbaColor=palette.unit(palette.CELL_OBJECT),
                                          physicsClientId=c)
            bodies.append(pb.createMultiBody(
                baseMass=0.0, baseVisualShapeIndex=column,
                basePosition=[float(base[0]), float(base[1]), float(base[2]) / 2.0],
                physicsClientId=c))
        return bodies

    def close(self) -> None:
        if self.client >= 0 and pb.isConnected(physicsClientId=self.client):
            pb.disconnect(physicsClientId=self.client)
        self.client = -1

    def __enter__(self) -> "SimulatedArm":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def write_png(path: str | Path, rgba: np.ndarray) -> Path:
    """Write an (h, w, 4) uint8 image as an RGBA PNG (zlib + struct; PNG spec, RFC 2083)."""
    rgba = np.ascontiguousarray(rgba, dtype=np.uint8)
    h, w, _ = rgba.shape
    raw = b"".join(b"\x00" + rgba[row].tobytes() for row in range(h))  # filter 0 per row

    def chunk(tag: bytes, data: bytes) -> bytes:
        return (struct.pack(">I", len(data)) + tag + data
                + struct.pack(">I", zlib.crc32(tag + data) & 0xFFFFFFFF))

    png = (b"\x89PNG\r\n\x1a\n"
           + chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, 8, 6, 0, 0, 0))
           + chunk(b"IDAT", zlib.compress(raw, 6)) + chunk(b"IEND", b""))
    path = Path(path)
    path.write_bytes(png)
    return path


# ----------------------------------------------------------------------------------------
# Command line
# ----------------------------------------------------------------------------------------

def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="jogwire sim",
        description="Run the PyBullet simulated arm as the arm side of the wire (headless "
                    "unless --gui), or render it to a PNG with --snapshot.")
    p.add_argument("arm", help="shipped arm name (e.g. reach7), or a .toml / .urdf path")
    p.add_argument("--endpoint", default=DEFAULT_ARM_ENDPOINT,
                   help=f"where to listen (default {DEFAULT_ARM_ENDPOINT}; tcp://127.0.0.1:* "
                        "picks a free port; a non-loopback address needs --keys)")
    p.add_argument("--keys", metavar="DIR", help="CURVE keys made by `jogwire keys DIR`")
    p.add_argument("--gui", action="store_true", help="open the PyBullet window")
    p.add_argument("--step-hz", type=float, default=1000.0,
                   help="physics steps per second of simulated time (default 1000)")
    p.add_argument("--lockstep", action="store_true",
                   help="one step per received rates message, no pacing (deterministic)")
    p.add_argument("--link", metavar="fd:R,W",
                   help="with --lockstep: serve on the pipe ends R (read) and W (write) the "
                        "parent passed in, instead of --endpoint; shm:R,W,M: the frames in "
                        "the shared memory M, the pipes as doorbell (runtime/link/pipes.py)")
    p.add_argument("--substeps", type=int, default=1, metavar="N",
                   help="with --lockstep: physics steps per rates message (default 1; e.g. "
                        "2 for a 500 Hz control rate on a 1 ms step)")
    p.add_argument("--stale-after", type=float, default=0.1, metavar="S",
                   help="no fresh rates for S seconds → ramp to zero (default 0.1)")
    p.add_argument("--duration", type=float, metavar="S", help="stop after S seconds")
    p.add_argument("--snapshot", metavar="FILE.png",
                   help="render the arm (home pose or --q) to a PNG and exit")
    p.add_argument("--q", metavar="V", nargs="+",
                   help="the start pose (or the pose --snapshot renders) in rad and m (deg "
                        "with --deg), separated by commas or spaces; write --q=-0.5,1 when the "
                        "first is negative. Default: the arm's home pose")
    p.add_argument("--deg", action="store_true", help="--q revolute values are in degrees")
    p.add_argument("--size", default="800x600", help="--snapshot image size (default 800x600)")
    p.add_argument("--cell", metavar="NAME|FILE",
                   help="a workcell (shipped name or .toml): its objects become static bodies, "
                        "the arm collides as its collision model, contacts are reported to "
                        "runtimes that ask (docs/PROTOCOL.md §5a)")
    return p


def _parse_q(arm: Arm, tokens: list[str] | None, deg: bool) -> np.ndarray:
    if tokens is None:
        return arm.home()
    text = ",".join(tokens)
    try:
        values = [float(v) for v in text.replace(" ", ",").split(",") if v]
    except ValueError:
        raise ConfigError(f"--q must be {arm.n} comma-separated numbers, got {text!r}",
                          field="q") from None
    if len(values) != arm.n or not all(map(math.isfinite, values)):
        raise ConfigError(f"--q needs {arm.n} finite values for {arm.name}, got {len(values)}",
                          field="q")
    q = np.array(values)
    return np.where(arm.is_revolute, np.radians(q), q) if deg else q


def _parse_size(text: str) -> tuple[int, int]:
    try:
        w, h = (int(v) for v in text.lower().split("x"))
    except ValueError:
        raise ConfigError(f"--size must look like 800x600, got {text!r}", field="size") from None
    if not (16 <= w <= 4096 and 16 <= h <= 4096):
        raise ConfigError("--size must be between 16 and 4096 pixels each way", field="size")
    return w, h


def snapshot(arm: Arm, path: str, q: np.ndarray, size: tuple[int, int],
             cell: SimCell | None = None) -> Path:
    with SimulatedArm(arm, q0=q, cell=cell) as sim:
        return write_png(path, sim.render(*size))


def serve(args: argparse.Namespace, arm: Arm, cell: SimCell | None = None) -> int:
    if not (1.0 <= args.step_hz <= 20000.0):
        raise ConfigError("--step-hz must be between 1 and 20000", field="step-hz")
    if not args.stale_after > 0:
        raise ConfigError("--stale-after must be positive", field="stale-after")
    if args.substeps != 1 and not args.lockstep:
        raise ConfigError("--substeps needs --lockstep (paced mode steps by the clock)",
                          field="substeps")
    if not 1 <= args.substeps <= 1000:
        raise ConfigError("--substeps must be between 1 and 1000", field="substeps")
    if args.link and not args.lockstep:
        raise ConfigError("--link needs --lockstep (a pipe is for a lockstep run)",
                          field="link")
    q0 = _parse_q(arm, args.q, args.deg)
    if np.any(q0 < arm.lower) or np.any(q0 > arm.upper):
        raise ConfigError(f"--q is outside the joint limits of {arm.name}", field="q")
    keys = load_server_keys(args.keys) if args.keys else None
    with StopFlag(args.duration) as stop, \
            SimulatedArm(arm, step_s=1.0 / args.step_hz, gui=args.gui, q0=q0,
                         cell=cell) as sim, \
            _server(args, arm, keys) as server:
        # Without a workcell it answers `cell` with an empty name: it measures no contact.
        ours = CellHello("", "") if cell is None else CellHello(cell.name, cell.digest)
        session = ArmSession(hello_for(arm, "sim", stale_after_s=args.stale_after),
                             stale_after_s=args.stale_after, in_order=args.lockstep,
                             cell=ours)
        endpoint = ArmEndpoint(server, sim, session, substeps=args.substeps)
        mode = "lockstep" if args.lockstep else "paced"
        print(f"jogwire sim ready: arm={arm.name} joints={arm.n} endpoint={server.endpoint} "
              f"step_s={sim.step_s:g} mode={mode} stale_after_s={args.stale_after:g} "
              f"substeps={args.substeps} cell={cell.name if cell else '-'}", flush=True)
        if args.lockstep:
            endpoint.serve_lockstep(stop)
        else:
            endpoint.serve_paced(stop)
        log.info("stopped: %s", endpoint.summary())
    return 0


def _server(args: argparse.Namespace, arm: Arm, keys) -> ArmServer | PipeServer:
    if args.link:
        return PipeServer(arm_side_channel(args.link), n_joints=arm.n, endpoint=args.link)
    return ArmServer(args.endpoint, n_joints=arm.n, keys=keys)


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    logging.basicConfig(level=logging.INFO, format="jogwire sim: %(message)s", stream=sys.stderr)
    try:
        arm = load_arm(args.arm)
        cell = sim_cell(arm, load_cell(args.cell, arm)) if args.cell else None
        if args.snapshot:
            path = snapshot(arm, args.snapshot, _parse_q(arm, args.q, args.deg),
                            _parse_size(args.size), cell)
            print(f"wrote {path}")
            return 0
        return serve(args, arm, cell)
    except JogwireError as exc:
        print(f"jogwire sim: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
