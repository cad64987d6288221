"""The fault campaign: every fault of the suite, repeated, and the table of docs/FAULTS.md.

Each repeat is a fresh set of processes on 127.0.0.1 — the simulated elbow6 (paced, 1 kHz),
`jogwire relay`, `jogwire drive --headless` playing tests/faults/fault_motion.toml — with one
fault injected mid-motion (tests/faults/faultkit.py says what is measured and how).

A repeat counts only if the arm was moving when the fault came and the runtime's loop did not
stop the motion for its own overruns just before (a busy machine): those runs are retried and
reported as "disturbed".

    python benchmarks/fault_campaign.py [--repeats 20] [--only NAME …] [--json FILE]
                                        [--update-doc]

--update-doc rewrites the table between the campaign markers in docs/FAULTS.md.
JOGWIRE_FAULT_RATE_HZ sets the runtime's loop rate (default 250 Hz, as the test suite).
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import signal
import statistics
import sys
import tempfile
import time
from datetime import datetime
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests" / "faults"))

import faultkit  # noqa: E402

DOC = ROOT / "docs" / "FAULTS.md"
BEGIN, END = "<!-- campaign table: begin -->", "<!-- campaign table: end -->"


def run_campaign(names: list[str], repeats: int, max_attempts: int, log,
                 save=lambda results: None) -> dict:
    """Run each fault until `repeats` runs exercised it (at most max_attempts runs);
    `save(results so far)` after each fault."""
    out: dict[str, dict] = {}
    with tempfile.TemporaryDirectory(prefix="jogwire-faults-") as tmp:
        for name in names:
            runs, disturbed, attempt = [], 0, 0
            while len(runs) < repeats and attempt < max_attempts:
                attempt += 1
                t = time.monotonic()
                try:
                    r = faultkit.FAULTS[name](Path(tmp) / f"{name}-{attempt}", seed=attempt)
                except faultkit.Disturbed as exc:
                    disturbed += 1
                    log(f"{name} #{attempt}: disturbed ({exc})")
                    continue
                if r.exercised:
                    runs.append(r.as_dict())
                else:
                    disturbed += 1
                stop = "—" if r.stop_s is None else f"{r.stop_s * 1e3:.1f} ms"
                log(f"{name} #{attempt}: {'ok' if r.exercised else 'disturbed'} stop {stop} "
                    f"bound {r.bound_s * 1e3:.1f} ms ({time.monotonic() - t:.1f} s)")
            out[name] = {"runs": runs, "disturbed": disturbed}
            save(out)
    return out


def _ms(x: float | None) -> str:
    return "—" if x is None else f"{x * 1e3:.0f}"


def summarize(name: str, data: dict) -> dict:
    runs = data["runs"]
    stops = [r["stop_s"] for r in runs if r["stop_s"] is not None]
    bounds = [r["bound_s"] for r in runs]
    return {
        "fault": runs[0]["fault"] if runs else name,
        "n": len(runs), "disturbed": data["disturbed"],
        "measured_from": sorted({r["measured_from"] for r in runs}),
        "stopped": len(stops),
        "stop_median_s": statistics.median(stops) if stops else None,
        "stop_worst_s": max(stops) if stops else None,
        "bound_max_s": max(bounds) if bounds else None,
        "within_bound": sum(r["within_bound"] for r in runs),
        "restarted": sum(r["restarted"] for r in runs),
        "overrun_stops": None if all(r.get("overrun_stop") is None for r in runs)
        else sum(bool(r.get("overrun_stop")) for r in runs),
        "applied_backwards": sum(r["applied_backwards"] for r in runs),
        "garbage_acted_on": sum(r["garbage_acted_on"] for r in runs),
        "records_lost": sum(r["records_lost_before_fault"] for r in runs),
        "tail_lost_worst_s": max((r["tail_lost_s"] for r in runs
                                  if r["tail_lost_s"] is not None), default=None),
        "arm_dropped": _sum_counts(r["arm_dropped"] for r in runs),
        "runtime_dropped": _sum_counts(r["runtime_dropped"] for r in runs),
    }


def _sum_counts(dicts) -> dict[str, int]:
    total: dict[str, int] = {}
    for d in dicts:
        for k, v in d.items():
            total[k] = total.get(k, 0) + v
    return dict(sorted(total.items()))


def table(summaries: list[dict]) -> str:
    rows = ["| fault | from | n | stopped | stop median / worst (ms) | bound (ms) | within "
            "bound | overrun stops | restarts | bad acted on | dropped at the arm / runtime "
            "(all runs) |",
            "|---|---|---|---|---|---|---|---|---|---|---|"]
    for s in summaries:
        bad = s["applied_backwards"] + s["garbage_acted_on"]
        arm = ", ".join(f"{k} {v}" for k, v in s["arm_dropped"].items()) or "—"
        rt = ", ".join(f"{k} {v}" for k, v in s["runtime_dropped"].items() if v) or "—"
        n = f"{s['n']} (+{s['disturbed']} disturbed)" if s["disturbed"] else str(s["n"])
        rows.append(
            f"| {s['fault']} | {'/'.join(s['measured_from'])} | {n} | "
            f"{s['stopped']}/{s['n']} | {_ms(s['stop_median_s'])} / {_ms(s['stop_worst_s'])} | "
            f"{_ms(s['bound_max_s'])} | {s['within_bound']}/{s['n']} | "
            f"{'—' if s['overrun_stops'] is None else s['overrun_stops']} | "
            f"{s['restarted']} | "
            f"{bad} | {arm} / {rt} |")
    return "\n".join(rows)


def update_doc(text: str, header: str) -> None:
    doc = DOC.read_text(encoding="utf-8")
    if BEGIN not in doc or END not in doc:
        raise SystemExit(f"{DOC} has no campaign markers")
    before, rest = doc.split(BEGIN, 1)
    _, after = rest.split(END, 1)
    DOC.write_text(f"{before}{BEGIN}\n{header}\n\n{text}\n{END}{after}", encoding="utf-8")


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--repeats", type=int, default=20)
    p.add_argument("--max-attempts", type=int, default=None,
                   help="give up on a fault after this many runs (default 2 × repeats)")
    p.add_argument("--only", nargs="+", choices=sorted(faultkit.FAULTS), default=None)
    p.add_argument("--json", metavar="FILE", help="write every run's figures as JSON")
    p.add_argument("--update-doc", action="store_true",
                   help=f"rewrite the table in {DOC.relative_to(ROOT)}")
    p.add_argument("--table-from", nargs="+", metavar="FILE",
                   help="no runs: make the table from --json files of earlier campaigns (a "
                        "later file's runs of a fault replace an earlier file's)")
    args = p.parse_args()
    # SIGTERM unwinds like Ctrl-C, so the running set of processes is stopped too.
    signal.signal(signal.SIGTERM, lambda *_: sys.exit(143))
    started = time.monotonic()
    if args.table_from:
        results = {}
        for path in args.table_from:
            results.update(json.loads(Path(path).read_text())["runs"])
        names = [n for n in (args.only or faultkit.FAULTS) if n in results]
    else:
        names = args.only or list(faultkit.FAULTS)

        def save(results: dict) -> None:
            if args.json:
                Path(args.json).write_text(json.dumps({"runs": results}, indent=1,
                                                      default=str))
        results = run_campaign(names, args.repeats, args.max_attempts or 2 * args.repeats,
                               lambda line: print(line, flush=True), save)
    summaries = [summarize(n, results[n]) for n in names]
    text = table(summaries)
    load = os.getloadavg()
    header = (f"Measured {datetime.now():%Y-%m-%d} with `python benchmarks/fault_campaign.py "
              f"--repeats {args.repeats}` on {os.cpu_count()} cores ({platform.machine()}, "
              f"Python {platform.python_version()}), runtime loop {faultkit.RATE_HZ:g} Hz, "
              f"stale_after {faultkit.STALE_AFTER_S * 1e3:g} ms")
    if args.table_from:
        header += " (table made from the saved runs with --table-from)."
    else:
        header += (f"; load average at the end {load[0]:.1f}, "
                   f"{time.monotonic() - started:.0f} s in all.")
    print()
    print(header)
    print()
    print(text)
    if args.json and not args.table_from:
        Path(args.json).write_text(json.dumps({"header": header, "summaries": summaries,
                                               "runs": results}, indent=1, default=str))
    if args.update_doc:
        update_doc(text, header)
    return 0


if __name__ == "__main__":
    sys.exit(main())
