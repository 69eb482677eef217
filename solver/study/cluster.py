"""Running a study on a Dask cluster: a local one, an existing scheduler, or a batch-queue cluster.

Dask (``pip install "crosswind[cluster]"``) is optional: this module imports ``dask.distributed``
only inside the functions that need it, so a run without a cluster never imports it from here
(``tests/test_layout.py`` allows exactly these function-local imports).  docs/cluster.md is the
user's guide.

Addresses (``crosswind run --cluster ADDRESS``, the environment variable ``CROSSWIND_CLUSTER``, or
:func:`open_client`):

* ``local`` / ``local:N`` start a :class:`distributed.LocalCluster` of N single-threaded worker
  processes (``local``: one per core) listening on the loopback interface only, its dashboard off
  unless ``dashboard=`` names an address;
* ``tcp://host:port``, ``tls://host:port`` (or ``host:port``, read as tcp) connect to a running
  scheduler; TLS and its certificates come from Dask's own configuration
  (``distributed.comm.tls.*``), the connection timeout from ``distributed.comm.timeouts.connect``.
  A scheduler that cannot be reached is a :class:`ClusterError` naming the address.

What travels to the workers: the scenario text, the content of its tight-binding file (TOML
text) and arrays; the task functions are this package's module-level functions (by name).  A
worker parses the scenario once (:func:`worker_scenario`), builds the model and compiles the
kernels on its first task and reuses them for every later task; :func:`worker_record` counts the
XLA programs each task built (``jax.monitoring``), which the sweep reports per worker.
"""
from __future__ import annotations

import contextlib
import hashlib
import os
import tempfile
import time
import tomllib
import uuid
import warnings
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path

import jax
import numpy as np

from crosswind import __version__
from crosswind.models import build
from crosswind.solver.engine.response import response
from crosswind.solver.pytrees import as_dict
from crosswind.solver.study.files import scenario_toml
from crosswind.solver.study.scenario import Scenario, parse_scenario
from crosswind.solver.vocabulary import KNOBS, field

ENV = "CROSSWIND_CLUSTER"
ADDRESS_FORMS = "'local', 'local:N' (N worker processes on this machine) or a scheduler address 'tcp://host:port'"
OFF = ("", "off", "none", "no")


class ClusterError(RuntimeError):
    """A cluster address that cannot be used: malformed, Dask not installed, scheduler unreachable."""


def _no_dask(exc: ImportError) -> ClusterError:
    return ClusterError(f"running on a cluster needs Dask ({exc}); install it with: pip install \"crosswind[cluster]\" "
                        "(or pip install \"dask[distributed]\")")


# ----------------------------------------------------------------------- addresses, clients --
def parse_address(text: str | None) -> tuple[str, int | str] | None:
    """``None`` (no cluster), ``("local", N)`` or ``("remote", "tcp://host:port")`` from an address."""
    if text is None or text.strip().lower() in OFF:
        return None
    t = text.strip()
    if t == "local" or t.startswith("local:"):
        n = t[6:] if t != "local" else ""
        if n == "":
            return "local", len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
        if not n.isdigit() or int(n) < 1:
            raise ClusterError(f"cluster address {text!r}: N in 'local:N' must be a whole number >= 1")
        return "local", int(n)
    if "://" not in t:
        if ":" not in t:
            raise ClusterError(f"cluster address {text!r} is not understood; use {ADDRESS_FORMS}")
        t = "tcp://" + t
    scheme = t.split("://", 1)[0]
    if scheme not in ("tcp", "tls", "ws", "wss", "ucx", "inproc"):
        raise ClusterError(f"cluster address {text!r}: unknown protocol '{scheme}'; use {ADDRESS_FORMS}")
    return "remote", t


def address_from_environment() -> str | None:
    """The address in ``$CROSSWIND_CLUSTER`` (``None`` when unset, empty or ``off``)."""
    value = os.environ.get(ENV)
    return None if value is None or value.strip().lower() in OFF else value.strip()


