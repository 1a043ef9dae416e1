"""compute.cluster: where the parallel tasks run, and that a Dask cluster gives the bytes this machine gives.

The cluster is a real ``distributed.LocalCluster`` on 127.0.0.1 (two workers, one thread
each, TCP so every task and its data are pickled and sent as to a remote cluster). The
reference is the same work run on this machine: in this process and in local processes.
"""
from __future__ import annotations

import contextlib
import socket
from pathlib import Path
from typing import Iterator, Tuple

import numpy as np
import pandas as pd
import pytest
import yaml

from conftest import make_demo_study, record_path, run_gapbook
from gapbook.cli import main
from gapbook.compute import LOCAL, check_cluster_address, on_cluster, run_tasks, where_work_runs
from gapbook.demo import demo_params
from gapbook.errors import InputError
from gapbook.params import Params
from gapbook.stage import open_stage


@contextlib.contextmanager
def listening_socket() -> Iterator[Tuple[socket.socket, int]]:
    """A plain listening socket on 127.0.0.1 standing in for a scheduler; accept() raises if nobody connected."""
    with socket.socket() as listener:
        listener.bind(("127.0.0.1", 0))
        listener.listen(1)
        listener.setblocking(False)
        yield listener, listener.getsockname()[1]


def params_naming_cluster(tmp_path: Path, address: str) -> Path:
    """The demo params with ``compute.cluster`` set to ``address``, written under ``tmp_path``."""
    study = demo_params().to_dict()
    study["compute"] = {"cluster": address}
    path = tmp_path / "params.yaml"
    path.write_text(yaml.safe_dump(study))
    return path


# ---------------------------------------------------------------------------
# the address (no cluster needed)

@pytest.mark.parametrize("given, address", [
    ("local", LOCAL),
    ("tcp://10.0.0.5:8786", "tcp://10.0.0.5:8786"),
    ("10.0.0.5:8786", "tcp://10.0.0.5:8786"),
    ("scheduler.example.org:8786", "tcp://scheduler.example.org:8786"),
    (" localhost:1 ", "tcp://localhost:1"),
    ("[::1]:8786", "tcp://[::1]:8786"),
    ("tcp://[fe80::1]:65535", "tcp://[fe80::1]:65535"),
])
def test_an_address_is_local_or_tcp_host_port(given, address):
    assert check_cluster_address(given) == address


@pytest.mark.parametrize("given", [
    "", "remote", "tcp://10.0.0.5", "10.0.0.5", "10.0.0.5:0", "10.0.0.5:65536", "10.0.0.5:80x",
    "http://10.0.0.5:8786", "tls://10.0.0.5:8786", "inproc://10.0.0.5/1/2", "tcp://user@host:8786",
    "tcp://a b:8786", "tcp://-host:8786", "tcp://host_name:8786", "[::g]:8786", "::1:8786",
    "tcp://10.0.0.5:8786/path", "host:8786;rm -rf /", "host:8786\nx", "LOCAL",
])
def test_anything_else_is_an_input_error(given):
    with pytest.raises(InputError, match="not a Dask scheduler address"):
        check_cluster_address(given)


def test_a_bad_address_in_a_params_file_is_exit_2_naming_the_key(tmp_path, capsys):
    study = demo_params().to_dict()
    study["compute"] = {"cluster": "http://10.0.0.5:8786"}
    with pytest.raises(InputError) as caught:
        Params.from_dict(study, source="study.yaml")
    assert str(caught.value).startswith("study.yaml: compute.cluster: 'http://10.0.0.5:8786' is not a Dask")
    path = tmp_path / "params.yaml"
    path.write_text(yaml.safe_dump(study))
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    assert "compute.cluster" in err and len(err.strip().splitlines()) == 1 and "Traceback" not in err


def test_check_says_where_the_data_goes_and_never_connects(tmp_path, capsys):
    # A plain listening socket stands in for a scheduler: check must report the address and
    # what would be sent, and the socket must see no connection at all.
    with listening_socket() as (listener, port):
        path = params_naming_cluster(tmp_path, f"127.0.0.1:{port}")
        assert main(["check", str(path), "--cluster", f"127.0.0.1:{port}"]) == 0
        out = capsys.readouterr().out
        with pytest.raises(BlockingIOError):
            listener.accept()
    line = next(line for line in out.splitlines() if line.startswith("compute:"))
    assert f"tcp://127.0.0.1:{port}" in line and "participant values" in line and "never the file path" in line
    assert "impute, sensitivity, simulate" in line
    assert main(["check", str(path), "--only", "audit,mechanism"]) == 0
    assert "none of these stages sends work" in capsys.readouterr().out


