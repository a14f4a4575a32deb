"""``lotgate bench``: a night of N simulated lots, end to end, with per-stage figures and ratios.

Prints wall time and peak memory per stage, lots per second and the peak memory of the whole
process tree; then, side by side, the Prefect flow against the same stages as plain calls (each
night in a fresh process), the batched kinetic fit against a loop of ``scipy.optimize.curve_fit``,
and certificate signing across all cores against one process.
No test asserts a time: these are measurements to read.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

STAGES = ("receive", "assemble", "reread", "evaluate", "load_charts", "decide", "publish", "close")


def _peak_rss_mb() -> float:
    """The largest resident size any one process of ours (or a reaped child) reached."""
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    children = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0
    return max(own, children)


def _tree_memory_mb(root_pid: int) -> float:
    """Memory of a process and all its descendants (workers, fork server, Prefect's server), in MB.

    Proportional set size (a page shared by n processes counts 1/n in each), from
    /proc/PID/smaps_rollup; the resident size where that is not readable.
    """
    parents: dict[int, int] = {}
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                with open(f"/proc/{entry}/stat", "rb") as handle:
                    parents[int(entry)] = int(handle.read().rsplit(b")", 1)[1].split()[1])
            except (OSError, ValueError, IndexError):
                continue
    tree, frontier = {root_pid}, [root_pid]
    while frontier:
        parent = frontier.pop()
        for pid, ppid in parents.items():
            if ppid == parent and pid not in tree:
                tree.add(pid)
                frontier.append(pid)
    total_kb = 0
    for pid in tree:
        try:
            with open(f"/proc/{pid}/smaps_rollup") as handle:
                total_kb += next(int(line.split()[1]) for line in handle if line.startswith("Pss:"))
        except (OSError, StopIteration, ValueError):
            try:
                with open(f"/proc/{pid}/statm") as handle:
                    total_kb += int(handle.read().split()[1]) * (os.sysconf("SC_PAGE_SIZE") // 1024)
            except OSError:
                continue
    return total_kb / 1024.0


class _MemoryWatch:
    """Samples the whole process tree's memory every 100 ms while a night runs; keeps the peak."""

    def __init__(self) -> None:
        import threading

        self.peak_mb = 0.0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._watch, daemon=True)

    def _watch(self) -> None:
        while not self._stop.wait(0.1):
            self.peak_mb = max(self.peak_mb, _tree_memory_mb(os.getpid()))

    def __enter__(self) -> _MemoryWatch:
        if os.path.isdir("/proc/self"):
            self._thread.start()
        return self

    def __exit__(self, *_: Any) -> None:
        self._stop.set()
        if self._thread.is_alive():
            self._thread.join()


def _workspace(root: Path, files: dict[str, bytes]) -> Path:
    from pipeline.demo import plant as demo
    from pipeline.records.workspace import atomic_write, write_settings

    write_settings(root, {"plant_name": demo.PLANT_NAME, "time_zone": demo.PLANT_TIME_ZONE,
                          "signing": {"signer_name": demo.DEMO_SIGNER}})
    (root / "keys").mkdir(parents=True, exist_ok=True)
    (root / "keys" / "use-demo-identity").touch()
    (root / "inbox").mkdir(exist_ok=True)
    for name, data in files.items():
        atomic_write(root / "inbox" / name, data)
    return root


def _night(root: str, mode: str) -> None:
    """In a fresh process: one night on ``root`` as a Prefect flow or as plain calls; print its figures."""
    from flows.cli import quiet_prefect, server_started_early

    quiet_prefect()
    import logging

    for noisy in ("pyhanko", "pyhanko_certvalidator"):
        logging.getLogger(noisy).setLevel(logging.CRITICAL)
    start = time.perf_counter()
    with server_started_early(mode == "flow"):
        from flows import nightly
        from pipeline.night.open import open_night
    if mode == "flow":
        summary = nightly.nightly(root)
    else:
        ws, store, signer = open_night(Path(root))
        summary = nightly.run_stages(ws, store, signer, orchestrated=False)
    print(json.dumps({"night_s": time.perf_counter() - start, "stage_s": dict(nightly.STAGE_SECONDS),
                      "stage_peak_mb": dict(nightly.STAGE_PEAK_MB), "peak_rss_mb": _peak_rss_mb(),
                      "decided": sum(o.new for o in summary.outcomes)}))


