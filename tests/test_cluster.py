"""Studies on a Dask cluster (solver/study/cluster.py, docs/cluster.md): a LocalCluster of two
single-threaded workers gives the serial sweep to the last bit, compiles once per worker, survives
a worker killed mid-batch, leaves a resumable folder when interrupted, refuses an unreachable
scheduler before writing anything, runs a fit's starts in parallel with the serial result, and maps
``response`` over a parameter grid.  A run without a cluster never needs Dask.

The sweeps are small (8 batches of 2 points at mesh level 0); the module shares one cluster."""
import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from test_scenario import GOOD

pytest.importorskip("distributed")

from crosswind.models import build  # noqa: E402
from crosswind.solver import response  # noqa: E402
from crosswind.solver.cli import main  # noqa: E402
from crosswind.solver.fitting import scenario_fit  # noqa: E402
from crosswind.solver.fitting.fit import fit  # noqa: E402
from crosswind.solver.study import cluster  # noqa: E402
from crosswind.solver.study.scenario import load_scenario, parse_scenario  # noqa: E402
from crosswind.solver.study.sweep import open_results, run_scenario  # noqa: E402

SWEEP = GOOD.replace("temperature_K = [5, 20]", "temperature_K = [5, 10, 15, 20, 25, 30, 35, 40]").replace(
    "resolution = 0", "resolution = 0\nbatch_points = 2")
BATCHES = list(range(8))      # inner axis mu_eV (2 points), batch_points = 2: one batch per temperature
FIT = GOOD.replace("mu_eV = [0.13, 0.15]", "mu_eV = 0.14").replace("temperature_K = [5, 20]", "temperature_K = 20") \
    .replace("current_angle_deg = [0, 90]", "current_angle_deg = 0") + """
[fit]
quantity = "V2w"
axis = "mu_eV"
parameters = {tilt = {initial = 3e4, bounds = [1e4, 1e5]}}
starts = 2
"""


@pytest.fixture(scope="module")
def scn(tmp_path_factory):
    folder = tmp_path_factory.mktemp("scenario")
    p = folder / "s.toml"
    p.write_text(SWEEP, encoding="utf-8")
    return load_scenario(p)


@pytest.fixture(scope="module")
def serial(scn, tmp_path_factory):
    return run_scenario(scn, tmp_path_factory.mktemp("serial") / "out", progress=False)


@pytest.fixture(scope="module")
def client():
    with cluster.open_client("local:2") as c:
        yield c


def assert_same(a, b):
    """Every variable and coordinate equal to the last bit (NaN where NaN)."""
    assert set(a.data_vars) == set(b.data_vars) and set(a.coords) == set(b.coords)
    for k in list(a.data_vars) + list(a.coords):
        x, y = a[k].values, b[k].values
        assert x.dtype == y.dtype and x.shape == y.shape, k
        if x.dtype.kind in "fc":
            assert np.array_equal(x, y, equal_nan=True), k
        else:
            assert np.array_equal(x, y), k


def _checkpoints(folder: Path) -> list[int]:
    return sorted(int(p.stem.split("_")[1]) for p in (folder / "batches").glob("batch_*.npz"))


# ------------------------------------------------------------------------ no cluster, no Dask --
def test_addresses():
    assert cluster.parse_address(None) is None and cluster.parse_address("off") is None
    assert cluster.parse_address("local:3") == ("local", 3)
    assert cluster.parse_address("local")[0] == "local" and cluster.parse_address("local")[1] >= 1
    assert cluster.parse_address("tcp://10.0.0.5:8786") == ("remote", "tcp://10.0.0.5:8786")
    assert cluster.parse_address("node7:8786") == ("remote", "tcp://node7:8786")
    for bad in ("local:0", "local:two", "ftp://x:1", "nohost"):
        with pytest.raises(cluster.ClusterError, match="cluster address"):
            cluster.parse_address(bad)


