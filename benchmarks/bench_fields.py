"""Cubical curves of volumes: chitally in process, on a 2-worker LocalCluster, and gudhi.

The volume is our own scenario: eight plane waves of seeded random directions (a smooth
field, one period about 64 entries) plus seeded Gaussian noise (sigma 0.5), float32,
computed block by block from global coordinates so that any block is made without the
rest. ``--quantum Q`` rounds values to multiples of Q (ties, as in scanner data: 2**-8
leaves about 2000 distinct values); 0 keeps every float32 (a 256^3 volume then has about
15 million distinct values, and so does its exact curve).

Parts:

a) 256^3 in memory: `field_curve` in process, the `field` kind on a 2-worker LocalCluster
   (one thread each; the volume as a .npy the workers map), and gudhi's cubical route
   (``CubicalComplex(top_dimensional_cells=...)`` or ``vertices=...``, then
   ``compute_persistence``; chi(t) = sum_d (-1)^d #intervals of dimension d alive at t).
   The three curves are compared exactly at every scale where any of them can jump (the
   union of chitally's jump scales and gudhi's births and deaths) and on a grid of 1001
   scales; the script stops on any difference. Each runs in a child process of its own,
   so its peak resident set (VmHWM) is its alone.
b) 1024^3 in a Zarr v3 store written chunk by chunk (chunks 128^3; never whole in
   memory), then ``chitally field STORE --run RUN --workers 2 --threads 1``: the CLI on
   its embedded LocalCluster. Total time, the driver's peak RSS (the CLI process, which
   also hosts the LocalCluster's scheduler and nannies) and each worker's peak RSS.
   gudhi is not run here: its bitmap holds every cell of the (2n+1)^3 grid as a double,
   about 8.6 * 10^9 cells (64 GiB) for n = 1024, on top of the 4 GiB array it is built from.
c) the same store, workers limited to 1 GiB each: a LocalCluster started here with
   ``memory_limit="1GiB"`` (the CLI has no option for it), the CLI run with ``--scheduler``;
   the curve must equal part b's (digest), and no worker may have been restarted.

    python benchmarks/bench_fields.py --part a                      # 256^3, cells and vertices
    nice python benchmarks/bench_fields.py --part bc --size 1024    # b then c, 1024^3
    python benchmarks/bench_fields.py --part bc --size 512 --keep   # smaller, keep the stores

Figures go with the machine's load (printed); ratios are measured within one run.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np

CHUNK = 128
WAVES = 8
GIB = 2.0**30


# ---------------------------------------------------------------------------- the volume

def volume_block(lo: tuple[int, ...], shape: tuple[int, ...], seed: int, quantum: float) -> np.ndarray:
    """Entries ``lo .. lo + shape`` of the volume (float32), made from global coordinates:
    the waves are the same everywhere, the noise is seeded by the block's corner."""
    rng = np.random.default_rng([seed, 0xF1E1D])
    w = rng.normal(size=(WAVES, 3)) * (2 * np.pi / 64)
    phi = rng.uniform(0, 2 * np.pi, WAVES)
    ax = [np.arange(l, l + s, dtype=np.float64) for l, s in zip(lo, shape)]
    out = np.zeros(shape, np.float32)
    for (a, b, c), p in zip(w, phi):
        # cos(ax + by + cz + p) = Re(e^{iax} e^{iby} e^{i(cz+p)}): three 1-D factors
        ex = np.exp(1j * a * ax[0]).astype(np.complex64)[:, None, None]
        ey = np.exp(1j * b * ax[1]).astype(np.complex64)[None, :, None]
        ez = np.exp(1j * (c * ax[2] + p)).astype(np.complex64)[None, None, :]
        out += ((ex * ey) * ez).real
    out *= np.float32(1 / np.sqrt(WAVES))
    noise = np.random.default_rng([seed, *lo]).standard_normal(shape, dtype=np.float32)
    out += noise * np.float32(0.5)
    if quantum:
        out = (np.round(out / quantum) * quantum).astype(np.float32)
    return out