def _run(root: Path, mode: str) -> dict[str, Any]:
    """One night in its own Python process, as a nightly run would be: start-up, imports, the
    fork server and (for the flow) Prefect's temporary server all count. Its memory is watched."""
    code = "import sys; from flows.bench import _night; _night(sys.argv[1], sys.argv[2])"
    with _MemoryWatch() as watch:
        start = time.perf_counter()
        done = subprocess.run([sys.executable, "-c", code, str(root), mode],  # noqa: S603 - our own interpreter
                              capture_output=True, text=True,
                              check=False)
        wall = time.perf_counter() - start
    if done.returncode != 0:
        raise RuntimeError(f"the {mode} night failed (exit {done.returncode}): {done.stderr[-3000:]}")
    figures = json.loads(done.stdout.strip().splitlines()[-1])
    return {**figures, "wall_s": wall, "peak_tree_mb": watch.peak_mb}


def _best_of(repeats: int, call: Any) -> tuple[float, Any]:
    """The shortest of ``repeats`` timings of ``call()``, and its result."""
    best, result = float("inf"), None
    for _ in range(repeats):
        start = time.perf_counter()
        result = call()
        best = min(best, time.perf_counter() - start)
    return best, result


def _fit_comparison(lims_files: int) -> dict[str, Any]:
    import numpy as np
    from scipy.optimize import curve_fit

    from pipeline.demo.plant import LIPASE
    from pipeline.science import michaelis_menten

    rng = np.random.default_rng(7)
    n_curves = max(200, lims_files)
    s = np.tile(np.array(LIPASE.kinetic_levels_mm).repeat(2), (n_curves, 1))
    vmax = rng.normal(1400, 60, (n_curves, 1))
    km = rng.normal(0.4, 0.02, (n_curves, 1))
    v = vmax * s / (km + s) * (1 + rng.normal(0, 0.02, s.shape))
    def loop() -> list[Any]:
        return [curve_fit(lambda x, a, b: a * x / (b + x), s[i], v[i], p0=(v[i].max(), np.median(s[i])),
                          xtol=1e-15, ftol=1e-15, gtol=1e-15, maxfev=10000)[0] for i in range(n_curves)]

    # Best of three for each side: a single timing on a shared 2-core machine is mostly noise.
    batched, batch = _best_of(3, lambda: michaelis_menten.fit_michaelis_menten_batch(s, v))
    looped, params = _best_of(3, loop)
    params_arr = np.array(params)
    rel = max(float(np.max(np.abs(batch.vmax - params_arr[:, 0]) / np.abs(params_arr[:, 0]))),
              float(np.max(np.abs(batch.km - params_arr[:, 1]) / np.abs(params_arr[:, 1]))))
    return {"curves": n_curves, "repeats": 3, "batched_s": batched, "curve_fit_loop_s": looped,
            "speed_ratio": looped / batched, "max_relative_difference": rel}


def _sign_chunk(args: tuple[str, str, list[bytes]]) -> int:
    import datetime as dt

    from pipeline.records import signing

    p12, passphrase_file, pdfs = args
    identity = signing.load_identity(Path(p12), passphrase_file=Path(passphrase_file))
    now = dt.datetime.now(dt.UTC)
    return sum(len(signing.sign_pdf(pdf, identity, reason="benchmark", location="bench", signed_at=now,
                                    field_name="Bench-Countersignature"))
               for pdf in pdfs)


def _signing_comparison(root: Path, count: int) -> dict[str, Any]:
    from concurrent.futures import ProcessPoolExecutor

    certificates = sorted((root / "certificates").glob("*.pdf"))[:count]
    if not certificates:
        return {}
    # Sign the unsigned renderings again: take the bytes before the signature's revision.
    pdfs = [path.read_bytes() for path in certificates]
    p12, secret = str(root / "keys" / "signer.p12"), str(root / "keys" / "signer.passphrase")
    start = time.perf_counter()
    _sign_chunk((p12, secret, pdfs))
    one = time.perf_counter() - start
    cores = os.cpu_count() or 1
    chunks = [pdfs[i::cores] for i in range(cores)]
    start = time.perf_counter()
    with ProcessPoolExecutor(max_workers=cores) as pool:
        list(pool.map(_sign_chunk, [(p12, secret, chunk) for chunk in chunks]))
    parallel = time.perf_counter() - start
    return {"documents": len(pdfs), "cores": cores, "one_process_s": one, "all_cores_s": parallel,
            "speed_ratio": one / parallel}


