"""docs/cluster_jobqueue.py: the README's cluster example parses its arguments and, with a
dask ``LocalCluster`` standing in for SLURM, runs its whole flow (workers, plexwash run, stop)."""

from __future__ import annotations

import importlib.util
import json
from pathlib import Path

import numpy as np
import pytest
from plexwash.qc.io import write_ome_tiff

SCRIPT = Path(__file__).resolve().parents[1] / "docs" / "cluster_jobqueue.py"


def load_script():
    spec = importlib.util.spec_from_file_location("cluster_jobqueue", SCRIPT)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_arguments_match_the_readme():
    script = load_script()
    parser = script.build_parser()
    args = parser.parse_args(["/data/cohort", "/data/run", "--queue", "normal", "--jobs", "8",
                              "--recipe", "recipe.toml", "--stains", "stains.csv"])
    assert (args.cohort, args.out, args.jobs, args.queue) == (Path("/data/cohort"), Path("/data/run"),
                                                               8, "normal")
    command = script.plexwash_command(args, "tcp://10.0.0.5:8786")
    assert command[-10:] == ["run", "/data/cohort", "-o", "/data/run", "--scheduler",
                             "tcp://10.0.0.5:8786", "--recipe", "recipe.toml", "--stains",
                             "stains.csv"][-10:]
    with pytest.raises(SystemExit):  # the cohort and the output folder are required
        parser.parse_args(["--jobs", "8"])
    readme = (SCRIPT.parents[1] / "README.md").read_text()
    for line in readme.splitlines():  # every README call of the script parses
        if line.startswith("python docs/cluster_jobqueue.py"):
            parser.parse_args(line.split("#")[0].split()[2:])


@pytest.mark.slow
def test_whole_flow_with_a_local_cluster(tmp_path, monkeypatch):
    distributed = pytest.importorskip("distributed")
    script = load_script()

    class StandIn(distributed.LocalCluster):
        """SLURMCluster's interface as the script uses it, on local worker processes."""

        def scale(self, n=0, jobs=None, **kwargs):
            return super().scale(jobs or n)

    started = []

    def start_cluster(args):
        cluster = StandIn(n_workers=0, threads_per_worker=1, processes=True,
                          dashboard_address=None, host="127.0.0.1")
        started.append(cluster)
        return cluster

    monkeypatch.setattr(script, "start_cluster", start_cluster)
    cohort = tmp_path / "cohort"
    cohort.mkdir()
    rng = np.random.default_rng(5)
    for name in ("a", "b"):
        write_ome_tiff(cohort / f"{name}.ome.tiff",
                       rng.poisson(1.0, size=(3, 48, 48)).astype(np.float32), ["Nd145", "Nd146", "Ir191"])
    out = tmp_path / "run"
    assert script.main([str(cohort), str(out), "--jobs", "1"]) == 0
    records = [json.loads(line) for line in (out / "ledger.jsonl").read_text().splitlines()]
    assert sorted(r["roi"] for r in records if r["status"] == "done") == ["a", "b"]
    assert started and started[0].status.name == "closed"  # the workers were stopped
