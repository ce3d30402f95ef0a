"""``evenhand derive`` as a user runs it: a fresh process on a 1,000,000-row CSV, start-up included.

The CSV (written once, then reused) holds the same invented data as ``bench_derive.py``'s
``synthetic``: 8 groups (``g0`` .. ``g7``) with different prevalences, continuous scores
written with 6 decimals, a 0/1 outcome. The command derives under one criterion, cross-fits
every criterion for the promises and the comparison table (5 folds), and with ``--resamples``
bootstraps the chosen criterion's promises (the derive default is 100 resamples; 0 skips).

Each figure is one fresh ``python -m service.cli.main derive ...`` process: its wall time,
its CPU time (user + system) and its peak resident set (``ru_maxrss`` from ``os.wait4``), with
the 1-minute load average read before it. ``--root`` adds other checkouts of the tree (their
directory first on ``PYTHONPATH``), run alternately with this one, so before and after are
measured side by side in one run with the same interpreter and libraries:

    git archive BASE | tar -x -C /tmp/base
    nice -n 5 .venv/bin/python benchmarks/bench_derive_cli.py --root /tmp/base --repeats 3

Targets (issue 15): <= 2 s wall and <= 300 MB.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
GROUPS = 8


def write_csv(path: Path, rows: int, seed: int = 1) -> None:
    """Invented rows (the distribution of ``bench_derive.synthetic``): score, outcome, group."""
    rng = np.random.default_rng(seed)
    g = rng.integers(0, GROUPS, rows)
    logit = -1.5 + 0.2 * g + rng.normal(0, 1, rows)
    y = (rng.random(rows) < 1 / (1 + np.exp(-logit))).astype(np.int8)
    s = 1 / (1 + np.exp(-(logit + rng.normal(0, 0.5 + 0.1 * g))))
    tmp = path.with_suffix(".part")
    with tmp.open("w", encoding="utf-8", newline="") as f:
        f.write("case_id,score,outcome,group\n")
        for start in range(0, rows, 100_000):
            stop = min(rows, start + 100_000)
            f.writelines(f"c{i},{s[i]:.6f},{y[i]},g{g[i]}\n" for i in range(start, stop))
    tmp.replace(path)


def derive_argv(csv: Path, out: Path, criterion: str, resamples: int) -> list[str]:
    return [
        sys.executable,
        "-m",
        "service.cli.main",
        "derive",
        str(csv),
        "--score",
        "score",
        "--outcome",
        "outcome",
        "--group",
        "group",
        "--criterion",
        criterion,
        "--cost-fp",
        "1",
        "--cost-fn",
        "4",
        "--tolerance",
        "0.02",
        "--resamples",
        str(resamples),
        "--out",
        str(out / "policy.json"),
        "--report",
        str(out / "report.json"),
    ]


def run_once(root: Path, argv: list[str], logs: Path) -> dict[str, Any]:
    """Wall, CPU and peak RSS of one fresh process of ``argv`` run from ``root``."""
    env = {**os.environ, "PYTHONPATH": str(root)}
    env.pop("EVENHAND_PROGRESS", None)
    load = os.getloadavg()[0]
    with (logs / "stdout").open("wb") as out, (logs / "stderr").open("wb") as err:
        started = time.perf_counter()
        proc = subprocess.Popen(argv, cwd=root, env=env, stdout=out, stderr=err)
        _, status, usage = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - started
    proc.returncode = os.waitstatus_to_exitcode(status)  # reaped here, not by Popen
    if proc.returncode != 0:
        raise SystemExit(f"derive failed ({root}): {(logs / 'stderr').read_text()[-2000:]}")
    policy = Path(argv[argv.index("--out") + 1]).read_bytes()
    return {
        "wall_s": round(wall, 3),
        "cpu_s": round(usage.ru_utime + usage.ru_stime, 3),
        "peak_rss_mb": round(usage.ru_maxrss / 1024, 1),
        "load_avg": round(load, 2),
        "policy_sha256": hashlib.sha256(policy).hexdigest()[:16],
    }


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--csv", type=Path, help="CSV to use (written if missing)")
    parser.add_argument("--criterion", default="equalized-odds")
    parser.add_argument(
        "--resamples",
        type=lambda v: [int(x) for x in v.split(",")],
        default=[0, 100],
        help="comma-separated bootstrap resample counts to run (default 0,100)",
    )
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--root", type=Path, action="append", default=[], help="other tree")
    parser.add_argument("--json", type=Path)
    args = parser.parse_args()
    csv = args.csv or Path(tempfile.gettempdir()) / f"evenhand-derive-{args.rows}.csv"
    if not csv.exists():
        print(f"writing {csv} ...", file=sys.stderr)
        write_csv(csv, args.rows)
    print(
        f"{csv}: {csv.stat().st_size / 1e6:.1f} MB; load average {os.getloadavg()[0]:.2f}",
        file=sys.stderr,
    )
    roots = [ROOT, *(r.resolve() for r in args.root)]
    results: dict[str, Any] = {"csv": str(csv), "rows": args.rows, "runs": []}
    with tempfile.TemporaryDirectory(prefix="evenhand-derive-") as tmp:
        for resamples in args.resamples:
            for repeat in range(args.repeats):
                for root in roots:
                    out = Path(tmp) / f"{abs(hash(str(root)))}-{resamples}"
                    out.mkdir(exist_ok=True)
                    argv = derive_argv(csv, out, args.criterion, resamples)
                    row = {"root": str(root), "resamples": resamples, **run_once(root, argv, out)}
                    results["runs"].append(row)
                    print(
                        f"  {root}  resamples {resamples}  run {repeat + 1}: wall "
                        f"{row['wall_s']:.2f} s, CPU {row['cpu_s']:.2f} s, peak RSS "
                        f"{row['peak_rss_mb']:.0f} MB (load {row['load_avg']:.2f}; policy "
                        f"{row['policy_sha256']})",
                        file=sys.stderr,
                    )
    print("best of each (wall; target <= 2 s and <= 300 MB):", file=sys.stderr)
    for resamples in args.resamples:
        for root in roots:
            rows = [
                r for r in results["runs"] if r["root"] == str(root) and r["resamples"] == resamples
            ]
            best = min(rows, key=lambda r: r["wall_s"])
            print(
                f"  {root}  resamples {resamples}: wall {best['wall_s']:.2f} s, CPU "
                f"{best['cpu_s']:.2f} s, peak RSS {max(r['peak_rss_mb'] for r in rows):.0f} MB",
                file=sys.stderr,
            )
    if args.json:
        args.json.write_text(json.dumps(results, indent=2) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
