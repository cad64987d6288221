"""`jogwire relay` on real 127.0.0.1 sockets: a runtime socket (ArmClient) talks through the relay
to an arm side (ArmServer + the reference ArmSession rules, integrating a virtual arm) while
the relay duplicates, reorders and garbles both directions. Plus the command line itself."""

from __future__ import annotations

import json
import random
import re
import signal
import subprocess
import sys
import threading
import time

import numpy as np
import pytest

from runtime.arm.load import load_arm
from runtime.cli import main
from runtime.link.arm_process import child_env
from runtime.link.protocol import Rates, StateFreshness, hello_for
from runtime.link.relay import DIRECTIONS, Link, LinkFaults
from runtime.link.relay_runner import Relay
from runtime.link.transport import ArmClient, ArmServer
from sim.arm_side import ArmSession, Reading
from sim.endpoint import ArmEndpoint

STALE_AFTER_S = 0.1


class VirtualArm:
    """The smallest arm-side target: q integrates the commanded rates (rad, rad/s)."""

    def __init__(self, arm, step_s: float = 1e-3) -> None:
        self.arm, self.step_s = arm, step_s
        self.q, self.command = arm.home(), np.zeros(arm.n)

    def set_rates(self, qd) -> None:
        self.command = np.asarray(qd, dtype=float)

    def step(self) -> None:
        self.q = self.q + self.command * self.step_s

    def read_state(self) -> Reading:
        return Reading(0.0, self.q.copy(), self.command.copy(), self.command.copy())


class RecordingSession(ArmSession):
    """The reference arm-side rules, noting every rates message it starts to follow."""

    def __init__(self, *args, **kwargs) -> None:
        super().__init__(*args, **kwargs)
        self.followed: list[Rates] = []

    def take_pending(self, now_ns: int):
        rates = super().take_pending(now_ns)
        if rates is not None:
            self.followed.append(rates)
        return rates


def in_thread(run, stop: threading.Event) -> threading.Thread:
    thread = threading.Thread(target=run, args=(stop.is_set,), daemon=True)
    thread.start()
    return thread


def expected_qd(seq: int) -> tuple[float, ...]:
    return (1e-4 * seq, -0.05, 0.0)


def test_through_the_relay_nothing_stale_duplicated_or_malformed_is_acted_on() -> None:
    arm = load_arm("planar3")
    server = ArmServer("tcp://127.0.0.1:*", n_joints=arm.n)
    session = RecordingSession(hello_for(arm, "sim", stale_after_s=STALE_AFTER_S),
                               stale_after_s=STALE_AFTER_S)
    endpoint = ArmEndpoint(server, VirtualArm(arm), session)
    faults = LinkFaults(duplicate=0.3, reorder=0.2, reorder_hold_s=0.006, garbage=0.2)
    links = {d: Link(faults, random.Random(f"7:{d}")) for d in DIRECTIONS}
    events: list[str] = []
    relay = Relay("tcp://127.0.0.1:*", server.endpoint, links, emit=events.append)
    stop_arm, stop_relay = threading.Event(), threading.Event()
    threads = [in_thread(endpoint.serve_paced, stop_arm), in_thread(relay.run, stop_relay)]
    client = ArmClient(relay.endpoint, hello=hello_for(arm, "runtime",
                                                       stale_after_s=STALE_AFTER_S))
    try:
        theirs, first = client.handshake(5.0)          # hello forwarded faithfully
        assert theirs == session.hello and first.status == "waiting"
        freshness = StateFreshness(STALE_AFTER_S)
        accepted_states = []
        for seq in range(1, 501):                      # 1 s at 500 Hz
            client.send(Rates(seq, time.monotonic_ns(), expected_qd(seq)))
            inbox = client.receive(0.002)
            if inbox.state is not None and freshness.offer(inbox.state, time.monotonic_ns()):
                accepted_states.append(inbox.state.seq)
        deadline = time.monotonic() + 2.0              # until the relay has delivered it all
        while links["rates"].queued() and time.monotonic() < deadline:
            client.receive(0.01)
        client.receive(0.05)
    finally:
        client.close()
        # The relay notices the runtime is gone and closes its connection to the arm side.
        deadline = time.monotonic() + 3.0
        while session.controller is not None and time.monotonic() < deadline:
            time.sleep(0.01)
        stop_relay.set()
        stop_arm.set()
        for thread in threads:
            thread.join(5.0)
        relay.close()
        server.close()

    rates_link = links["rates"].counters
    print(f"\nrates: {rates_link.line()}\nstate: {links['state'].counters.line()}"
          f"\narm side dropped {dict(server.dropped)}, session {dict(session.dropped)}")
    # The faults happened ...
    assert rates_link.duplicated > 50 and rates_link.reordered > 50 and rates_link.garbage > 100
    # ... and only good, newer rates were followed, each with exactly what was sent.
    seqs = [r.seq for r in session.followed]
    assert len(seqs) > 200 and all(b > a for a, b in zip(seqs, seqs[1:]))
    assert all(r.qd == expected_qd(r.seq) for r in session.followed)
    assert session.dropped["old_seq"] >= rates_link.duplicated
    # Every garbage frame that reached the arm side was counted there by a reason (a few
    # deliveries may not have gone out: the arm side's queue was full, counted by the relay).
    assert sum(server.dropped.values()) == rates_link.garbage - rates_link.garbage_unsent
    assert all(b > a for a, b in zip(accepted_states, accepted_states[1:]))
    assert sum(client.dropped.values()) > 0
    assert any("gone" in e for e in events) and session.controller is None