def test_a_worker_of_another_version_is_refused():
    import crosswind
    cluster.check_version({"worker": "tcp://w:1", "version": crosswind.__version__})
    with pytest.raises(cluster.ClusterError, match="tcp://w:1 runs crosswind 0.0.1, this client"):
        cluster.check_version({"worker": "tcp://w:1", "version": "0.0.1"})


def test_a_run_without_a_cluster_needs_no_dask(tmp_path):
    """With Dask made unimportable, the CLI imports and a run completes; importing the CLI (cluster
    module included) does not import Dask.  (xarray itself imports Dask when it is installed and a
    dataset is built, so the check of a full run has to hide Dask rather than look for it.)"""
    p = tmp_path / "s.toml"
    p.write_text(GOOD, encoding="utf-8")
    hidden = ("import sys; sys.modules['dask'] = None; sys.modules['distributed'] = None\n"
              "from crosswind.solver.cli import main\n"
              f"rc = main(['run', {str(p)!r}, '--no-progress'])\n"
              "assert rc == 0, rc\n")
    plain = ("import sys\nimport crosswind.solver.cli, crosswind.solver.study.cluster\n"
             "assert 'dask' not in sys.modules and 'distributed' not in sys.modules, 'Dask imported'\n")
    for code in (hidden, plain):
        res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=240, cwd=tmp_path)
        assert res.returncode == 0, res.stderr[-2000:]
    assert (tmp_path / "out" / "results.nc").exists()


@pytest.mark.parametrize("command", ["run", "fit"])
def test_an_unreachable_scheduler_is_named_before_anything_is_written(tmp_path, capsys, command):
    import socket

    import dask
    with socket.socket() as s:          # a port nobody listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    p = tmp_path / "s.toml"
    p.write_text(GOOD if command == "run" else FIT, encoding="utf-8")
    argv = [command, str(p), "--no-progress", "--cluster", f"tcp://127.0.0.1:{port}"]
    if command == "fit":
        argv += ["--data", str(tmp_path / "d.csv"), "--output", str(tmp_path / "out")]
    with dask.config.set({"distributed.comm.timeouts.connect": "2s"}):
        rc = main(argv)
    assert rc == 2
    err = capsys.readouterr().err
    assert f"cannot reach the Dask scheduler at tcp://127.0.0.1:{port}" in err
    assert sorted(x.name for x in tmp_path.iterdir()) == ["s.toml"]


def test_the_payload_carries_the_tight_binding_file(tmp_path):
    """Only text travels: a worker rebuilds a tight-binding scenario without the file on its disk."""
    src = Path(__file__).resolve().parents[1] / "models" / "data" / "square_chern.toml"
    (tmp_path / "defs").mkdir()
    (tmp_path / "defs" / "chern.toml").write_text(src.read_text(encoding="utf-8"), encoding="utf-8")
    text = GOOD.replace('model = "massive-dirac"', 'tight_binding = "defs/chern.toml"').replace(
        "[material.parameters]\nvelocity = 5e5\ntilt = 5e4\nmass = 0.1\nvalleys = 2\n", "[material.parameters]\nm = 1.5\n")
    scn = parse_scenario(text, source=str(tmp_path / "s.toml"), base=tmp_path)
    payload = cluster.scenario_payload(scn)
    assert set(payload) == {"text", "source", "tight_binding", "tight_binding_name"}
    assert all(isinstance(v, str) for v in payload.values())
    params = {k: float(v) for k, v in scn.build_model().params.items()}
    (tmp_path / "defs" / "chern.toml").unlink()
    again = cluster.worker_scenario(payload)
    assert again.axes == scn.axes and again.material.tight_binding.name == "chern.toml"
    assert {k: float(v) for k, v in again.build_model().params.items()} == params == {"A": 1.0, "B": -0.5, "m": 1.5}