def local_cluster(n_workers: int, *, dashboard: str | None = None):
    """A :class:`distributed.LocalCluster` of ``n_workers`` single-threaded worker processes on
    127.0.0.1 (nothing listens on other interfaces); the dashboard only when ``dashboard`` gives an
    address such as ``"127.0.0.1:8787"``."""
    try:
        from distributed import LocalCluster
    except ImportError as exc:
        raise _no_dask(exc) from exc
    # without a dashboard the scheduler still serves its small HTTP API (health, metrics): on a free
    # loopback port rather than the dashboard's usual 8787
    http = {} if dashboard is not None else {"scheduler_kwargs": {"dashboard_address": "127.0.0.1:0"}}
    return LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                        scheduler_port=0, dashboard_address=dashboard, worker_dashboard_address=None,
                        silence_logs=40, **http)


def connect(address: str):
    """A :class:`distributed.Client` of the scheduler at ``address`` (Dask's security and timeout
    configuration apply); :class:`ClusterError` naming the address when it cannot be reached."""
    try:
        from distributed import Client
    except ImportError as exc:
        raise _no_dask(exc) from exc
    try:
        return Client(address, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        raise ClusterError(f"cannot reach the Dask scheduler at {address} ({type(exc).__name__}: {exc}); check that "
                           "the scheduler runs, the address and port, and that this machine may connect to it "
                           "(firewall, TLS settings; docs/cluster.md)") from None


@contextlib.contextmanager
def open_client(address: str, *, dashboard: str | None = None) -> Iterator:
    """A client for ``address`` (:func:`parse_address`), closed afterwards together with a local
    cluster started for it.  Raises :class:`ClusterError` before anything else happens when the
    address is malformed, Dask is missing or the scheduler cannot be reached."""
    kind, where = parse_address(address) or (None, None)
    if kind is None:
        raise ClusterError(f"no cluster address given; use {ADDRESS_FORMS}")
    if kind == "local":
        cluster = local_cluster(int(where), dashboard=dashboard)
        try:
            from distributed import Client
            client = Client(cluster, set_as_default=False)
            try:
                if dashboard is not None:
                    print(f"crosswind: Dask dashboard at {cluster.dashboard_link}", flush=True)
                yield client
            finally:
                client.close()
        finally:
            cluster.close()
    else:
        client = connect(str(where))
        try:
            yield client
        finally:
            client.close()


def workers_in_use(client) -> int:
    """Number of workers connected to the client's scheduler now."""
    return len(client.nthreads())


def describe(client) -> str:
    """"N Dask workers at ADDRESS" for progress lines."""
    n = workers_in_use(client)
    return f"{n} Dask worker{'s' if n != 1 else ''} at {client.scheduler.address}"


# ----------------------------------------------------------------------- what travels ---------
def scenario_payload(scn: Scenario) -> dict:
    """What a worker needs to rebuild ``scn``: its text, its source name and, for a tight-binding
    model, the definition file's text (workers need no shared file system)."""
    tb = scn.material.tight_binding
    return {"text": scn.text, "source": str(scn.path),
            "tight_binding": None if tb is None else Path(tb).read_text(encoding="utf-8"),
            "tight_binding_name": None if tb is None else Path(tb).name}


_SCENARIOS: dict = {}
_WORKER_DIR: list = []


def worker_scenario(payload: dict) -> Scenario:
    """The scenario of ``payload`` (:func:`scenario_payload`), parsed once per process and kept
    (so the model is built and the kernels compiled once per worker).  A tight-binding file is
    written into a private temporary folder and the scenario pointed at it."""
    key = hashlib.sha256(repr(sorted(payload.items())).encode()).hexdigest()
    scn = _SCENARIOS.get(key)
    if scn is not None:
        return scn
    text, base = payload["text"], None
    if payload.get("tight_binding") is not None:
        if not _WORKER_DIR:
            _WORKER_DIR.append(Path(tempfile.mkdtemp(prefix="crosswind-worker-")))
        folder = _WORKER_DIR[0] / key[:16]
        folder.mkdir(exist_ok=True)
        (folder / payload["tight_binding_name"]).write_text(payload["tight_binding"], encoding="utf-8")
        data = tomllib.loads(text)
        data["material"]["tight_binding"] = payload["tight_binding_name"]
        text, base = scenario_toml(data), folder
    with warnings.catch_warnings():       # plausibility warnings were shown to the user on the client
        warnings.simplefilter("ignore")
        scn = parse_scenario(text, source=payload["source"], base=base)
    _SCENARIOS[key] = scn
    return scn


# ----------------------------------------------------------------------- compilations ---------
_COMPILES = {"programs": 0, "listening": False}
_COMPILE_EVENT = "/jax/core/compile/backend_compile_duration"   # one per XLA program built or loaded


def _count(event, duration, **kwargs):
    if event == _COMPILE_EVENT:
        _COMPILES["programs"] += 1


def programs_built() -> int:
    """XLA programs this process has built (compiled, or loaded from the persistent cache) since
    the counter was first asked for."""
    if not _COMPILES["listening"]:
        jax.monitoring.register_event_duration_secs_listener(_count)
        _COMPILES["listening"] = True
    return _COMPILES["programs"]


def worker_record(run: Callable[[], object]):
    """``(result of run(), {"worker", "pid", "programs_compiled", "seconds", "version"})``: who ran a
    task, how many XLA programs it had to build, how long it took there and its Crosswind version."""
    before, t0 = programs_built(), time.perf_counter()
    out = run()
    seconds = time.perf_counter() - t0
    try:
        from distributed import get_worker
        who = get_worker().address
    except (ImportError, ValueError):
        who = "local"
    return out, {"worker": who, "pid": os.getpid(), "programs_compiled": programs_built() - before,
                 "seconds": round(seconds, 4), "version": __version__}


def check_version(who: dict) -> None:
    """Refuse the result of a worker running another Crosswind version than this client."""
    if who.get("version") != __version__:
        raise ClusterError(f"Dask worker {who.get('worker')} runs crosswind {who.get('version')}, this client "
                           f"{__version__}; install the same version on every worker")


# ----------------------------------------------------------------------- running tasks --------
def affinity(items: list, workers: list) -> dict:
    """{item: worker}: the items (in an order where neighbours share a model and a compiled
    program) cut into ``len(workers)`` contiguous runs, one run per worker."""
    if not workers:
        return {}
    w = len(workers)
    return {it: workers[min(i * w // max(len(items), 1), w - 1)] for i, it in enumerate(items)}


def submit_ordered(client, fn: Callable, args: dict, *, name: str) -> dict:
    """Submit ``fn(*args[k])`` for every key ``k`` (in order) as Dask tasks; returns {future: k}.
    Neighbouring keys go preferably to the same worker (:func:`affinity`; other workers may take
    them when it is busy or gone: a worker that dies costs only its running task, which the
    scheduler gives to another worker) and run in key order."""
    keys = list(args)
    where = affinity(keys, sorted(client.nthreads()))
    futures, token = {}, uuid.uuid4().hex[:8]      # keys unique to this call: a client may run many
    for i, k in enumerate(keys):
        f = client.submit(fn, *args[k], key=f"{name}-{token}-{i:06d}", priority=len(keys) - i, pure=False,
                          workers=[where[k]] if k in where else None, allow_other_workers=True)
        futures[f] = k
    return futures


def finished(client, futures: dict) -> Iterable:
    """``(key, result)`` of the futures of :func:`submit_ordered` as they finish; pending futures
    are cancelled when the caller stops early (an error or Ctrl-C)."""
    from distributed import as_completed
    pending = set(futures)
    try:
        for fut in as_completed(list(futures), loop=client.loop):
            pending.discard(fut)
            yield futures[fut], fut.result()
    finally:
        for fut in pending:
            fut.cancel()


def gather_in_order(client, fn: Callable, args: list, *, name: str) -> list:
    """``[fn(*a) for a in args]`` computed on the cluster, in the order of ``args``."""
    out = dict(finished(client, submit_ordered(client, fn, dict(enumerate(args)), name=name)))
    return [out[i] for i in range(len(args))]


# ----------------------------------------------------------------------- response on a grid ---
RESPONSE_FIELDS = ("density", "sigma", "sigma_anomalous", "dipole", "chi", "chi_dc")


def _response_chunk(model: str, fixed: dict, points: dict, conditions: dict, options: dict) -> dict:
    """Worker side of :func:`map_response`: ``response`` at every parameter point of the chunk."""
    rows: dict = {}
    for j in range(len(next(iter(points.values())))):
        params = dict(fixed, **{k: float(v[j]) for k, v in points.items()})
        r = response(build(model, **params), **conditions, **options)
        got = {k: np.asarray(getattr(r, k)) for k in RESPONSE_FIELDS}
        got.update({f"chi_{k}": np.asarray(v) for k, v in as_dict(r.chi_parts).items()})
        got.update({f"error_{k}": np.asarray(getattr(r.error, k)) for k in RESPONSE_FIELDS})
        for k, v in got.items():
            rows.setdefault(k, []).append(v)
    return {k: np.stack(v) for k, v in rows.items()}


def map_response(client, model: str, grid: dict, *, mu, temperature, tau, frequency: float = 0.0,
                 fixed: dict | None = None, resolution: int | None = 1, chunk: int = 16, **options):
    """:func:`~crosswind.solver.engine.response.response` of catalogue ``model`` on every point of
    the outer product of ``grid`` ({parameter: 1-D values}, e.g. strain_xx × mass), computed on the
    Dask ``client`` in tasks of ``chunk`` points; ``fixed`` holds the other parameters, ``mu``,
    ``temperature``, ``tau`` (scalars, or 1-D arrays of one length: a ``condition`` axis) and
    ``options`` go to ``response``.  Returns an xarray Dataset with one dimension per grid
    parameter (then ``condition`` when the conditions are arrays, then tensor indices ``i, j, k``),
    every field and its ``error_<field>`` with SI units.  The default fixed ``resolution`` compiles
    once per worker; ``None`` refines each point to ``rtol`` (new mesh plans may compile again)."""
    import xarray as xr
    names = list(grid)
    values = [np.asarray(grid[k], dtype=float).reshape(-1) for k in names]
    mesh = [m.reshape(-1) for m in np.meshgrid(*values, indexing="ij")]
    n = mesh[0].size if mesh else 0
    conds = {"mu": mu, "temperature": temperature, "tau": tau}
    shapes = {np.shape(v) for v in conds.values()} - {()}
    if len(shapes) > 1 or any(len(s) != 1 for s in shapes):
        raise ValueError(f"map_response: mu, temperature and tau must be scalars or 1-D arrays of one length, "
                         f"got shapes {[np.shape(v) for v in conds.values()]}")
    conditions = {k: np.asarray(v, dtype=float) for k, v in conds.items()}
    opts = dict(options, frequency=frequency, resolution=resolution)
    tasks = [(model, dict(fixed or {}), {k: m[s:s + chunk] for k, m in zip(names, mesh)}, conditions, opts)
             for s in range(0, n, chunk)]
    if not tasks:
        raise ValueError("map_response: the grid is empty")
    parts = gather_in_order(client, _response_chunk, tasks, name=f"crosswind-response-{model}")
    dim = build(model, **dict(fixed or {})).dim
    shape = tuple(v.size for v in values)
    cond_dims = ["condition"] if shapes else []
    data = {}
    for k in parts[0]:
        v = np.concatenate([p[k] for p in parts]).reshape(shape + parts[0][k].shape[1:])
        dims = names + cond_dims
        dims = dims + ["i", "j", "k"][:v.ndim - len(dims)]
        f = field(k)
        attrs = {"units": f.unit(dim), "long_name": f.long_name}
        if np.iscomplexobj(v):
            data[k] = (dims, v.real, attrs)
            data[k + "_imag"] = (dims, v.imag, dict(attrs, long_name="imaginary part of " + attrs["long_name"]))
        else:
            data[k] = (dims, v, attrs)
    coords = {k: (k, v) for k, v in zip(names, values)}
    if shapes:
        for k, knob in (("mu", "mu_eV"), ("temperature", "temperature_K"), ("tau", "tau_fs")):
            coords[f"{k}_condition"] = ("condition", np.broadcast_to(conditions[k], next(iter(shapes))),
                                        {"units": KNOBS[knob].unit, "long_name": KNOBS[knob].long_name})
    ds = xr.Dataset(data, coords=coords)
    ds.attrs.update({"title": f"Crosswind response of {model} on a parameter grid", "model": model,
                     "fixed_parameters": repr(dict(fixed or {})), "frequency_Hz": float(frequency),
                     "resolution": "auto" if resolution is None else int(resolution)})
    return ds


__all__ = ["ENV", "ClusterError", "address_from_environment", "connect", "local_cluster", "map_response",
           "open_client", "parse_address", "scenario_payload", "worker_scenario", "workers_in_use"]