def test_the_command_runs_prints_its_counters_and_writes_a_report(capsys, tmp_path) -> None:
    report = tmp_path / "relay.json"
    assert main(["relay", "--listen", "tcp://127.0.0.1:*", "--target", "tcp://127.0.0.1:9",
                 "--loss", "rates=5%", "--delay", "40ms", "--stall", "state=100ms@1s/2s",
                 "--seed", "3", "--duration", "0.2", "--json-file", str(report)]) == 0
    out = capsys.readouterr().out
    assert "jogwire relay ready: listen=tcp://127.0.0.1:" in out and "seed=3" in out
    assert "rates direction: delay 40 ms ± 0 ms, loss 5 %" in out
    assert "state direction: delay 40 ms ± 0 ms, stall 100 ms at 1 s, every 2 s" in out
    assert "rates (runtime → target): 0 received" in out
    data = json.loads(report.read_text())
    assert data["seed"] == 3 and data["rates"]["received"] == 0 and "kinds" in data["state"]


@pytest.mark.parametrize("argv, words", [
    (["--listen", "tcp://0.0.0.0:47812"], "refusing to bind"),
    (["--target", "tcp://192.168.1.20:47810"], "refusing to connect"),
    (["--loss", "150%"], "[loss]"),
    (["--delay", "sideways=10ms"], "direction"),
])
def test_bad_options_are_refused_cleanly(argv, words, capsys) -> None:
    assert main(["relay", "--listen", "tcp://127.0.0.1:*", "--duration", "0.1", *argv]) == 2
    assert words in capsys.readouterr().err


def test_signals_start_a_stall_and_the_waiting_faults(tmp_path) -> None:
    """SIGUSR1 starts the on-demand stalls, SIGUSR2 the faults that wait for a signal; each
    is announced with its time on the monotonic clock (the fault suite keys on these lines)."""
    out = tmp_path / "relay.out"
    with out.open("w") as log:
        proc = subprocess.Popen([sys.executable, "-m", "runtime.cli", "relay", "--listen",
                                 "tcp://127.0.0.1:*", "--target", "tcp://127.0.0.1:9",
                                 "--stall", "state=100ms", "--loss", "rates=50%",
                                 "--faults-from", "signal", "--duration", "20"],
                                stdout=log, stderr=subprocess.STDOUT, env=child_env())
    try:
        def wait_for(pattern: str) -> re.Match:
            deadline = time.monotonic() + 15.0
            while time.monotonic() < deadline:
                m = re.search(pattern, out.read_text())
                if m:
                    return m
                time.sleep(0.01)
            pytest.fail(f"no {pattern!r} in:\n{out.read_text()}")

        def event_ns(text: str) -> int:
            return int(wait_for(re.escape(text) + r" t_ns=(\d+)").group(1))
        wait_for("jogwire relay ready")
        assert "rates direction: loss 50 %, from a signal on" in out.read_text()
        sent = time.monotonic_ns()
        proc.send_signal(signal.SIGUSR1)
        stalled = event_ns("state direction stalled")
        flowing = event_ns("state direction flowing again")
        assert sent <= stalled and 0.09e9 <= flowing - stalled <= 0.2e9
        proc.send_signal(signal.SIGUSR2)
        assert event_ns("rates direction faults on") >= flowing
    finally:
        proc.terminate()
        proc.wait(10)
    assert proc.returncode == 0
    assert "jogwire relay: 0 peers connected, 0 gone" in out.read_text()
