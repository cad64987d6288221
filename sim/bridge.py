"""The hardware bridge stub: the wire contract around a `Driver` an integrator fills in.

    python -m sim.bridge ARM [--driver module:Class] [--dry-run-csv FILE] [--rate HZ] …
                                                                          (= jogwire bridge)

The bridge serves the same socket and messages as the simulated arm (docs/PROTOCOL.md): it
accepts one runtime whose hello matches its arm, follows the newest fresh rates, ramps to
zero at rated deceleration when they go stale, and reports state every period. Between the
wire and the driver it applies the arm's speed and position limits once more
(`guard_rates`): whatever arrives, the driver is never asked for more than the model allows.

To drive a real controller, implement `Driver` (four methods, below) and pass
`--driver your_module:YourDriver`. The shipped `VirtualDriver` has no hardware: it
integrates the commanded rates into a virtual arm and can write every command to a CSV.
"""

from __future__ import annotations

import abc
import argparse
import csv
import importlib
import logging
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, TextIO

import numpy as np

from runtime.arm.load import load_arm
from runtime.arm.model import Arm
from runtime.errors import ConfigError, JogwireError
from runtime.link.protocol import hello_for
from runtime.link.transport import DEFAULT_ARM_ENDPOINT, ArmServer, load_server_keys

from .arm_side import ArmSession, Reading, guard_rates
from .endpoint import ArmEndpoint, StopFlag

log = logging.getLogger("jogwire.arm")


@dataclass(frozen=True, eq=False)
class JointSample:
    """Measured joint positions (rad or m) and rates (rad/s or m/s), in the model's order."""

    q: np.ndarray
    qd: np.ndarray


class Driver(abc.ABC):
    """What the bridge needs from an arm controller. One thread calls these, in this order:

    open(arm) once → then every period read_state() and write_rates(qd) → close() once.

    - Units: rad and rad/s for revolute joints, m and m/s for prismatic ones, joints in the
      order of `arm.joint_names`. Convert to the controller's units and joint order here.
    - A call should return within a fraction of the bridge period (default 2 ms); do not
      sleep in them. The bridge keeps time.
    - `write_rates` receives rates already inside the arm's speed limits and braking
      distances; the controller's own safety functions still apply (a bridge is not one).
    - Raise any exception to stop: the bridge writes zero rates (best effort), calls
      close() and exits with status 1.
    """

    @abc.abstractmethod
    def open(self, arm: Arm) -> JointSample:
        """Connect to the controller; return the arm's current joint state."""

    @abc.abstractmethod
    def read_state(self) -> JointSample:
        """The newest measured joint positions and rates."""

    @abc.abstractmethod
    def write_rates(self, qd: np.ndarray) -> None:
        """Command these joint rates until the next call."""

    @abc.abstractmethod
    def close(self) -> None:
        """Stop the arm and release the controller. Called once, also after errors."""


