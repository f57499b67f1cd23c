"""Scaling and memory: the slope of cost against edges, bytes per edge, and a
memory-limited run on a LocalCluster, measured in one run of this script.

1. The scaling check (``cliquewise.analysis.scale.scale_check``, the same code as
   ``cliquewise scale``): simulated exports of one family at ``--sizes`` edges
   (default 1e5, 1e6, 1e7), each run end to end on the embedded engine. Prints the
   log-log slope of wall time and of peak RSS against edges, per stage and end to
   end, the peak RSS per edge at the largest size, and its wall time.
   Targets: end-to-end slope <= 1.10; peak RSS <= 200 bytes per edge at 1e7 edges;
   1e7 edges in under 10 minutes.
2. The memory-limited run (``--limited-edges``, default 50M; ``--skip-limited``
   leaves it out): ``cliquewise run --workers 2 --memory-limit 2GB`` (a LocalCluster
   with processes that spill to local disk) in a child process, with the resident
   memory of the whole process tree sampled every 0.2 s from ``/proc``. Prints
   whether it completed, the total peak RSS (target <= 4 GiB) and, with
   ``--compare``, whether its results tables equal an unconstrained run's, and the
   driver process's own peak per stage (from the stage manifests).

    python benchmarks/scale.py [--sizes 1e5,1e6,1e7] [--skip-limited] [--limited-edges 5e7]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
OUT = HERE / "out"


def tree_rss(root_pid: int) -> int:
    """Resident bytes of ``root_pid`` and all its descendants (Linux ``/proc``)."""
    parent: dict[int, int] = {}
    rss: dict[int, int] = {}
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            with open(f"/proc/{entry}/status") as fh:
                ppid = vm = 0
                for line in fh:
                    if line.startswith("PPid:"):
                        ppid = int(line.split()[1])
                    elif line.startswith("VmRSS:"):
                        vm = int(line.split()[1]) * 1024
            parent[int(entry)], rss[int(entry)] = ppid, vm
        except (OSError, ValueError):
            continue
    keep, frontier = {root_pid}, [root_pid]
    while frontier:
        p = frontier.pop()
        for child, pp in parent.items():
            if pp == p and child not in keep:
                keep.add(child)
                frontier.append(child)
    return sum(rss.get(p, 0) for p in keep)


def run_watched(cmd: list[str], timeout: float) -> dict:
    """Run ``cmd``, sampling the process tree's total RSS; returns wall, peak, status."""
    t = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    peak = 0
    while proc.poll() is None:
        peak = max(peak, tree_rss(proc.pid))
        if time.perf_counter() - t > timeout:
            proc.kill()
            break
        time.sleep(0.2)
    out, err = proc.communicate()
    return {"returncode": proc.returncode, "wall_seconds": time.perf_counter() - t, "peak_rss_bytes": peak,
            "stderr_tail": err.strip().splitlines()[-3:] if err.strip() else []}


def same_results(a: Path, b: Path) -> bool:
    """The results tables of two runs are equal, compared a batch of rows at a time
    (a 50M-edge run has over 200M member rows: whole tables in pandas need tens of GB)."""
    import pyarrow.parquet as pq

    for name in ("cliques.parquet", "members.parquet", "nodes.parquet"):
        fa, fb = pq.ParquetFile(a / "results" / name), pq.ParquetFile(b / "results" / name)
        if fa.metadata.num_rows != fb.metadata.num_rows or fa.schema_arrow != fb.schema_arrow:
            return False
        for x, y in zip(fa.iter_batches(batch_size=1 << 22), fb.iter_batches(batch_size=1 << 22)):
            if not x.equals(y):
                return False
    return True


def driver_peaks(run_dir: Path) -> dict:
    """Each stage's peak resident memory of the driver process alone, from the manifests
    (the workers' peaks are recorded apart: ``peak_rss_workers_bytes``)."""
    out = {}
    for stage in ("ingest", "split", "enumerate", "fit", "results"):
        man = run_dir / stage / "manifest.json"
        if man.exists():
            prof = json.loads(man.read_text())["profile"]
            out[stage] = prof.get("peak_rss_driver_bytes", prof.get("peak_rss_bytes"))
    return out