def cmd_bench(args: argparse.Namespace) -> int:
    import logging

    for noisy in ("pyhanko", "pyhanko_certvalidator"):
        logging.getLogger(noisy).setLevel(logging.CRITICAL)
    from pipeline.demo import plant as demo

    lots = int(args.lots)
    if lots < 2:
        print("lotgate: --lots must be at least 2")
        return 2
    lipase = (lots + 1) // 2
    started = time.perf_counter()
    nights = demo.build_scenario(nights=1, lipase_per_night=lipase, protease_per_night=lots - lipase)
    files = nights[0].files
    simulate_s = time.perf_counter() - started
    base = Path(tempfile.mkdtemp(prefix="lotgate-bench-"))
    lims_files = sum(1 for name in files if name.startswith("lims-"))
    try:
        flow_root = _workspace(base / "flow", files)
        plain_root = None if args.skip_plain else _workspace(base / "plain", files)
        del nights, files  # each night reads its inbox; the simulation's bytes need not stay in memory
        flow = _run(flow_root, "flow")
        plain = _run(plain_root, "plain") if plain_root is not None else None
        fit = _fit_comparison(lims_files)
        signing = _signing_comparison(flow_root, min(200, lots)) if not args.skip_signing else {}
    finally:
        if not args.keep:
            shutil.rmtree(base, ignore_errors=True)
        else:
            print(f"workspaces kept in {base}")
    wall, stages = flow["wall_s"], flow["stage_s"]
    plain_stages = plain["stage_s"] if plain else {}
    result = {
        "lots": lots, "wall_s": wall, "lots_per_s": lots / wall, "night_s": flow["night_s"],
        "peak_rss_mb": flow["peak_rss_mb"], "peak_tree_mb": flow["peak_tree_mb"], "stage_s": stages,
        "stage_peak_mb": flow["stage_peak_mb"], "simulate_s": simulate_s, "decided": flow["decided"],
        "plain_wall_s": plain["wall_s"] if plain else None, "plain_stage_s": plain_stages,
        "orchestration_ratio": wall / plain["wall_s"] if plain else None, "fit": fit, "signing": signing,
    }
    print(f"lotgate bench: {lots} simulated lots, one night, end to end (simulation {simulate_s:.1f} s, not counted)")
    print("each night runs in a fresh process; 'whole run' counts its start-up, imports and, for the flow, "
          "Prefect's temporary server")
    print(f"{'stage':<14}{'flow (s)':>10}{'plain (s)':>11}{'peak MB':>9}")
    for name in STAGES:
        print(f"{name:<14}{stages.get(name, 0.0):>10.2f}{plain_stages.get(name, 0.0):>11.2f}"
              f"{flow['stage_peak_mb'].get(name, 0.0):>9.0f}")
    plain_wall = plain["wall_s"] if plain else float("nan")
    print(f"{'stages':<14}{sum(stages.values()):>10.2f}{sum(plain_stages.values()):>11.2f}")
    ratio = f"   ratio flow/plain {wall / plain_wall:.2f}" if plain else ""
    print(f"{'whole run':<14}{wall:>10.2f}{plain_wall:>11.2f}{ratio}")
    print(f"lots per second {lots / wall:.1f}; peak memory: {result['peak_rss_mb']:.0f} MB in the largest process, "
          f"{flow['peak_tree_mb']:.0f} MB for all processes of the night together (PSS, sampled every 0.1 s)")
    print(f"kinetic fit, {fit['curves']} curves (best of {fit['repeats']}): batched {fit['batched_s'] * 1e3:.1f} ms, "
          f"curve_fit loop {fit['curve_fit_loop_s'] * 1e3:.0f} ms, ratio {fit['speed_ratio']:.0f}x, "
          f"max relative difference {fit['max_relative_difference']:.1e}")
    if signing:
        print(f"signing {signing['documents']} certificates: one process {signing['one_process_s']:.2f} s, "
              f"{signing['cores']} cores {signing['all_cores_s']:.2f} s, ratio {signing['speed_ratio']:.2f}x")
    if args.json:
        print(json.dumps(result, sort_keys=True))
    return 0


def add_commands(sub: argparse._SubParsersAction) -> None:
    bench = sub.add_parser("bench", help="measure a night of N simulated lots end to end",
                           description="Generate N lots with the demo simulator in a temporary workspace and run the "
                                       "whole night on them, once as the Prefect flow and once as plain calls, each in "
                                       "a fresh process; print time and peak memory per stage, lots per second, the "
                                       "whole process tree's peak memory, and side-by-side ratios (flow vs plain "
                                       "calls, batched fit vs curve_fit loop, signing on all cores vs one).")
    bench.add_argument("--lots", type=int, default=200, metavar="N", help="number of lots (default 200)")
    bench.add_argument("--json", action="store_true", help="end with one JSON line of the figures")
    bench.add_argument("--keep", action="store_true", help="keep the temporary workspaces")
    bench.add_argument("--skip-signing", action="store_true", help="leave out the signing comparison")
    bench.add_argument("--skip-plain", action="store_true",
                       help="leave out the plain-function run (halves the time of a large scaling run)")
    bench.set_defaults(func=cmd_bench)
