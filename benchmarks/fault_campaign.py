"""The fault campaign: every fault of the suite, repeated, and the table of docs/FAULTS.md.

Each repeat is a fresh set of processes on 127.0.0.1 — the simulated elbow6 (paced, 1 kHz),
`jogwire relay`, `jogwire drive --headless` playing tests/faults/fault_motion.toml — with one
fault injected mid-motion (tests/faults/faultkit.py says what is measured and how).

A repeat counts only if the arm was moving when the fault came and the runtime's loop did not
stop the motion for its own overruns (a busy machine, not the fault; the starved loop
excepted): those runs are retried and reported as "disturbed".

    python benchmarks/fault_campaign.py [--repeats 20] [--only NAME …] [--json FILE]
                                        [--update-doc]

--update-doc rewrites the table between the campaign markers in docs/FAULTS.md.
JOGWIRE_FAULT_RATE_HZ sets the runtime's loop rate (default 250 Hz, as the test suite);
JOGWIRE_FAULT_REALTIME=0 runs every process at normal priority.
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
                    f"bound {r.bound_s * 1e3:.1f} ms, bad acted on {r.bad_acted_on}, restarted "
                    f"{r.restarted} ({time.monotonic() - t:.1f} s)"
                    + ("" if r.exercised else f": {'; '.join(r.notes)}"))
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
        "name": name, "fault": runs[0]["fault"] if runs else name,
        "n": len(runs), "disturbed": data["disturbed"],
        "measured_from": sorted({r["measured_from"] for r in runs}),
        "stopped": len(stops),
        "stop_median_s": statistics.median(stops) if stops else None,
        "stop_worst_s": max(stops) if stops else None,
        "bound_min_s": min(bounds) if bounds else None,
        "bound_max_s": max(bounds) if bounds else None,
        "within_bound": sum(r["within_bound"] for r in runs),
        "restarted": sum(r["restarted"] for r in runs),
        "bad_at_arm": sum(r["applied_backwards"] + r["garbage_acted_on"] for r in runs),
        "bad_at_runtime": sum(r["runtime_used_older"] + r["runtime_used_unknown"]
                              for r in runs),
        "records_lost": sum(r["records_lost_before_fault"] for r in runs),
        "tail_lost_worst_s": max((r["tail_lost_s"] for r in runs
                                  if r["tail_lost_s"] is not None), default=None),
        "peak_speed_worst": max((r["peak_speed"] for r in runs
                                 if r["peak_speed"] is not None), default=None),
        "figures": _ranges(r["figures"] for r in runs),
        "arm_dropped": _sum_counts(r["arm_dropped"] for r in runs),
        "runtime_dropped": _sum_counts(r["runtime_dropped"] for r in runs),
    }


def _sum_counts(dicts) -> dict[str, int]:
    total: dict[str, int] = {}
    for d in dicts:
        for k, v in d.items():
            total[k] = total.get(k, 0) + v
    return dict(sorted(total.items()))


def _ranges(dicts) -> dict[str, tuple[float, float]]:
    """Each fault-specific figure's (min, max) over the runs."""
    out: dict[str, tuple[float, float]] = {}
    for d in dicts:
        for k, v in d.items():
            lo, hi = out.get(k, (v, v))
            out[k] = (min(lo, v), max(hi, v))
    return out