class VirtualDriver(Driver):
    """A driver with no hardware: integrates commanded rates into a virtual arm.

    Time comes from `clock` (s); positions stop at the joint limits like hard stops. With
    `csv_path`, every command is appended as a row: t_s (since open), then one rate per
    joint (columns `<joint>_rad_s` or `<joint>_m_s`), flushed as written.
    """

    def __init__(self, *, csv_path: str | Path | None = None, q0: np.ndarray | None = None,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.csv_path = None if csv_path is None else Path(csv_path)
        self.q0 = q0
        self.clock = clock
        self._file: TextIO | None = None
        self.commands_written = 0

    def open(self, arm: Arm) -> JointSample:
        self.arm = arm
        self.q = np.array(arm.home() if self.q0 is None else self.q0, dtype=np.float64)
        self.qd = np.zeros(arm.n)
        self.t0 = self._t = self.clock()
        if self.csv_path is not None:
            try:
                self._file = open(self.csv_path, "w", newline="", encoding="utf-8")
            except OSError as exc:
                raise ConfigError(f"cannot write the dry-run CSV: {exc.strerror}",
                                  path=self.csv_path) from None
            self._csv = csv.writer(self._file)
            self._csv.writerow(["t_s"] + [f"{j.name}_{'rad_s' if j.is_revolute else 'm_s'}"
                                          for j in arm.joints])
        return JointSample(self.q.copy(), self.qd.copy())

    def _advance(self) -> None:
        now = self.clock()
        q = self.q + self.qd * (now - self._t)
        self.q = np.clip(q, self.arm.lower, self.arm.upper)
        self.qd = np.where(self.q == q, self.qd, 0.0)   # a hard stop ends the motion
        self._t = now

    def read_state(self) -> JointSample:
        self._advance()
        return JointSample(self.q.copy(), self.qd.copy())

    def write_rates(self, qd: np.ndarray) -> None:
        self._advance()
        self.qd = np.array(qd, dtype=np.float64)
        if self._file is not None:
            self._csv.writerow([f"{self._t - self.t0:.6f}"] + [repr(float(v)) for v in qd])
            self._file.flush()
        self.commands_written += 1

    def close(self) -> None:
        if self._file is not None:
            self._file.close()
            self._file = None


class BridgeTarget:
    """A driver seen as an endpoint target: each step reads, guards, then writes."""

    def __init__(self, arm: Arm, driver: Driver, *, step_s: float,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.arm = arm
        self.driver = driver
        self.step_s = step_s
        self.clock = clock
        try:
            sample = driver.open(arm)
            self._check(sample)
        except BaseException:
            driver.close()
            raise
        self.t0 = clock()
        self.request = np.zeros(arm.n)
        self.command = np.zeros(arm.n)
        self.reading = Reading(0.0, sample.q, sample.qd, self.command.copy(), False)

    def _check(self, sample: JointSample) -> None:
        for name in ("q", "qd"):
            v = np.asarray(getattr(sample, name))
            if v.shape != (self.arm.n,) or not np.all(np.isfinite(v)):
                raise RuntimeError(f"driver returned {name} = {v!r}; expected {self.arm.n} "
                                   "finite values")

    def set_rates(self, qd: np.ndarray) -> None:
        self.request = np.asarray(qd, dtype=np.float64)

    def step(self) -> None:
        sample = self.driver.read_state()
        self._check(sample)
        self.command, limited = guard_rates(self.arm, np.asarray(sample.q), self.request,
                                            self.step_s)
        self.driver.write_rates(self.command.copy())
        self.reading = Reading(self.clock() - self.t0, np.asarray(sample.q, dtype=np.float64),
                               np.asarray(sample.qd, dtype=np.float64), self.command.copy(),
                               limited)

    def read_state(self) -> Reading:
        return self.reading

    def close(self) -> None:
        """Best-effort zero, then close the driver."""
        try:
            self.driver.write_rates(np.zeros(self.arm.n))
        finally:
            self.driver.close()


# ----------------------------------------------------------------------------------------
# Command line
# ----------------------------------------------------------------------------------------

def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="jogwire bridge",
        description="Run the hardware bridge stub: the arm side of the wire around a Driver "
                    "(the shipped VirtualDriver moves a virtual arm; no hardware).")
    p.add_argument("arm", help="shipped arm name (e.g. reach7), or a .toml / .urdf path")
    p.add_argument("--endpoint", default=DEFAULT_ARM_ENDPOINT,
                   help=f"where to listen (default {DEFAULT_ARM_ENDPOINT}; a non-loopback "
                        "address needs --keys)")
    p.add_argument("--keys", metavar="DIR", help="CURVE keys made by `jogwire keys DIR`")
    p.add_argument("--rate", dest="rate_hz", type=float, default=500.0, metavar="HZ",
                   help="bridge periods per second (default 500)")
    p.add_argument("--rate-hz", dest="rate_hz", type=float, help=argparse.SUPPRESS)  # old name
    p.add_argument("--stale-after", type=float, default=0.1, metavar="S",
                   help="no fresh rates for S seconds → ramp to zero (default 0.1)")
    p.add_argument("--driver", metavar="MODULE:CLASS",
                   help="your Driver subclass (constructed with no arguments); default: "
                        "the VirtualDriver")
    p.add_argument("--dry-run-csv", metavar="FILE",
                   help="VirtualDriver: write every command it would send to FILE")
    p.add_argument("--duration", type=float, metavar="S", help="stop after S seconds")
    return p


def load_driver(spec: str | None, csv_path: str | None) -> Driver:
    if spec is None:
        return VirtualDriver(csv_path=csv_path)
    if csv_path is not None:
        raise ConfigError("--dry-run-csv works with the VirtualDriver only", field="driver")
    module_name, _, class_name = spec.partition(":")
    try:
        cls = getattr(importlib.import_module(module_name), class_name)
    except (ImportError, AttributeError, ValueError) as exc:
        raise ConfigError(f"cannot load driver {spec!r}: {exc}", field="driver") from None
    if not (isinstance(cls, type) and issubclass(cls, Driver)):
        raise ConfigError(f"{spec} is not a subclass of sim.bridge.Driver", field="driver")
    return cls()


def serve(args: argparse.Namespace, arm: Arm) -> int:
    if not (1.0 <= args.rate_hz <= 10000.0):
        raise ConfigError("--rate must be between 1 and 10000 Hz", field="rate")
    if not args.stale_after > 0:
        raise ConfigError("--stale-after must be positive", field="stale-after")
    keys = load_server_keys(args.keys) if args.keys else None
    driver = load_driver(args.driver, args.dry_run_csv)
    with StopFlag(args.duration) as stop, \
            ArmServer(args.endpoint, n_joints=arm.n, keys=keys) as server:
        target = BridgeTarget(arm, driver, step_s=1.0 / args.rate_hz)
        try:
            session = ArmSession(hello_for(arm, "bridge", stale_after_s=args.stale_after),
                                 stale_after_s=args.stale_after)
            endpoint = ArmEndpoint(server, target, session)
            print(f"jogwire bridge ready: arm={arm.name} joints={arm.n} "
                  f"endpoint={server.endpoint} step_s={target.step_s:g} "
                  f"driver={type(driver).__name__} stale_after_s={args.stale_after:g}",
                  flush=True)
            endpoint.serve_paced(stop)
            log.info("stopped: %s", endpoint.summary())
        finally:
            target.close()
    return 0


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    logging.basicConfig(level=logging.INFO, format="jogwire bridge: %(message)s",
                        stream=sys.stderr)
    try:
        return serve(args, load_arm(args.arm))
    except JogwireError as exc:
        print(f"jogwire bridge: {exc}", file=sys.stderr)
        return 2
    except Exception as exc:  # a driver failed: say so plainly, the arm was told zero
        print(f"jogwire bridge: driver error: {type(exc).__name__}: {exc}", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
