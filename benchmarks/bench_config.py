"""Loading a large config: YAML parse, validation and the checks after it (``drift.config.load_config``).

    python benchmarks/bench_config.py                      # 10,000 models, best of 3
    python benchmarks/bench_config.py --models 2000 --repeat 1
    python benchmarks/bench_config.py --profile            # cProfile of one load (top 15 by cumulative time)
    python benchmarks/bench_config.py --bomb               # also: the CLI refusing a ~300-byte alias bomb

Run it with ``PYTHONPATH`` pointing at the checkout to measure (drift is imported from there).

Invented scenario: ``--models`` weekly models in block style, as a team would write them: a target, three
drivers (one with a delay, one a forecast), a reference period, a preprocess block, every fourth model with
deployed coefficients; two sources, alerts with two channels and a schedule. The file is written once to a
temporary folder; each repeat times ``load_config`` on it (wall and process CPU time); the best and the
median are printed with the file size and the 1-minute load average at the end.

``--bomb`` writes a config of nested anchors (each level repeats the one before nine times: 9**9 nodes once
expanded, about 300 bytes) and times ``drift <command> --config bomb.yaml`` in a fresh interpreter for
every command that reads a config; each must exit 2.
"""

from __future__ import annotations

import argparse
import cProfile
import os
import pstats
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HEADER = """\
store: sqlite:///drift.db
timezone: Europe/Lisbon
sources:
  - name: sales
    kind: csv
    path: data/sales-*.csv
    period_column: week
  - name: drivers
    kind: csv
    path: data/drivers.csv
    period_column: week
    series_column: series
    value_column: value
    delay: 2 days
check:
  level: 0.05
  recent_window: 52
alerts:
  channels:
    - {kind: email, name: team, host: 127.0.0.1, port: 2525, sender: drift@example.org, to: [a@example.org]}
    - {kind: folder, name: archive, path: alerts/}
schedule:
  ingest: "0 6 * * 1"
  check: "30 6 * * 1"
models:
"""

MODEL = """\
  - name: store{i:05d}
    target: store{i:05d}_units
    frequency: W
    unit: units
    drivers:
      - series: store{i:05d}_promo
        lag: 1
      - series: region{r:03d}_temp
        lag: 2
        delay: 2 days
      - series: region{r:03d}_price
        lag: 0
        form: forecast
    reference:
      start: 2021-01-04
      end: 2023-12-25
    preprocess:
      trend: linear
      season: auto
      harmonics: 3
"""

DEPLOYED = """\
    deployed:
      coefficients: {{const: 120.5, trend: 0.1, sin1: 3.0, cos1: -2.0, sin2: 0.5, cos2: 0.2, sin3: 0.1, cos3: 0.0,
                     store{i:05d}_promo: 2.0, region{r:03d}_temp: 1.5, region{r:03d}_price: -0.8}}
"""

#: each level repeats the one before nine times: 9**9 (387 million) leaves once expanded
BOMB = ("a: &a [x,x,x,x,x,x,x,x,x]\nb: &b [*a,*a,*a,*a,*a,*a,*a,*a,*a]\nc: &c [*b,*b,*b,*b,*b,*b,*b,*b,*b]\n"
        "d: &d [*c,*c,*c,*c,*c,*c,*c,*c,*c]\ne: &e [*d,*d,*d,*d,*d,*d,*d,*d,*d]\n"
        "f: &f [*e,*e,*e,*e,*e,*e,*e,*e,*e]\ng: &g [*f,*f,*f,*f,*f,*f,*f,*f,*f]\n"
        "h: &h [*g,*g,*g,*g,*g,*g,*g,*g,*g]\nmodels: [*h,*h,*h,*h,*h,*h,*h,*h,*h]\n")

#: every command that reads a config, with the arguments it needs besides --config
COMMANDS = [["ingest"], ["readmit"], ["batches"], ["retract", "--batch", "1"], ["quarantine"], ["check"], ["deliver"],
            ["digest"], ["daemon"], ["status"], ["shock", "--date", "2024-11-04"], ["refit", "--model", "x"],
            ["accept", "--model", "x", "--action", "refit"], ["snooze", "--model", "x", "--until", "2030-01-01"],
            ["history", "--model", "x"]]


def write_config(path: Path, models: int) -> None:
    parts = [HEADER]
    for i in range(models):
        parts.append(MODEL.format(i=i, r=i % 50))
        if i % 4 == 0:
            parts.append(DEPLOYED.format(i=i, r=i % 50))
    path.write_text("".join(parts), encoding="utf-8")


def time_load(path: Path, repeat: int) -> tuple[list[float], list[float], int]:
    from drift.config import load_config

    walls, cpus, n = [], [], 0
    for _ in range(repeat):
        c0, w0 = time.process_time(), time.perf_counter()
        cfg = load_config(path)
        walls.append(time.perf_counter() - w0)
        cpus.append(time.process_time() - c0)
        n = len(cfg.models)
    return walls, cpus, n


def bomb(folder: Path) -> None:
    p = folder / "bomb.yaml"
    p.write_text(BOMB, encoding="utf-8")
    print(f"alias bomb: {len(BOMB.encode())} bytes")
    print(f"{'command':<12} {'exit':>4} {'wall s':>7}  first line of stderr")
    for cmd in COMMANDS:
        t0 = time.perf_counter()
        r = subprocess.run([sys.executable, "-m", "drift.cli", cmd[0], "--config", str(p), *cmd[1:]],
                           capture_output=True, text=True, cwd=folder, timeout=600, check=False)
        wall = time.perf_counter() - t0
        first = (r.stderr.strip().splitlines() or [""])[0][:100]
        print(f"{cmd[0]:<12} {r.returncode:>4} {wall:>7.2f}  {first}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--models", type=int, default=10_000)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--profile", action="store_true")
    ap.add_argument("--bomb", action="store_true")
    args = ap.parse_args()
    import yaml

    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        path = folder / "drift.yaml"
        write_config(path, args.models)
        size = path.stat().st_size
        print(f"config: {args.models:,} models, {size / 2**20:.1f} MiB; PyYAML {yaml.__version__}, "
              f"libyaml {'yes' if yaml.__with_libyaml__ else 'no'}")
        if args.profile:
            from drift.config import load_config

            prof = cProfile.Profile()
            prof.runcall(load_config, path)
            pstats.Stats(prof).sort_stats("cumulative").print_stats(15)
        walls, cpus, n = time_load(path, args.repeat)
        assert n == args.models, n
        print(f"load_config: wall best {min(walls):.2f} s, median {statistics.median(walls):.2f} s; "
              f"CPU best {min(cpus):.2f} s ({args.repeat} runs)")
        if args.bomb:
            bomb(folder)
        print(f"load average (1 min): {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