def _also(s: dict) -> str:
    """What only this fault has, over all runs, in words."""
    f, parts = s["figures"], []
    if s["peak_speed_worst"] is not None:
        parts.append(f"arm never moved: peak joint speed {s['peak_speed_worst']:.0e} rad/s")
    if "round_trip_shown_s" in f:
        lo, hi = f["round_trip_shown_s"]
        parts.append(f"runtime showed round trip {lo * 1e3:.0f}–{hi * 1e3:.0f} ms")
    if "in_flight_s" in f:
        parts.append(f"last state in ≤ {f['in_flight_s'][1] * 1e3:.0f} ms after the kill "
                     "(in the bound)")
    if s["tail_lost_worst_s"] is not None:
        parts.append(f"unflushed tail ≤ {s['tail_lost_worst_s'] * 1e3:.0f} ms")
    if "unreadable_bytes" in f:
        parts.append(f"≤ {f['unreadable_bytes'][1]:.0f} B unreadable at the end of the log "
                     f"(a record is ≈ {f['record_bytes'][0]:.0f} B)")
    if "applied_per_s_after" in f:
        parts.append(f"rates applied/s after the disk filled "
                     f"{f['applied_per_s_after'][0]:.0f}–{f['applied_per_s_after'][1]:.0f} "
                     f"(before {f['applied_per_s_before'][0]:.0f}–"
                     f"{f['applied_per_s_before'][1]:.0f})")
    if "observer_missed" in f:
        parts.append(f"observer missed ≤ {f['observer_missed'][1]:.0f} states in a run "
                     "(unknown-q check partial there)")
    if "longest_streak" in f:
        parts.append(f"overrun streak up to {f['longest_streak'][1]:.0f}")
    return "; ".join(parts) or "—"


def table(summaries: list[dict]) -> str:
    rows = ["| fault | from | n | stopped | stop median / worst (ms) | bound (ms) | within "
            "bound | restarts | bad acted on (arm / runtime) | records lost | dropped at the "
            "arm / runtime (all runs) | also measured |",
            "|---|---|---|---|---|---|---|---|---|---|---|---|"]
    for s in summaries:
        arm = ", ".join(f"{k} {v}" for k, v in s["arm_dropped"].items()) or "—"
        rt = ", ".join(f"{k} {v}" for k, v in s["runtime_dropped"].items() if v) or "—"
        n = f"{s['n']} (+{s['disturbed']} disturbed)" if s["disturbed"] else str(s["n"])
        lo, hi = _ms(s["bound_min_s"]), _ms(s["bound_max_s"])
        rows.append(
            f"| {s['fault']} (`{s['name']}`) | {'/'.join(s['measured_from'])} | {n} | "
            f"{s['stopped']}/{s['n']} | {_ms(s['stop_median_s'])} / {_ms(s['stop_worst_s'])} | "
            f"{lo if lo == hi else f'{lo}–{hi}'} | {s['within_bound']}/{s['n']} | "
            f"{s['restarted']} | {s['bad_at_arm']} / {s['bad_at_runtime']} | "
            f"{s['records_lost']} | {arm} / {rt} | {_also(s)} |")
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
    parts: list[dict] = []          # --table-from: what each earlier campaign said of itself
    if args.table_from:
        results = {}
        for path in args.table_from:
            saved = json.loads(Path(path).read_text())
            results.update(saved["runs"])
            parts.append(saved)
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
              f"stale_after {faultkit.STALE_AFTER_S * 1e3:g} ms, "
              + ("`drive --realtime` and the simulated arm at SCHED_FIFO "
                 f"{faultkit.ARM_PRIORITY}" if faultkit.REALTIME else "normal priorities"))
    if args.table_from:
        loads = ", ".join(f"{q['load_end']:.1f}" for q in parts if "load_end" in q)
        took = sum(q.get("elapsed_s", 0.0) for q in parts)
        header += (f", in {len(parts)} parts (`--only`, the table made from their runs with "
                   f"`--table-from`); load average at the end of each part {loads or '—'}, "
                   f"{took:.0f} s in all.")
    else:
        header += (f"; load average at the end {load[0]:.1f}, "
                   f"{time.monotonic() - started:.0f} s in all.")
    print()
    print(header)
    print()
    print(text)
    if args.json and not args.table_from:
        Path(args.json).write_text(json.dumps({"header": header, "load_end": load[0],
                                               "elapsed_s": time.monotonic() - started,
                                               "summaries": summaries, "runs": results},
                                              indent=1, default=str))
    if args.update_doc:
        update_doc(text, header)
    return 0


if __name__ == "__main__":
    sys.exit(main())
