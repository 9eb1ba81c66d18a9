"""Soak the studio: random seeded user actions on a cohort, with the live preview on.

Run in its own process by ``tests/test_plugin_soak.py`` (a crash of Qt or OpenGL kills
this process, not pytest). Each action starts as a click would and the next one follows
after a random pause, sometimes before the last one's background work has finished, as a
user clicking on would. Prints one line per cohort, then ``survived <n> actions``.

    python tests/studio_soak.py COHORT [--matrix CSV] [--actions N] [--seed S] [--generate N,C,SIZE]
"""

from __future__ import annotations

import argparse
import importlib.util
import random
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

#: Action -> weight in the random draw.
ACTIONS = {"roi": 3, "channel": 4, "setting": 4, "live": 1, "grid": 1, "overlay": 1, "one": 1,
           "preview": 1, "compensate": 1, "measure": 1, "measure washed": 0.3, "settle": 1}


def _driver():
    spec = importlib.util.spec_from_file_location("plexwash_studio_driver", ROOT / "benchmarks" / "studio_driver.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def soak(studio, n_actions: int, rng: random.Random) -> dict[str, int]:
    """``n_actions`` random actions; returns how many of each ran."""
    names, weights = list(ACTIONS), list(ACTIONS.values())
    done = {name: 0 for name in names}
    spent = {name: 0.0 for name in names}
    for _ in range(n_actions):
        action = rng.choices(names, weights)[0]
        start = time.perf_counter()
        n_rois, n_channels = studio.cohort.table.rowCount(), studio.cohort.channels.count()
        if action == "roi":
            studio.roi(rng.randrange(n_rois))
        elif action == "channel":
            studio.channel(rng.randrange(n_channels))
        elif action == "setting":
            studio.setting(rng.choice((1, 2, 3, 4)))
        elif action == "live":
            studio.live(not studio.speckle.live.isChecked())
        elif action in ("grid", "overlay", "preview"):
            if action == "overlay":
                roi = studio.cohort.state.roi
                studio.cohort.set_ticked(rng.sample(list(roi.channels), k=min(3, n_channels)))
            studio.view(action)
        elif action == "one":
            studio.view("single")
        elif action == "compensate":
            studio.compensate()
        elif action == "measure":
            studio.measure(0)
        elif action == "measure washed":
            studio.measure(1)
        else:
            studio.settle()
        done[action] += 1
        studio.pump(rng.choice((0.0, 0.02, 0.1, 0.3)))  # often before the last action finished
        spent[action] += time.perf_counter() - start
    studio.settle()
    print("seconds per action kind: " + ", ".join(f"{k} {v:.1f}" for k, v in spent.items()), flush=True)
    return done


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("cohort", type=Path, help="cohort folder, or where to generate one (--generate)")
    parser.add_argument("--matrix", type=Path)
    parser.add_argument("--actions", type=int, default=100)
    parser.add_argument("--seed", type=int, default=18)
    parser.add_argument("--generate", help="N_ROIS,CHANNELS,SIZE: generate the cohort first")
    args = parser.parse_args(argv)

    driver = _driver()
    cohort, matrix = args.cohort, args.matrix
    if args.generate:
        n_rois, channels, size = (int(v) for v in args.generate.split(","))
        cohort = driver.make_cohort(args.cohort, n_rois=n_rois, n_channels=channels, size=size)
        matrix = args.cohort / "spillover.csv"
    start = time.perf_counter()
    studio = driver.Studio(cohort, matrix=matrix)
    done = soak(studio, args.actions, random.Random(args.seed))
    roi = studio.cohort.state.roi
    studio.close()
    print(f"{cohort}: {roi.shape} ROIs, {sum(done.values())} actions in {time.perf_counter() - start:.0f} s: "
          + ", ".join(f"{k} {v}" for k, v in done.items()), flush=True)
    print(f"survived {sum(done.values())} actions", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