def test_a_params_file_alone_never_sends_work_to_a_cluster(tmp_path, capsys):
    # Results come back pickled, and unpickling runs code the other side chose (Python's pickle
    # documentation: "never unpickle data that could have come from an untrusted source"): the
    # command line must confirm the address the params name, else check and run stop, exit 2,
    # before anything connects and before a record is started.
    with listening_socket() as (listener, port):
        path = params_naming_cluster(tmp_path, f"127.0.0.1:{port}")
        for command in (["check", str(path)], ["check", str(path), "--cluster", "127.0.0.1:1"],
                        ["run", str(path), "--out", str(tmp_path / "records")]):
            assert main(command) == 2, command
            err = capsys.readouterr().err
            assert len(err.strip().splitlines()) == 1 and "Traceback" not in err
            assert f"compute.cluster tcp://127.0.0.1:{port} would receive participant values" in err
            assert f"add --cluster tcp://127.0.0.1:{port} to the command" in err
        assert not (tmp_path / "records").exists() or not any((tmp_path / "records").iterdir())
        with pytest.raises(BlockingIOError):
            listener.accept()
    # stages that send nothing need no confirmation; a --cluster the params do not name is refused
    assert main(["check", str(path), "--only", "audit,mechanism"]) == 0
    capsys.readouterr()
    assert main(["check", str(path), "--cluster", "nonsense"]) == 2
    assert "--cluster: 'nonsense' is not a Dask scheduler address" in capsys.readouterr().err
    local = tmp_path / "local.yaml"
    local.write_text(yaml.safe_dump(demo_params().to_dict()))
    assert main(["check", str(local), "--cluster", "127.0.0.1:8786"]) == 2
    assert "compute.cluster is local" in capsys.readouterr().err


def test_a_local_run_says_so():
    assert where_work_runs(LOCAL).startswith("this machine")


def test_an_unreachable_scheduler_stops_with_one_line():
    with socket.socket() as probe:  # a port nothing listens on
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    with pytest.raises(InputError, match=f"cannot reach the Dask scheduler at tcp://127.0.0.1:{port}"):
        with on_cluster(f"127.0.0.1:{port}", timeout=2):
            pass


# ---------------------------------------------------------------------------
# a real cluster

@pytest.fixture(scope="module")
def cluster():
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False, protocol="tcp",
                                  host="127.0.0.1", dashboard_address=None) as running:
        yield running


def _executed(cluster) -> int:
    return sum(worker.state.executed_count for worker in cluster.workers.values())


def _square_with_seed(value, seed):
    return value * value, np.random.default_rng(seed).random()


def test_run_tasks_keeps_task_order_everywhere(cluster):
    tasks = [(i, np.random.SeedSequence(5).spawn(12)[i]) for i in range(12)]
    here = run_tasks(_square_with_seed, tasks, n_jobs=1)
    before = _executed(cluster)
    with on_cluster(cluster.scheduler_address):
        there = run_tasks(_square_with_seed, tasks, n_jobs=1, batch_size=2)
    assert _executed(cluster) - before == 6  # six batches of two ran on the workers
    assert there == here and [r[0] for r in here] == [i * i for i in range(12)]