# ------------------------------------------------------------------------ sweeps on a cluster --
def test_a_worker_killed_mid_batch_costs_only_its_batch(scn, serial, tmp_path):
    """SIGKILL one worker process while it executes a batch (its first, which compiles: seconds);
    the scheduler gives the batch to another worker and the run finishes with every point once."""
    with cluster.open_client("local:2") as c:
        pids = c.run(os.getpid)
        killed = {}

        def killer():
            deadline = time.monotonic() + 50
            while time.monotonic() < deadline:
                busy = c.run(lambda dask_worker: [ts.key for ts in dask_worker.state.executing])
                for addr, keys in busy.items():
                    if keys:
                        os.kill(pids[addr], signal.SIGKILL)
                        killed[addr] = int(keys[0].rsplit("-", 1)[1])     # key ...-<batch index>
                        return
                time.sleep(0.01)

        thread = threading.Thread(target=killer)
        thread.start()
        ds = run_scenario(scn, tmp_path / "out", progress=False, client=c)
        thread.join()
    assert killed, "no worker was caught executing a batch"
    assert json.loads(ds.attrs["batches_computed_this_run"]) == BATCHES
    assert _checkpoints(tmp_path / "out") == BATCHES
    who = json.loads(ds.attrs["cluster_workers_this_run"])
    assert sorted(b for w in who.values() for b in w["batches"]) == BATCHES
    (dead, lost), = killed.items()
    assert any(lost in w["batches"] for addr, w in who.items() if addr != dead)   # recomputed elsewhere
    assert_same(ds, serial)


def test_a_local_cluster_listens_on_loopback_only_and_has_no_dashboard(client):
    import urllib.error
    import urllib.request

    import psutil
    addresses = [client.scheduler.address, *client.nthreads()]
    assert len(addresses) == 3 and all(a.startswith("tcp://127.0.0.1:") for a in addresses), addresses
    assert set(client.nthreads().values()) == {1}                  # single-threaded workers
    pids = [os.getpid(), *client.run(os.getpid).values()]      # scheduler and nannies run in this process
    listening = {c.laddr.ip for p in pids for c in psutil.Process(p).net_connections("tcp")
                 if c.status == psutil.CONN_LISTEN}
    assert listening == {"127.0.0.1"}
    port = client.scheduler_info()["services"]["dashboard"]    # the scheduler's HTTP API, no dashboard pages
    with pytest.raises(urllib.error.HTTPError, match="404"):
        urllib.request.urlopen(f"http://127.0.0.1:{port}/status", timeout=10)


def test_local_cluster_sweep_equals_the_serial_sweep_and_compiles_once_per_worker(scn, serial, client, tmp_path):
    ds = run_scenario(scn, tmp_path / "out", progress=False, client=client)
    assert_same(ds, serial)
    assert_same(open_results(tmp_path / "out"), serial)
    assert json.loads(ds.attrs["batches_computed_this_run"]) == BATCHES
    who = json.loads(ds.attrs["cluster_workers_this_run"])
    assert sorted(b for w in who.values() for b in w["batches"]) == BATCHES      # each batch once
    for w in who.values():      # the model and kernels are built on a worker's first batch only
        assert all(c == 0 for c in w["programs_compiled"][1:]), w


def test_an_interrupted_cluster_run_resumes_with_or_without_the_cluster(scn, serial, client, tmp_path):
    for rerun_on_cluster, stop_after in ((True, 2), (False, 3)):
        out = tmp_path / f"out-{rerun_on_cluster}"
        done = []

        def interrupt(b, done=done, stop_after=stop_after):
            done.append(b)
            if len(done) == stop_after:
                raise KeyboardInterrupt

        with pytest.raises(KeyboardInterrupt):
            run_scenario(scn, out, progress=False, client=client, after_batch=interrupt)
        kept = _checkpoints(out)
        assert kept == sorted(done) and not (out / "results.nc").exists()
        ds = run_scenario(scn, out, progress=False, client=client if rerun_on_cluster else None)
        assert json.loads(ds.attrs["batches_computed_this_run"]) == [b for b in BATCHES if b not in kept]
        assert_same(ds, serial)