def limited_run(edges: int, memory_limit: str, workers: int, timeout: float, compare: bool) -> dict:
    from cliquewise.simulate import nodes_for_edges, simulate

    folder = OUT / f"limited-{edges}"
    if not (folder / "truth" / "summary.json").exists():
        print(f"simulating about {edges:,} edges into {folder} ...", flush=True)
        simulate(folder, nodes=nodes_for_edges(edges, seed=5), seed=5, labels="int")
    cli = [sys.executable, "-m", "cliquewise.cli", "--quiet", "run", "--edges", str(folder / "export")]
    run_dir = folder / "run-limited"
    res = run_watched(cli + ["--run-dir", str(run_dir), "--workers", str(workers), "--memory-limit", memory_limit],
                      timeout)
    res.update(edges_target=edges, memory_limit=memory_limit, workers=workers,
               completed=res["returncode"] == 0 and (run_dir / "results" / "manifest.json").exists())
    if res["completed"]:
        res["edges"] = json.loads((run_dir / "ingest" / "manifest.json").read_text())["counts"]["pairs"]
        res["driver_peak_bytes"] = driver_peaks(run_dir)
        if compare:
            free = run_watched(cli + ["--run-dir", str(folder / "run-free")], timeout)
            res["unconstrained"] = free
            res["equal_to_unconstrained"] = free["returncode"] == 0 and same_results(run_dir, folder / "run-free")
    return res


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sizes", default="1e5,1e6,1e7")
    ap.add_argument("--skip-scaling", action="store_true")
    ap.add_argument("--skip-limited", action="store_true")
    ap.add_argument("--limited-edges", type=float, default=5e7)
    ap.add_argument("--memory-limit", default="2GB")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--timeout", type=float, default=3 * 3600)
    ap.add_argument("--compare", action="store_true", help="also run the limited export unconstrained and compare")
    args = ap.parse_args()
    OUT.mkdir(exist_ok=True)
    result: dict = {}
    if not args.skip_scaling:
        from cliquewise.analysis.scale import scale_check

        sizes = [int(float(x)) for x in args.sizes.split(",")]
        res = scale_check(OUT / "scale", sizes=sizes, progress=False)
        big = res["points"][-1]
        per_edge = big["peak_rss_bytes"] / big["edges"]
        sl = res["slopes"]
        print()
        print("slopes of wall time against edges (log-log): " + ", ".join(f"{k} {v:.2f}" for k, v in sl["wall"].items()))
        print("slopes of peak RSS against edges:             " + ", ".join(
            f"{k} {v:.2f}" for k, v in sl["peak_rss"].items()))
        print(f"end to end: slope {sl['wall']['total']:.2f} (target <= 1.10); fit per iteration "
              f"{sl['fit_per_iteration']:.2f}")
        print(f"at {big['edges']:,} edges: {big['total_wall_seconds']:.0f} s (target < 600 s), peak RSS "
              f"{big['peak_rss_bytes'] / 2**30:.2f} GiB = {per_edge:.0f} bytes per edge (target <= 200), "
              f"largest stage: {max(big['stages'], key=lambda k: big['stages'][k]['peak_rss_bytes'])}")
        print(res["verdict"])
        result["scaling"] = {"slopes": sl, "bytes_per_edge": per_edge, "points": res["points"]}
    if not args.skip_limited:
        lim = limited_run(int(args.limited_edges), args.memory_limit, args.workers, args.timeout, args.compare)
        print()
        print(f"memory-limited run ({lim['workers']} workers x {lim['memory_limit']}, about "
              f"{lim['edges_target']:,} edges): {'completed' if lim['completed'] else 'DID NOT COMPLETE'} in "
              f"{lim['wall_seconds']:.0f} s, total peak RSS of all processes {lim['peak_rss_bytes'] / 2**30:.2f} GiB "
              f"(target <= 4 GiB)" + ("" if lim["completed"] else f"; last lines: {lim['stderr_tail']}"))
        if lim.get("driver_peak_bytes"):
            print("driver's own peak RSS per stage: " + ", ".join(
                f"{k} {v / 2**20:.0f} MB" for k, v in lim["driver_peak_bytes"].items()))
        if "equal_to_unconstrained" in lim:
            print(f"results equal to the unconstrained run: {lim['equal_to_unconstrained']}")
        result["limited"] = lim
    (OUT / "scale-benchmark.json").write_text(json.dumps(result, indent=1, default=float))
    return 0


if __name__ == "__main__":
    sys.exit(main())