@pytest.mark.slow
def test_imputation_sensitivity_and_simulation_on_a_cluster_are_byte_identical(cluster, tmp_path):
    # The demo study through the stage adapters the notebooks call, once on this machine
    # (two local processes) and once with compute.cluster pointing at the LocalCluster.
    body = demo_params().to_dict()
    body["imputation"].update(m=4, iterations=3, n_jobs=2)
    body["sensitivity"] = {"variable": "hba1c_12m", "m": 2,
                           "delta": {"hba1c_12m": {"by": "arm", "values": [0.0, 1.0], "groups": {"sms": [0.0, 3.0]}}}}
    body["simulation"].update(replicates=4, m=2, n_jobs=2)
    results = {}
    for where in (LOCAL, cluster.scheduler_address):
        body["compute"] = {"cluster": where}
        ctx = open_stage(body, str(tmp_path / where.replace("/", "_").replace(":", "_")))
        before = _executed(cluster)
        plan = ctx.imputation_plan()
        imputed = ctx.impute(plan)
        sensitivity = ctx.sensitivity(plan)
        simulation = ctx.simulation()
        ran_there = _executed(cluster) - before
        results[where] = imputed, sensitivity, simulation, ran_there
    (imputed, sensitivity, simulation, none), (imputed2, sensitivity2, simulation2, ran) = results.values()
    assert none == 0 and ran > 0
    prefixes = set(cluster.scheduler.task_prefixes)
    assert any(p.startswith("batch_of_run_chain") for p in prefixes)
    assert any(p.startswith("batch_of_run_replicate") for p in prefixes)
    for name, values in imputed.imputed.items():
        assert values.tobytes() == imputed2.imputed[name].tobytes(), name
    pd.testing.assert_frame_equal(imputed.convergence, imputed2.convergence, check_exact=True)
    for one, two in ((sensitivity, sensitivity2), (simulation, simulation2)):
        tables, tables2 = one.tables(), two.tables()
        assert tables.keys() == tables2.keys()
        for key in tables:
            assert tables[key].to_csv().encode() == tables2[key].to_csv().encode(), key
    assert simulation.replicates.to_csv() == simulation2.replicates.to_csv()
    assert sensitivity.sentences == sensitivity2.sentences
    # the page says where the replicates ran, and nothing else differs
    assert "replicates run in 2 local worker process(es)" in simulation.sentences[0]
    assert "replicates run in the Dask cluster's 2 worker thread(s)" in simulation2.sentences[0]
    assert simulation.sentences[1:] == simulation2.sentences[1:]


def test_run_says_where_work_goes_and_verify_reruns_here(tmp_path):
    # A record whose params name a cluster (a listening socket here): run prints the compute
    # line before any stage, and verify re-runs on this machine, says so, and never connects.
    study = make_demo_study(tmp_path / "study")
    with socket.socket() as listener:
        listener.bind(("127.0.0.1", 0))
        listener.listen(1)
        listener.setblocking(False)
        port = listener.getsockname()[1]
        with (study / "params.yaml").open("a") as params:
            params.write(f"\ncompute:\n  cluster: 127.0.0.1:{port}\n")
        result = run_gapbook("run", "params.yaml", "--only", "audit", "--out", "records", cwd=study)
        record = record_path(result)
        assert result.stdout.splitlines()[0] == (f"compute: this machine: none of these stages sends work to "
                                                 f"compute.cluster tcp://127.0.0.1:{port}")
        checked = run_gapbook("verify", record)
        with pytest.raises(BlockingIOError):
            listener.accept()
    assert checked.returncode == 0, checked.stdout + checked.stderr
    assert (f"verify: re-running on this machine, not on the record's compute.cluster tcp://127.0.0.1:{port}"
            in checked.stdout)


def test_a_worker_running_chains_imports_neither_pandas_nor_the_models():
    # What a worker unpickles to run a chain (the function and the prepared problem) must not
    # pull in pandas or statsmodels: each worker would carry them (about 180 MB) for nothing.
    import subprocess
    import sys

    code = ("import sys, gapbook.impute.chains, gapbook.impute.problem; "
            "print(sorted({m.split('.')[0] for m in sys.modules} & {'pandas', 'statsmodels', 'patsy', 'pydantic'}))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"


@pytest.mark.slow
def test_the_followup_stage_chains_on_a_cluster_are_byte_identical(cluster, tmp_path):
    # The follow-up demo's imputation draws one data-augmentation chain per arm, each from its own
    # child seed: two local processes and the LocalCluster must give the same visit effects, byte for byte.
    from gapbook.followup.demo import followup_demo_params

    body = followup_demo_params().to_dict()
    body["imputation"].update(m=3, n_jobs=2)
    tables = {}
    for where in (LOCAL, cluster.scheduler_address):
        body["compute"] = {"cluster": where}
        before = _executed(cluster)
        analysis = open_stage(body, str(tmp_path / where.replace("/", "_").replace(":", "_"))).followup()
        tables[where] = analysis.effects.to_csv().encode(), _executed(cluster) - before
    (local, none), (there, ran) = tables.values()
    assert none == 0 and ran == 2  # one chain per arm ran on the workers
    assert any("_group_posterior" in p for p in cluster.scheduler.task_prefixes), set(cluster.scheduler.task_prefixes)
    assert local == there