def test_the_command_reads_the_scheduler_address_from_the_environment(serial, client, tmp_path, monkeypatch, capsys):
    p = tmp_path / "s.toml"
    p.write_text(SWEEP, encoding="utf-8")
    monkeypatch.setenv(cluster.ENV, client.scheduler.address)
    assert main(["run", str(p)]) == 0
    err = capsys.readouterr().err
    assert "on 2 Dask workers at tcp://127.0.0.1:" in err and "8/8" in err
    ds = open_results(tmp_path / "out")
    assert "cluster_workers_this_run" in ds.attrs
    assert_same(ds, serial)


# ------------------------------------------------------------------------ fits and grids -------
def test_fit_starts_in_parallel_give_the_serial_result(client, tmp_path, capsys):
    """``crosswind fit --cluster ADDRESS`` runs the starts as Dask tasks and reports what the serial
    fit with the same seed finds, to the last bit; the starts are compared one by one as well."""
    p = tmp_path / "f.toml"
    p.write_text(FIT, encoding="utf-8")
    scn = load_scenario(p)
    x = np.array([0.12, 0.135, 0.15, 0.165])
    y = np.array([5.80e-7, 1.47e-7, 5.95e-8, 2.80e-8])       # the model at tilt = 5e4 m/s, ±2 %
    err = 0.02 * y
    data = tmp_path / "d.csv"
    data.write_text("mu_eV [eV], V2w [V], V2w_err [V]\n"
                    + "".join(f"{a!r}, {b!r}, {c!r}\n" for a, b, c in zip(x.tolist(), y.tolist(), err.tolist())),
                    encoding="utf-8")
    _, resid, initial, bounds, options = scenario_fit._problem(scn, x, y, err)
    starts = []
    here = fit(resid, initial, bounds=bounds, starts=2, absolute_sigma=True, **options,
               progress=lambda line: starts.append(line.split(",")[0]))
    assert len(set(starts)) == 2 and here.converged and here.starts_tried == 2
    assert abs(here.values["tilt"] - 5e4) < 3 * here.stderr["tilt"]

    assert main(["fit", str(p), "--data", str(data), "--output", str(tmp_path / "fit"), "--progress",
                 "--cluster", client.scheduler.address]) == 0
    assert "2 starts on 2 Dask workers" in capsys.readouterr().err
    there = json.loads((tmp_path / "fit" / "fit.json").read_text(encoding="utf-8"))
    assert there["starts"] == 2 and there["values"] == here.values and there["stderr"] == here.stderr
    assert (there["chi2_reduced"], there["nfev"], there["message"]) == (here.chi2_reduced, here.nfev, here.message)
    assert there["correlation"] == np.asarray(here.correlation).tolist()


def test_map_response_over_a_parameter_grid(client):
    grid = {"mass": [0.08, 0.1, 0.12], "tilt": [3e4, 5e4]}
    mu = np.array([0.13, 0.15])
    ds = cluster.map_response(client, "massive-dirac", grid, mu=mu, temperature=20.0, tau=100.0,
                              fixed={"velocity": 5e5, "valleys": 2}, resolution=0, chunk=4)
    assert ds["chi"].dims == ("mass", "tilt", "condition", "i", "j", "k")
    assert ds["sigma"].attrs["units"] == "S" and list(ds["mass"].values) == grid["mass"]
    for i, m in enumerate(grid["mass"]):
        for j, t in enumerate(grid["tilt"]):
            r = response(build("massive-dirac", velocity=5e5, valleys=2, mass=m, tilt=t), mu=mu, temperature=20.0,
                         tau=100.0, resolution=0)
            assert np.array_equal(ds["chi"].values[i, j], np.asarray(r.chi).real)
            assert np.array_equal(ds["dipole"].values[i, j], np.asarray(r.dipole))
            assert np.array_equal(ds["sigma_imag"].values[i, j], np.asarray(r.sigma).imag)