def volume(n: int, seed: int, quantum: float) -> np.ndarray:
    """The n^3 volume in memory, made by the same blocks as the Zarr store."""
    out = np.empty((n, n, n), np.float32)
    for lo in np.ndindex(*(-(-n // CHUNK),) * 3):
        lo = tuple(int(k) * CHUNK for k in lo)
        shape = tuple(min(CHUNK, n - l) for l in lo)
        out[tuple(slice(l, l + s) for l, s in zip(lo, shape))] = volume_block(lo, shape, seed, quantum)
    return out


def write_zarr(path: Path, n: int, seed: int, quantum: float) -> float:
    """Write the n^3 volume chunk by chunk into a Zarr v3 array (once: a finished store
    carries the attribute ``complete``). Returns the seconds spent."""
    import zarr

    if path.exists():
        arr = zarr.open_array(str(path), mode="r")
        if arr.attrs.get("complete"):
            return 0.0
        shutil.rmtree(path)
    t0 = time.perf_counter()
    arr = zarr.create_array(str(path), shape=(n, n, n), chunks=(CHUNK,) * 3, dtype="float32")
    for lo in np.ndindex(*(-(-n // CHUNK),) * 3):
        lo = tuple(int(k) * CHUNK for k in lo)
        shape = tuple(min(CHUNK, n - l) for l in lo)
        arr[tuple(slice(l, l + s) for l, s in zip(lo, shape))] = volume_block(lo, shape, seed, quantum)
    arr.attrs.update({"complete": True, "seed": seed, "quantum": quantum})
    return time.perf_counter() - t0


# ---------------------------------------------------------------------------- measuring

def vm_hwm(pid: int | str = "self") -> int:
    """Peak resident set (VmHWM) of a process, in bytes (0 if it is gone)."""
    try:
        with open(f"/proc/{pid}/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return 0


def cpu_seconds() -> float:
    t = os.times()
    return t.user + t.system


class TreePeaks:
    """Polls the VmHWM of every descendant of a process (a high-water mark: any reading
    after the peak sees it) until stopped."""

    def __init__(self, pid: int, every: float = 0.25) -> None:
        import psutil

        self.root = psutil.Process(pid)
        self.every = every
        self.peaks: dict[int, tuple[str, int]] = {}
        self.cpu: dict[int, float] = {}
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._poll, daemon=True)
        self._thread.start()

    def _poll(self) -> None:
        while not self._stop.is_set():
            try:
                kids = self.root.children(recursive=True)
            except Exception:  # the root has exited
                kids = []
            for k in kids:
                peak = vm_hwm(k.pid)
                if peak:
                    try:
                        name = " ".join(k.cmdline())[:80]
                    except Exception:
                        name = self.peaks.get(k.pid, ("?", 0))[0]
                    self.peaks[k.pid] = (name, max(peak, self.peaks.get(k.pid, ("", 0))[1]))
                try:
                    t = k.cpu_times()
                    self.cpu[k.pid] = max(self.cpu.get(k.pid, 0.0), t.user + t.system)
                except Exception:  # gone between the listing and the reading
                    pass
            self._stop.wait(self.every)

    def stop(self) -> tuple[dict[int, tuple[str, int]], dict[int, float]]:
        self._stop.set()
        self._thread.join()
        return self.peaks, self.cpu


def load() -> str:
    return "load average " + ", ".join(f"{x:.2f}" for x in os.getloadavg())


# ---------------------------------------------------------------------------- part a children

def child_inproc(npy: str, construction: str, out: str) -> dict:
    from chitally.cubical import field_curve

    arr = np.load(npy)
    base = vm_hwm()
    t0, c0 = time.perf_counter(), cpu_seconds()
    curve = field_curve(arr, construction)
    res = {"seconds": time.perf_counter() - t0, "cpu": cpu_seconds() - c0, "peak": vm_hwm(), "before": base}
    curve.save(out)
    return {**res, "digest": curve.digest(), "jumps": curve.n_jumps}


def child_cluster(npy: str, construction: str, store: str, out: str) -> dict:
    from chitally.jobs.field import FieldParams, create_or_open
    from chitally.runs import Session, Where

    stamps: dict[str, float] = {}
    t0 = time.perf_counter()
    with Session(Where(workers=2, threads=1),
                 on_connect=lambda conn: stamps.setdefault("connected", time.perf_counter())) as session:
        rs = create_or_open(store, npy, FieldParams.checked(construction))
        t_plan = time.perf_counter() - t0
        report = session.run(rs)
        t_all = time.perf_counter() - t0
        workers = sorted(session.conn.client.run(vm_hwm).values())
        workers_cpu = sum(session.conn.client.run(cpu_seconds).values())
    records = [rs.commits.record(t) for t in range(rs.n_tasks)]
    curve = report.result
    curve.save(out)
    return {"seconds": t_all, "plan": t_plan, "after_start": t_all - (stamps["connected"] - t0),
            "tasks": rs.n_tasks, "block": rs.attrs["block"],
            "task_seconds": sum(float(r["seconds"]) for r in records),
            "peak": vm_hwm(), "worker_peaks": workers, "cpu": cpu_seconds(), "workers_cpu": workers_cpu,
            "digest": curve.digest(), "jumps": curve.n_jumps}


def child_gudhi(npy: str, construction: str, out: str) -> dict:
    import gudhi

    a = np.load(npy).astype(np.float64)  # gudhi's filtration values are doubles: same values
    base = vm_hwm()
    t0, c0 = time.perf_counter(), cpu_seconds()
    if construction == "cells":
        cc = gudhi.CubicalComplex(top_dimensional_cells=a)
    else:
        cc = gudhi.CubicalComplex(vertices=a)
    t1 = time.perf_counter()
    cc.compute_persistence(homology_coeff_field=2)
    t2 = time.perf_counter()
    intervals = {f"d{d}": np.asarray(cc.persistence_intervals_in_dimension(d), np.float64).reshape(-1, 2)
                 for d in range(a.ndim + 1)}
    t3 = time.perf_counter()
    np.savez(out, **intervals)
    return {"seconds": t3 - t0, "cpu": cpu_seconds() - c0, "build": t1 - t0, "persistence": t2 - t1,
            "readout": t3 - t2, "peak": vm_hwm(), "before": base, "cells": int(cc.num_simplices()),
            "intervals": {k: int(v.shape[0]) for k, v in intervals.items()}}


def gudhi_chi(intervals: dict[str, np.ndarray], scales: np.ndarray) -> np.ndarray:
    """chi(t) = sum_d (-1)^d #{intervals of dimension d with birth <= t < death}
    (Euler-Poincare at every scale), counted with sorted births and deaths."""
    out = np.zeros(scales.size, np.int64)
    for key, iv in intervals.items():
        d = int(key[1:])
        births, deaths = np.sort(iv[:, 0]), np.sort(iv[:, 1])
        alive = np.searchsorted(births, scales, side="right") - np.searchsorted(deaths, scales, side="right")
        out += (-1) ** d * alive
    return out


def run_child(args: list[str]) -> dict:
    res = subprocess.run([sys.executable, __file__, "--child", *args], capture_output=True, text=True)
    if res.returncode != 0:
        raise SystemExit(f"child {args[0]} failed ({res.returncode}):\n{res.stderr[-4000:]}")
    return json.loads(res.stdout.strip().splitlines()[-1])


def part_a(args: argparse.Namespace, folder: Path) -> None:
    from chitally.curve import Curve

    n = args.size or 256
    work = folder / f"a-{n}-{time.time_ns()}"
    work.mkdir(parents=True)
    try:
        t0 = time.perf_counter()
        arr = volume(n, args.seed, args.quantum)
        npy = work / "volume.npy"
        np.save(npy, arr)
        distinct = int(np.unique(arr).size)
        print(f"(a) volume {n}^3 float32 ({arr.nbytes / GIB:.2f} GiB), quantum {args.quantum or 'none'}: "
              f"{distinct} distinct values on [{arr.min():g}, {arr.max():g}] (made in "
              f"{time.perf_counter() - t0:.1f} s); {load()}")
        del arr
        for construction in args.constructions.split(","):
            ours = run_child(["inproc", str(npy), construction, str(work / f"in-{construction}.npz")])
            dist = run_child(["cluster", str(npy), construction, str(work / f"run-{construction}.zarr"),
                              str(work / f"run-{construction}.npz")])
            theirs = run_child(["gudhi", str(npy), construction, str(work / f"g-{construction}.npz")])
            c_in = Curve.load(work / f"in-{construction}.npz")
            c_run = Curve.load(work / f"run-{construction}.npz")
            with np.load(work / f"g-{construction}.npz") as z:
                intervals = {k: z[k] for k in z.files}
            finite = [iv[np.isfinite(iv)] for iv in intervals.values()]
            scales = np.unique(np.concatenate([c_in.values, *finite]))
            scales = scales[(scales >= c_in.start) & (scales <= c_in.eps)]
            grid = np.linspace(c_in.start, c_in.eps, 1001)
            same_run = c_in.digest() == c_run.digest()
            agree = (np.array_equal(c_in.at(scales), gudhi_chi(intervals, scales))
                     and np.array_equal(c_in.at(grid), gudhi_chi(intervals, grid)))
            print(f"  {construction}: {c_in.n_jumps} jumps; chi(end) {c_in.final}; in process = 2-worker run: "
                  f"{same_run}; = gudhi at all {scales.size} jump scales and a 1001-point grid: {agree}")
            if not (same_run and agree):
                raise SystemExit(f"{construction}: the curves differ")
            print(f"    chitally in process (field_curve):   {ours['seconds']:7.2f} s  cpu {ours['cpu']:7.2f} s  "
                  f"peak RSS {ours['peak'] / GIB:.2f} GiB ({ours['before'] / GIB:.2f} with the volume loaded)")
            print(f"    chitally 2-worker LocalCluster:      {dist['seconds']:7.2f} s  ({dist['after_start']:.2f} s "
                  f"after the cluster started; {dist['tasks']} tasks of {dist['block']}, "
                  f"{dist['task_seconds']:.2f} s task time; cpu: driver {dist['cpu']:.2f} s, workers "
                  f"{dist['workers_cpu']:.2f} s with their start); driver peak {dist['peak'] / GIB:.2f} GiB, "
                  f"workers {', '.join(f'{p / GIB:.2f}' for p in dist['worker_peaks'])} GiB")
            print(f"    gudhi CubicalComplex + persistence:  {theirs['seconds']:7.2f} s  cpu {theirs['cpu']:7.2f} s  "
                  f"(build {theirs['build']:.2f}, persistence {theirs['persistence']:.2f}, intervals out "
                  f"{theirs['readout']:.2f}); {theirs['cells']} cells; peak RSS {theirs['peak'] / GIB:.2f} GiB; "
                  f"intervals {theirs['intervals']}")
            print(f"    ratios: gudhi / chitally in process {theirs['seconds'] / ours['seconds']:.1f}x (cpu "
                  f"{theirs['cpu'] / max(ours['cpu'], 0.01):.1f}x); gudhi / 2-worker run {theirs['seconds'] / dist['seconds']:.1f}x "
                  f"({theirs['seconds'] / dist['after_start']:.1f}x after start); in process / 2-worker run "
                  f"{ours['seconds'] / dist['seconds']:.2f}x; peak RSS gudhi / chitally in process "
                  f"{theirs['peak'] / ours['peak']:.1f}x; {load()}")
    finally:
        shutil.rmtree(work, ignore_errors=True)


# ---------------------------------------------------------------------------- parts b and c

LAUNCHER = (
    "import atexit, os, sys\n"
    "def _peak():\n"
    "    with open('/proc/self/status') as f:\n"
    "        for line in f:\n"
    "            if line.startswith('VmHWM:'):\n"
    "                sys.stderr.write('DRIVER_PEAK ' + line.split()[1] + '\\n')\n"
    "    t = os.times()\n"
    "    sys.stderr.write('DRIVER_CPU ' + repr(t.user + t.system) + '\\n')\n"
    "atexit.register(_peak)\n"
    "from chitally.cli import main\n"
    "sys.argv[0] = 'chitally'\n"
    "main()\n"
)


def run_cli(cli_args: list[str]) -> dict:
    """``chitally CLI_ARGS`` in a child process: wall time, the child's own peak RSS
    (reported by the child at exit), and the peaks of its descendants (the workers of an
    embedded LocalCluster)."""
    t0 = time.perf_counter()
    proc = subprocess.Popen([sys.executable, "-c", LAUNCHER, *cli_args],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    watch = TreePeaks(proc.pid)
    out, err = proc.communicate()
    seconds = time.perf_counter() - t0
    kids, kid_cpu = watch.stop()
    if proc.returncode != 0:
        raise SystemExit(f"chitally {' '.join(cli_args)} failed ({proc.returncode}):\n{err[-4000:]}")
    peak = [int(line.split()[1]) * 1024 for line in err.splitlines() if line.startswith("DRIVER_PEAK")]
    cpu = [float(line.split()[1]) for line in err.splitlines() if line.startswith("DRIVER_CPU")]
    # LocalCluster workers are spawned interpreters; the resource tracker is not one
    workers = sorted(p for name, p in kids.values() if "spawn_main" in name)
    return {"seconds": seconds, "driver_peak": peak[-1] if peak else 0, "children": kids,
            "driver_cpu": cpu[-1] if cpu else float("nan"),
            "workers_cpu": sum(c for pid, c in kid_cpu.items() if "spawn_main" in kids.get(pid, ("", 0))[0]),
            "worker_peaks": workers, "said": [line for line in (out + err).splitlines()
                                              if line.strip() and not line.startswith("DRIVER_")]}


def store_curve(url: str):
    from chitally.runs import open_run, read_result

    return read_result(open_run(url))


def du(path: Path) -> int:
    return sum(f.stat().st_size for f in path.rglob("*") if f.is_file())


def part_b(args: argparse.Namespace, src: Path, folder: Path) -> str:
    n = args.size or 1024
    run = folder / f"run-b-{n}-{args.construction}"
    shutil.rmtree(run, ignore_errors=True)
    cli = ["field", str(src), "--construction", args.construction, "--run", str(run),
           "--workers", "2", "--threads", "1", "--no-progress"]
    print(f"(b) chitally {' '.join(cli)}   [embedded LocalCluster; {load()}]")
    got = run_cli(cli)
    curve = store_curve(str(run))
    from chitally.runs import open_run

    rs = open_run(str(run))
    print(f"  total {got['seconds']:.1f} s (cluster start, fingerprint, store, {rs.n_tasks} tasks of "
          f"{rs.attrs['block']}, reduce); curve: {curve.n_jumps} jumps, chi(end) {curve.final}, digest {curve.digest()[:16]}")
    print(f"  driver peak RSS {got['driver_peak'] / GIB:.2f} GiB (the CLI process, scheduler and nannies "
          f"included); worker peaks {', '.join(f'{p / GIB:.2f}' for p in got['worker_peaks'])} GiB; "
          f"run store {du(run) / 2**20:.1f} MiB; {load()}")
    print(f"  cpu: driver {got['driver_cpu']:.1f} s, workers {got['workers_cpu']:.1f} s in all (read "
          f"every 0.25 s until they exit)")
    for pid, (name, p) in sorted(got["children"].items()):
        print(f"    child {pid}: {p / GIB:.2f} GiB  {name}")
    print("  chitally said: " + " | ".join(line.strip() for line in got["said"][-4:])[:500])
    return curve.digest()


def part_c(args: argparse.Namespace, src: Path, folder: Path, digest_b: str | None) -> None:
    from distributed import Client, LocalCluster

    n = args.size or 1024
    run = folder / f"run-c-{n}-{args.construction}"
    shutil.rmtree(run, ignore_errors=True)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, memory_limit=args.memory_limit,
                      host="127.0.0.1", dashboard_address="127.0.0.1:0") as cluster, Client(cluster) as client:
        pids_before = client.run(os.getpid)
        base = client.run(vm_hwm)
        cpu_before = client.run(cpu_seconds)
        cli = ["field", str(src), "--construction", args.construction, "--run", str(run),
               "--scheduler", cluster.scheduler_address, "--no-progress"]
        print(f"(c) chitally {' '.join(cli)}   [2 workers, 1 thread, memory_limit={args.memory_limit}; {load()}]")
        got = run_cli(cli)
        pids_after = client.run(os.getpid)
        peaks = client.run(vm_hwm)
        cpu_workers = sum(client.run(cpu_seconds).values()) - sum(cpu_before.values())
        limits = {w: info["memory_limit"] for w, info in client.scheduler_info()["workers"].items()}
    curve = store_curve(str(run))
    same = digest_b is None or curve.digest() == digest_b
    print(f"  total {got['seconds']:.1f} s; curve: {curve.n_jumps} jumps, chi(end) {curve.final}, digest "
          f"{curve.digest()[:16]}; equals part b's: {same if digest_b else 'no part b digest'}")
    print("  chitally said: " + " | ".join(line.strip() for line in got["said"][-4:])[:500])
    print(f"  driver peak RSS {got['driver_peak'] / GIB:.2f} GiB (the CLI process; scheduler elsewhere); "
          f"worker peaks {', '.join(f'{p / GIB:.2f}' for p in sorted(peaks.values()))} GiB "
          f"(idle {', '.join(f'{p / GIB:.2f}' for p in sorted(base.values()))}); limits "
          f"{sorted(v / GIB for v in limits.values())} GiB; workers restarted: {pids_before != pids_after}; {load()}")
    print(f"  cpu: driver {got['driver_cpu']:.1f} s, workers {cpu_workers:.1f} s in all")
    if not same:
        raise SystemExit("part c's curve differs from part b's")


def main() -> None:
    if len(sys.argv) > 2 and sys.argv[1] == "--child":
        what, rest = sys.argv[2], sys.argv[3:]
        fn = {"inproc": child_inproc, "cluster": child_cluster, "gudhi": child_gudhi}[what]
        print(json.dumps(fn(*rest)))
        return
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--part", choices=["a", "b", "c", "bc", "all"], default="a")
    ap.add_argument("--size", type=int, default=None, help="Side n of the n^3 volume (a: 256, b/c: 1024).")
    ap.add_argument("--quantum", type=float, default=None,
                    help="Round values to multiples of this (0: none; default a: 0, b/c: 2**-8).")
    ap.add_argument("--constructions", default="cells,vertices", help="Part a: constructions to compare.")
    ap.add_argument("--construction", default="cells", help="Parts b and c.")
    ap.add_argument("--memory-limit", default="1GiB", help="Part c: each worker's memory limit.")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--folder", default="/work/bench-fields")
    ap.add_argument("--keep", action="store_true", help="Keep the Zarr volume and run stores.")
    args = ap.parse_args()
    folder = Path(args.folder)
    folder.mkdir(parents=True, exist_ok=True)
    if args.part in ("a", "all"):
        a_args = argparse.Namespace(**{**vars(args), "quantum": args.quantum or 0.0,
                                       "size": args.size if args.part == "a" else None})
        part_a(a_args, folder)
    if args.part in ("b", "c", "bc", "all"):
        n = args.size or 1024
        quantum = 2.0**-8 if args.quantum is None else args.quantum
        src = folder / f"volume-{n}-q{quantum:g}-s{args.seed}.zarr"
        print(f"volume {n}^3 float32 ({n**3 * 4 / GIB:.2f} GiB) into {src}, chunks {CHUNK}^3, quantum "
              f"{quantum or 'none'}; {load()}")
        made = write_zarr(src, n, args.seed, quantum)
        print(f"  written chunk by chunk in {made:.1f} s (0: already there); on disk {du(src) / GIB:.2f} GiB")
        digest_file = folder / f"digest-{src.name}-{args.construction}.txt"
        digest = None
        try:
            if args.part != "c":
                digest = part_b(args, src, folder)
                digest_file.write_text(digest)
            elif digest_file.exists():
                digest = digest_file.read_text().strip()
            if args.part != "b":
                part_c(args, src, folder, digest)
        finally:
            if not args.keep:
                for p in folder.glob(f"run-[bc]-{n}-*"):
                    shutil.rmtree(p, ignore_errors=True)
                if args.part != "b":
                    shutil.rmtree(src, ignore_errors=True)


if __name__ == "__main__":
    main()
