"""Soak: a 10,000-point sweep with a fault about every 500 points.

The simulated bench (fast mode, invented third-order loop, a little noise) is served on
loopback TCP and reached through pyvisa-py; the runner sweeps 10,000 log-spaced points
while a watcher thread injects one fault (dropped connection, late reply, garbage
reply, pushed SCPI error, in turn) every ~500 points. At the end it checks every point
is on disk exactly once and reports wall time, peak RSS and the RSS at 10 % and 100 %
of the sweep (flat memory = no growth per point).

Run: ``python benchmarks/bench_soak.py [--points 10000] [--every 500]``
"""

from __future__ import annotations

import argparse
import resource
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

from loopwright.procedure.runner import RunOptions, run_procedure
from loopwright.store import load_run
from mock_instruments.bench import Impairments, SimulatedBench
from mock_instruments.duts import load_dut
from mock_instruments.server import serve_bench


def rss_mib() -> float:
    """Resident set size now, MiB (from /proc)."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--points", type=int, default=10_000)
    parser.add_argument("--every", type=int, default=500)
    args = parser.parse_args()
    work = Path(tempfile.mkdtemp(prefix="loopwright-soak-"))
    bench = SimulatedBench(load_dut("rational"), Impairments(noise_v_rms=(1e-4, 1e-4)), seed=1)
    server = serve_bench(bench, {"generator": "generator-source-tree", "scope": "scope-block"})
    bench_file = work / "bench.yaml"
    bench_file.write_text(
        f"generator:\n  resource: '{server.resources['generator']}'\n"
        f"scope:\n  resource: '{server.resources['scope']}'\n"
        "timeout_s: 1.0\nmax_amplitude_vpp: 1.0\nmax_frequency_hz: 1.0e6\n")
    procedure = work / "soak.yaml"
    procedure.write_text(
        "name: soak\nsign: 1\nmethod: broken_loop\nsteps:\n  - kind: sweep\n"
        f"    start_hz: 100\n    stop_hz: 100000\n    count: {args.points}\n"
        "    amplitude_vpp: 0.2\n    settle_s: 0\n    settle_cycles: 0\n"
        "    cycles_per_record: 4\n    min_samples: 256\n")
    out = work / "runs"
    faults = [
        ("drop connection", lambda: server.instruments["scope"].faults.drop_connection(2)),
        ("late reply", lambda: server.instruments["scope"].faults.delay_reply(1.5, 2)),
        ("garbage reply", lambda: server.instruments["scope"].faults.garbage_reply(2)),
        ("pushed error", lambda: server.instruments["generator"].faults.push_error(-310)),
    ]
    injected: list[tuple[int, str]] = []
    samples: list[tuple[int, float]] = []
    stop = threading.Event()

    def watch() -> None:
        next_fault = args.every
        while not stop.is_set():
            files = list(out.glob("*/points.csv"))
            if files:
                with files[0].open("rb") as handle:
                    rows = sum(chunk.count(b"\n") for chunk in iter(
                        lambda: handle.read(1 << 20), b"")) - 1
                samples.append((rows, rss_mib(), sys.getallocatedblocks()))
                if rows >= next_fault:
                    name, arm = faults[len(injected) % len(faults)]
                    arm()
                    injected.append((rows, name))
                    next_fault += args.every
            time.sleep(0.2)

    watcher = threading.Thread(target=watch, daemon=True)
    watcher.start()
    started = time.perf_counter()
    outcome = run_procedure(procedure, bench_file,
                            RunOptions(out_dir=out, quiet=True, assume_yes=True,
                                       render_report=False))
    wall_s = time.perf_counter() - started
    stop.set()
    watcher.join()
    server.close()
    points = load_run(outcome.run_dir).points
    peak_mib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    early = [(rss, blocks) for rows, rss, blocks in samples if rows >= args.points // 10]
    rss_10, blocks_10 = early[0] if early else (float("nan"), 0)
    rss_end, blocks_end = (samples[-1][1], samples[-1][2]) if samples else (float("nan"), 0)
    planned = np.geomspace(100, 100000, args.points)
    on_disk_once = (len(points) == args.points and points["frequency_hz"].is_unique
                    and np.allclose(np.sort(points["frequency_hz"]), planned, rtol=1e-12))
    print(f"status: {outcome.status}; points on disk: {len(points)} of {args.points};"
          f" each exactly once: {on_disk_once}")
    recoveries = load_run(outcome.run_dir).manifest.get("recoveries", [])
    print(f"recoveries recorded in the manifest: {len(recoveries)}")
    print(f"faults injected: {len(injected)} ({', '.join(sorted({n for _, n in injected}))})")
    print(f"wall time: {wall_s:.1f} s ({1000 * wall_s / args.points:.1f} ms per point)")
    print(f"RSS at 10 %: {rss_10:.1f} MiB; at the end: {rss_end:.1f} MiB;"
          f" peak RSS: {peak_mib:.1f} MiB")
    rows_between = max(1, samples[-1][0] - args.points // 10) if samples else 1
    print(f"Python heap blocks (runner and simulated bench share this process): "
          f"{blocks_10} at 10 %, {blocks_end} at the end, "
          f"{(blocks_end - blocks_10) / rows_between:.1f} blocks per point")
    print(f"output off confirmed: {outcome.output_off}; run folder: {outcome.run_dir}")


if __name__ == "__main__":
    main()
