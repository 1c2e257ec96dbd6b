"""The move to a real cluster: deployment files, object-store run stores, TLS, waiting
for workers, the packaged configuration.

Everything here runs real processes on 127.0.0.1: ``dask scheduler`` and ``dask worker``
started exactly as the deployment files start them, a local S3-compatible server (moto
in server mode, a separate process speaking HTTP: not a mock object), and the `chitally`
command. Every curve is compared with `chitally.euler_curve` on the same points, itself
checked once against an outside reference (networkx ``enumerate_all_cliques``, brute
force). Waits poll files, listings or the scheduler with a timeout; none sleeps to
synchronise. Docker and Kubernetes cannot run here: their files are parsed and every
command line in them is checked against the real command-line interfaces.
"""

from __future__ import annotations

import datetime as dt
import ipaddress
import json
import os
import re
import shlex
import signal
import socket
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import yaml
from helpers import HOST, Processes, cloud, explain, start_cluster, wait_for, write_points
from helpers import processes  # noqa: F401 - fixture
from references import brute_force_curve

import chitally as ct
from chitally.runs import open_run, read_result

import deploy_tasks

pytestmark = [pytest.mark.cluster, pytest.mark.timeout(300)]

ROOT = Path(__file__).resolve().parents[1]
SRC, TESTS, DEPLOY = ROOT / "src", ROOT / "tests", ROOT / "deploy"
PY = sys.executable
BIN = Path(PY).parent
PYTHONPATH = os.pathsep.join([str(SRC), str(TESTS)])
EPS, COST, N_POINTS = 0.05, 8000, 1200  # 16 tasks
SECRET = "s3cr3t-Zq8wVb4-never-in-a-store-or-a-log"


def env(**extra: str) -> dict[str, str]:
    return {"PYTHONPATH": PYTHONPATH, **extra}


def command(*args: object, timeout: float = 180, extra_env: dict[str, str] | None = None,
            driver: bool = False) -> subprocess.CompletedProcess:
    """`chitally ARGS` to its end, in a process group of its own killed afterwards.
    With `driver`, the engine's task function is the test wrapper (deploy_tasks)."""
    head = [PY, str(TESTS / "deploy_tasks.py")] if driver else [PY, "-m", "chitally.cli"]
    argv = [*head, *map(str, args)]
    child = {k: v for k, v in os.environ.items()
             if k != "DASK_SCHEDULER_ADDRESS" and not k.startswith(("CHITALLY_", "DASK_CHITALLY"))}
    child.update(env(**(extra_env or {})))
    with subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                          stdin=subprocess.DEVNULL, env=child, start_new_session=True) as p:
        try:
            out, err = p.communicate(timeout=timeout)
        finally:
            try:
                os.killpg(p.pid, signal.SIGKILL)
            except (ProcessLookupError, PermissionError):
                pass
    return subprocess.CompletedProcess(argv, p.returncode, out, err)


def one_error_line(res: subprocess.CompletedProcess) -> str:
    """The run failed with exactly one line on stderr in the tool's error style."""
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("chitally: error: "), explain(res)
    return lines[0]


def free_port() -> int:
    with socket.socket() as s:
        s.bind((HOST, 0))
        return int(s.getsockname()[1])


@pytest.fixture(scope="module")
def points() -> np.ndarray:
    return cloud(N_POINTS, seed=5)


@pytest.fixture(scope="module")
def expected(points: np.ndarray) -> ct.Curve:
    """`euler_curve`, checked against the outside reference (networkx
    ``enumerate_all_cliques``, brute force: references.brute_force_curve)."""
    curve = ct.euler_curve(points, EPS)
    assert curve == brute_force_curve(points, EPS, None)
    return curve


@pytest.fixture
def faults(tmp_path: Path):
    """The task wrapper's settings: tasks >= hold_from wait for the gate file."""
    log = tmp_path / "attempts"
    log.mkdir()

    def write(hold_from: int | None = None) -> Path:
        cfg = tmp_path / "faults.json"
        cfg.write_text(json.dumps({"log": str(log), "hold_from": hold_from,
                                   "gate": str(tmp_path / "gate")}))
        return cfg

    write.log = log  # type: ignore[attr-defined]
    write.gate = tmp_path / "gate"  # type: ignore[attr-defined]
    return write


# ------------------------------------------------------------ configuration and options


def test_packaged_config_is_loaded_and_overridable_the_dask_way(tmp_path):
    import dask.config

    from chitally import cluster

    packaged = yaml.safe_load((SRC / "chitally" / "chitally.yaml").read_text())["chitally"]
    assert cluster.setting("retries") == packaged["retries"]
    assert cluster.seconds("scheduler.wait-timeout") == 300.0  # "5m" in the file
    assert cluster.setting("retries", 9) == 9  # a keyword wins
    with dask.config.set({"chitally.lost-after": "7s"}):
        assert cluster.seconds("lost-after") == 7.0
        assert cluster.seconds("lost-after", 2.5) == 2.5
    # environment variables and a user's config file override the packaged defaults
    user = tmp_path / "config"
    user.mkdir()
    (user / "mine.yaml").write_text("chitally:\n  window-factor: 6\n")
    code = ("from chitally import cluster; print(cluster.setting('window-factor'), "
            "cluster.seconds('scheduler.wait-timeout'), cluster.setting('retries'))")
    res = subprocess.run([PY, "-c", code], capture_output=True, text=True, timeout=120,
                         env={**os.environ, **env(), "DASK_CONFIG": str(user),
                              "DASK_CHITALLY__SCHEDULER__WAIT_TIMEOUT": "17s",
                              "DASK_CHITALLY__RETRIES": "5"})
    assert res.returncode == 0, res.stderr
    assert res.stdout.split() == ["6", "17.0", "5"]


class _Info:
    """A client stand-in that answers scheduler_info() only."""

    def __init__(self, threads: list[int]) -> None:
        self.threads = threads

    def scheduler_info(self, **_: object) -> dict:
        return {"workers": {f"w{i}": {"nthreads": n} for i, n in enumerate(self.threads)}}


def test_window_follows_the_configured_factor_and_the_live_threads():
    from chitally.execute import DaskExecutor

    ex = DaskExecutor(_Info([2, 2, 2]), window_factor=4)
    assert ex.window() == 24
    assert DaskExecutor(_Info([2, 2, 2]), window_factor=1.5).window() == 9
    assert DaskExecutor(_Info([]), window_factor=3).window() == 3  # never zero


def test_workers_may_open_the_store_with_their_own_storage_options(tmp_path, points):
    import pickle

    from chitally.jobs.cloud import Params, create_or_open
    from chitally.runs import _for_workers

    store = create_or_open(str(tmp_path / "run"), points, Params.checked(EPS, None, None, COST))
    assert _for_workers(store, None) is store
    view = _for_workers(store, {"endpoint_url": "http://in-cluster:9000"})
    again = pickle.loads(pickle.dumps(view))  # as a worker receives it
    assert again.io.storage_options == {"endpoint_url": "http://in-cluster:9000"}
    assert (again.url, again.plan_digest, again.n_tasks) == (store.url, store.plan_digest, store.n_tasks)
    assert store.io.storage_options == {}


def test_bundle_sizes_come_from_the_store_as_the_driver_reads_it(tmp_path, points):
    # the workers' storage options may not work from the driver (an in-cluster endpoint)
    from chitally.jobs.cloud import Params, create_or_open
    from chitally.runs import _for_workers, _OnWorkers

    store = create_or_open(str(tmp_path / "run"), points, Params.checked(EPS, None, None, COST))
    view = _for_workers(store, {"endpoint_url": "http://in-cluster:9000"})

    def unreachable() -> None:
        raise AssertionError("the driver read the task costs through the workers' options")

    view.task_cost = unreachable

    class Inner:
        def run(self, store, tasks, events, *, cost=None):
            self.seen = (store, list(tasks), cost)
            return "outcome"

    inner = Inner()
    assert _OnWorkers(inner, view).run(store, [0, 1], None) == "outcome"
    assert inner.seen[0] is view and inner.seen[1] == [0, 1]
    assert np.array_equal(inner.seen[2], store.task_cost())


def test_storage_options_from_pairs_and_a_file(tmp_path):
    from chitally.cli import parse_storage_options

    f = tmp_path / "so.json"
    f.write_text(json.dumps({"key": "a", "anon": False, "client_kwargs": {"region_name": "x"}}))
    assert parse_storage_options((), None) is None
    assert parse_storage_options(("anon=true", "key=b", "endpoint_url=http://h:1", "n=3"), str(f)) == {
        "key": "b", "anon": True, "client_kwargs": {"region_name": "x"},
        "endpoint_url": "http://h:1", "n": 3}
    # a malformed pair is refused in one line that does not echo it (it may be a secret)
    res = command("status", tmp_path / "nowhere", "--storage-option", SECRET)
    assert res.returncode == 2
    line = one_error_line(res)
    assert "--storage-option" in line and SECRET not in line
    (tmp_path / "list.json").write_text("[1, 2]")
    res = command("status", tmp_path / "nowhere", "--storage-options", tmp_path / "list.json")
    assert res.returncode == 2 and "not an object" in one_error_line(res)


# ------------------------------------------------------------ object-store run stores


@pytest.fixture(scope="module")
def s3(tmp_path_factory):
    """A local S3-compatible server (moto in server mode) on 127.0.0.1, in its own process."""
    s3fs = pytest.importorskip("s3fs")
    folder = tmp_path_factory.mktemp("s3")
    procs = Processes(folder)
    port = free_port()
    procs.start([PY, "-m", "moto.server", "-H", HOST, "-p", str(port)], name="moto")
    endpoint = f"http://{HOST}:{port}"

    def answers() -> bool:
        try:
            socket.create_connection((HOST, port), timeout=0.5).close()
            return True
        except OSError:
            return False

    try:
        wait_for(answers, 60, "the S3 server to listen")
        fs = s3fs.S3FileSystem(key="deploytest", secret=SECRET, endpoint_url=endpoint,
                               skip_instance_cache=True)
        yield endpoint, fs
    finally:
        procs.close()


def s3_commits(fs, prefix: str) -> set[int]:
    try:
        names = fs.ls(f"{prefix}/commits", refresh=True)
    except FileNotFoundError:
        return set()
    return {int(m.group(1)) for n in names if (m := re.search(r"task-(\d+)\.json$", n))}


def test_object_store_sees_keys_another_process_wrote_after_a_listing(s3):
    """A commit record or lease generation written elsewhere after this process listed
    the folder must be visible at once (fsspec's listings cache would hide it)."""
    import s3fs

    from chitally.store.io import StoreIO

    endpoint, fs = s3
    fs.mkdir("listing")
    opts = {"key": "deploytest", "secret": SECRET, "endpoint_url": endpoint}
    io = StoreIO("s3://listing/run", opts)
    io.set("commits/task-000001.json", b"{}", what="test")
    assert io.list("commits/") == ["commits/task-000001.json"]
    other = s3fs.S3FileSystem(skip_instance_cache=True, **opts)  # as another process would
    other.pipe("listing/run/commits/task-000002.json", b'{"a": 1}')
    assert io.exists("commits/task-000002.json")
    assert io.get("commits/task-000002.json") == b'{"a": 1}'
    # a conditional create refuses an existing key on this backend (S3 If-None-Match)
    assert io.create_only("commits/task-000003.json", b"mine", what="test")
    other.pipe("listing/run/commits/task-000004.json", b"theirs")
    assert not io.create_only("commits/task-000004.json", b"mine", what="test")
    assert other.cat("listing/run/commits/task-000004.json") == b"theirs"


def test_object_store_run_keeps_its_secret_out_of_the_store_and_the_output(tmp_path, points, expected, s3):
    endpoint, fs = s3
    fs.mkdir("plain")
    src = write_points(tmp_path / "points.npy", points)
    secret_file = tmp_path / "storage.json"
    secret_file.write_text(json.dumps({"secret": SECRET}))
    store_args = ["--storage-options", secret_file, "--storage-option", "key=deploytest",
                  "--storage-option", f"endpoint_url={endpoint}"]
    # few, larger tasks: every task costs tens of requests to the local server
    res = command("-v", "run", src, "--eps", EPS, "--task-cost", 4 * COST, "--out", "s3://plain/run",
                  *store_args, "--serial", "--no-progress")  # -v: the info log too
    assert res.returncode == 0, explain(res)
    opts = {"key": "deploytest", "secret": SECRET, "endpoint_url": endpoint}
    assert read_result(open_run("s3://plain/run", storage_options=opts)) == expected
    exported = command("-v", "export", "s3://plain/run", *store_args, "--out", tmp_path / "curve.npz")
    assert exported.returncode == 0, explain(exported)
    assert ct.Curve.load(tmp_path / "curve.npz") == expected
    keys = fs.find("plain")
    assert any(k.endswith("created.json") for k in keys) and any("/commits/" in k for k in keys)
    for key in keys:
        assert SECRET.encode() not in fs.cat(key), key
    for out in (res, exported):
        assert SECRET not in out.stdout + out.stderr


@pytest.mark.slow
def test_object_store_run_killed_then_resumed_and_a_second_writer_refused(
        tmp_path, processes, points, expected, s3, faults):
    endpoint, fs = s3
    fs.mkdir("kill")
    url, prefix = "s3://kill/run", "kill/run"
    src = write_points(tmp_path / "points.npy", points)
    secret_file = tmp_path / "storage.json"  # the credentials travel in a file, not in argv
    secret_file.write_text(json.dumps({"key": "deploytest", "secret": SECRET}))
    store_args = ["--storage-options", secret_file, "--storage-option", f"endpoint_url={endpoint}"]
    hold_from = 4
    cfg = faults(hold_from)
    cluster = start_cluster(processes, tmp_path / "cluster", 2,
                            env=env(DEPLOYTEST_FAULTS=str(cfg)))

    driver = processes.start(
        [PY, str(TESTS / "deploy_tasks.py"), "run", str(src), "--eps", str(EPS), "--task-cost",
         str(COST), "--out", url, *map(str, store_args), "--scheduler", cluster.address,
         "--no-progress"], env=env(DEPLOYTEST_FAULTS=str(cfg)), name="driver")
    wait_for(lambda: s3_commits(fs, prefix) >= set(range(hold_from)) or driver.popen.poll() is not None,
             180, "the first tasks to commit on the object store")
    assert driver.popen.poll() is None, driver.stderr()
    n_tasks = open_run(url, storage_options={"key": "deploytest", "secret": SECRET,
                                             "endpoint_url": endpoint}).n_tasks
    assert n_tasks > hold_from + 4

    # a second writer is refused while the first holds the lease
    second = command("resume", url, *store_args, "--scheduler", cluster.address, "--no-progress")
    assert second.returncode == 4, explain(second)
    assert "in use by" in one_error_line(second)

    processes.kill(driver)  # SIGKILL: no goodbye, the lease stays behind
    before = s3_commits(fs, prefix)
    records = {t: fs.cat(f"{prefix}/commits/task-{t:06d}.json") for t in before}
    log_before = deploy_tasks.attempts(faults.log)
    faults.gate.touch()  # held attempts of the dead driver may finish now: they may commit

    res = command("resume", url, *store_args, "--scheduler", cluster.address, "--no-progress",
                  driver=True, extra_env={"DEPLOYTEST_FAULTS": str(cfg)})
    assert res.returncode == 0, explain(res)
    opts = {"key": "deploytest", "secret": SECRET, "endpoint_url": endpoint}
    assert read_result(open_run(url, storage_options=opts)) == expected
    # nothing committed before the resume was computed again, and its records are untouched
    computed_late = _computed_after(log_before, deploy_tasks.attempts(faults.log))
    assert not (computed_late & before), (sorted(before), sorted(computed_late))
    assert {t: fs.cat(f"{prefix}/commits/task-{t:06d}.json") for t in before} == records
    assert s3_commits(fs, prefix) == set(range(n_tasks))

    # status and export reach the store with the same options
    st = command("status", url, *store_args, "--json")
    assert st.returncode == 0 and json.loads(st.stdout)["complete"] is True, explain(st)

    # no credential in the store, in any process's output, or in the workers' folders
    for key in fs.find("kill"):
        assert SECRET.encode() not in fs.cat(key), key
    for text in (second.stdout, second.stderr, res.stdout, res.stderr, st.stdout, st.stderr):
        assert SECRET not in text
    for f in tmp_path.rglob("*"):
        if f.is_file() and f != secret_file:
            assert SECRET.encode() not in f.read_bytes(), f


def _computed_after(before: list[tuple[int, int, str]], now: list[tuple[int, int, str]]) -> set[int]:
    """Tasks with a 'computed' attempt logged after the `before` snapshot (per-process logs
    only grow, so the new entries are the ones past each process's earlier count)."""
    seen: dict[int, int] = {}
    for _, pid, _ in before:
        seen[pid] = seen.get(pid, 0) + 1
    out, count = set(), {}
    for task, pid, how in now:
        count[pid] = count.get(pid, 0) + 1
        if count[pid] > seen.get(pid, 0) and how == "computed":
            out.add(task)
    return out


def test_memory_store_runs_serially_and_is_refused_by_workers_that_cannot_see_it(
        tmp_path, processes, points, expected):
    src = write_points(tmp_path / "points.npy", points)
    res = command("run", src, "--eps", EPS, "--task-cost", COST, "--out", "memory://deploy/run",
                  "--serial", "--no-progress")
    assert res.returncode == 0, explain(res)
    assert f"chi(eps) = {expected.final}," in res.stderr and f"digest {expected.digest()[:16]}" in res.stderr
    # memory:// lives in one process: a cluster's workers cannot open it, and say so
    cluster = start_cluster(processes, tmp_path / "cluster", 1, env=env())
    res = command("run", src, "--eps", EPS, "--task-cost", COST, "--out", "memory://deploy/run2",
                  "--scheduler", cluster.address, "--no-progress")
    assert res.returncode == 1, explain(res)
    assert "cannot open the run store memory://deploy/run2" in one_error_line(res)


def test_local_cluster_listens_on_loopback_only():
    """The default cluster: scheduler, workers, nannies and dashboard bound to 127.0.0.1."""
    import psutil

    from chitally.cluster import connect

    before = {c.laddr for c in psutil.Process().net_connections(kind="inet") if c.status == "LISTEN"}
    conn = connect(workers=1, threads=1)
    try:
        pids = [os.getpid(), *conn.client.run(os.getpid).values()]
        pids += [psutil.Process(p).ppid() for p in pids[1:]]  # the nannies
        listening = set()
        for pid in set(pids):
            listening |= {c.laddr for c in psutil.Process(pid).net_connections(kind="inet")
                          if c.status == "LISTEN"}
        listening -= before
        assert len(listening) >= 4  # scheduler, dashboard, worker, nanny at least
        assert {a.ip for a in listening} == {HOST}, listening
        assert conn.dashboard and conn.dashboard.startswith(f"http://{HOST}:")
    finally:
        conn.close()


# ------------------------------------------------------------------------------- TLS


def _ca(name: str):
    from cryptography import x509
    from cryptography.hazmat.primitives import hashes
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import NameOID

    key = ec.generate_private_key(ec.SECP256R1())
    subject = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, name)])
    now = dt.datetime.now(dt.timezone.utc)
    cert = (x509.CertificateBuilder().subject_name(subject).issuer_name(subject)
            .public_key(key.public_key()).serial_number(x509.random_serial_number())
            .not_valid_before(now - dt.timedelta(minutes=5)).not_valid_after(now + dt.timedelta(days=1))
            .add_extension(x509.BasicConstraints(ca=True, path_length=None), critical=True)
            .add_extension(x509.KeyUsage(digital_signature=True, key_cert_sign=True, crl_sign=True,
                                         content_commitment=False, key_encipherment=False,
                                         data_encipherment=False, key_agreement=False,
                                         encipher_only=False, decipher_only=False), critical=True)
            .sign(key, hashes.SHA256()))
    return key, cert


def _leaf(ca_key, ca_cert, name: str):
    from cryptography import x509
    from cryptography.hazmat.primitives import hashes
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID

    key = ec.generate_private_key(ec.SECP256R1())
    now = dt.datetime.now(dt.timezone.utc)
    cert = (x509.CertificateBuilder()
            .subject_name(x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, name)]))
            .issuer_name(ca_cert.subject).public_key(key.public_key())
            .serial_number(x509.random_serial_number())
            .not_valid_before(now - dt.timedelta(minutes=5)).not_valid_after(now + dt.timedelta(days=1))
            .add_extension(x509.SubjectAlternativeName([x509.DNSName("localhost"),
                                                        x509.IPAddress(ipaddress.ip_address(HOST))]),
                           critical=False)
            .add_extension(x509.ExtendedKeyUsage([ExtendedKeyUsageOID.SERVER_AUTH,
                                                  ExtendedKeyUsageOID.CLIENT_AUTH]), critical=False)
            .sign(ca_key, hashes.SHA256()))
    return key, cert


def _write_pki(folder: Path, name: str) -> dict[str, Path]:
    from cryptography.hazmat.primitives import serialization

    folder.mkdir(parents=True, exist_ok=True)
    ca_key, ca_cert = _ca(f"{name} authority")
    key, cert = _leaf(ca_key, ca_cert, f"{name} member")
    files = {"ca": folder / f"{name}-ca.pem", "cert": folder / f"{name}-cert.pem",
             "key": folder / f"{name}-key.pem"}
    files["ca"].write_bytes(ca_cert.public_bytes(serialization.Encoding.PEM))
    files["cert"].write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    files["key"].write_bytes(key.private_bytes(serialization.Encoding.PEM,
                                               serialization.PrivateFormat.PKCS8,
                                               serialization.NoEncryption()))
    files["key"].chmod(0o600)
    return files


def _tls_workers(address: str, pki: dict[str, Path]) -> int:
    from distributed import Client, Security

    sec = Security(tls_ca_file=str(pki["ca"]), tls_client_cert=str(pki["cert"]),
                   tls_client_key=str(pki["key"]), require_encryption=True)
    with Client(address, security=sec, timeout="10s") as client:
        return len(client.scheduler_info()["workers"])


def test_local_cluster_speaks_tls_when_given_certificates(tmp_path):
    from chitally.cluster import connect, make_security

    pki = _write_pki(tmp_path / "pki", "local")
    conn = connect(workers=1, threads=1,
                   security=make_security(str(pki["ca"]), str(pki["cert"]), str(pki["key"])))
    try:
        assert conn.client.scheduler.address.startswith(f"tls://{HOST}:")
        assert all(w.startswith(f"tls://{HOST}:") for w in conn.client.scheduler_info()["workers"])
        assert conn.client.submit(sum, [1, 2, 3]).result(timeout=60) == 6
    finally:
        conn.close()
    with pytest.raises(ValueError, match="--tls-ca-file"):
        make_security(None, str(pki["cert"]), str(pki["key"]))


def test_tls_cluster_gives_the_curve_and_refuses_clients_without_the_right_certificate(
        tmp_path, processes, points, expected):
    pki = _write_pki(tmp_path / "pki", "cluster")
    other = _write_pki(tmp_path / "pki", "other")
    tls = ["--tls-ca-file", str(pki["ca"]), "--tls-cert", str(pki["cert"]), "--tls-key", str(pki["key"])]
    sfile = tmp_path / "scheduler.json"
    processes.start([str(BIN / "dask"), "scheduler", "--protocol", "tls", "--host", HOST, "--port", "0",
                     "--no-dashboard", "--scheduler-file", str(sfile), *tls], env=env(), name="scheduler")
    address = wait_for(lambda: sfile.exists() and json.loads(sfile.read_text() or "{}").get("address"),
                       60, "the TLS scheduler")
    assert address.startswith(f"tls://{HOST}:")
    for k in range(2):
        processes.start([str(BIN / "dask"), "worker", address, "--nthreads", "1", "--host", HOST,
                         "--no-dashboard", "--name", f"w{k}", "--local-directory", str(tmp_path / f"w{k}"),
                         *tls], env=env(), name=f"worker{k}")
    wait_for(lambda: _tls_workers(address, pki) == 2, 90, "two TLS workers")
    src = write_points(tmp_path / "points.npy", points)

    res = command("run", src, "--eps", EPS, "--task-cost", COST, "--out", tmp_path / "run",
                  "--scheduler", address, *tls, "--no-progress")
    assert res.returncode == 0, explain(res)
    assert read_result(open_run(str(tmp_path / "run"))) == expected

    # more workers than the cluster has: a clear refusal after the wait, nothing computed
    res = command("run", src, "--eps", EPS, "--task-cost", COST, "--out", tmp_path / "few",
                  "--scheduler", address, *tls, "--wait-workers", 3, "--wait-timeout", 2, "--no-progress")
    assert res.returncode == 1, explain(res)
    assert "2 of 3 workers connected" in one_error_line(res)
    assert not list((tmp_path / "few").glob("commits/*.json"))

    # no certificate at all
    res = command("run", src, "--eps", EPS, "--task-cost", COST, "--out", tmp_path / "plain",
                  "--scheduler", address, "--no-progress",
                  extra_env={"DASK_CHITALLY__SCHEDULER__CONNECT_TIMEOUT": "5s"})
    assert res.returncode == 1, explain(res)
    line = one_error_line(res)
    assert f"cannot connect to the Dask scheduler at {address}" in line and "--tls-cert" in line

    # a certificate from another authority: the handshake fails both ways
    res = command("run", src, "--eps", EPS, "--task-cost", COST, "--out", tmp_path / "stranger",
                  "--scheduler", address, "--tls-ca-file", other["ca"], "--tls-cert", other["cert"],
                  "--tls-key", other["key"], "--no-progress",
                  extra_env={"DASK_CHITALLY__SCHEDULER__CONNECT_TIMEOUT": "5s"})
    assert res.returncode == 1, explain(res)
    line = one_error_line(res)
    assert f"cannot connect to the Dask scheduler at {address}" in line and "authority" in line
    for out in ("plain", "stranger"):
        assert not list((tmp_path / out).glob("commits/*.json"))


# ------------------------------------------------------------------------------ SLURM

FAKE_SRUN = r"""#!/bin/bash
# srun for a machine without SLURM: --ntasks copies of the command here, SLURM_PROCID set
n=1
while [ $# -gt 0 ]; do
    case "$1" in
        --ntasks=*) n=${1#*=}; shift ;;
        -n|--ntasks) n=$2; shift 2 ;;
        -*) shift ;;
        *) break ;;
    esac
done
pids=()
for ((i = 0; i < n; i++)); do SLURM_PROCID=$i "$@" & pids+=($!); done
trap 'kill "${pids[@]}" 2>/dev/null; wait' TERM INT
wait
"""

FAKE_CHITALLY = """#!/bin/bash
exec "{py}" "{driver}" "$@"
"""


def slurm_env(tmp_path: Path, job_id: str, store: Path, src: Path, cfg: Path, **extra: str) -> dict[str, str]:
    """What SLURM and the user give the batch script, for two single-thread tasks here."""
    fake = tmp_path / "fakebin"
    if not fake.exists():
        fake.mkdir()
        (fake / "srun").write_text(FAKE_SRUN)
        (fake / "chitally").write_text(FAKE_CHITALLY.format(py=PY, driver=TESTS / "deploy_tasks.py"))
        for f in fake.iterdir():
            f.chmod(0o755)
    local = tmp_path / "node-tmp"
    local.mkdir(exist_ok=True)
    return env(
        PATH=os.pathsep.join([str(fake), str(BIN), os.environ.get("PATH", "")]),
        SLURM_JOB_ID=job_id, SLURM_NTASKS="2", SLURM_CPUS_PER_TASK="1",
        SLURM_SUBMIT_DIR=str(tmp_path), TMPDIR=str(local),
        INPUT=str(src), EPS=str(EPS), RUN=str(store), RUN_OPTIONS=f"--task-cost {COST}",
        SCHEDULER_HOST=HOST, DASHBOARD_ADDRESS=f"{HOST}:{free_port()}",
        WORKER_OPTIONS=f"--host {HOST}", WORKER_MEMORY="2GB",
        DEPLOYTEST_FAULTS=str(cfg), **extra)


def run_batch(processes: Processes, tmp_path: Path, name: str, environment: dict[str, str],
              timeout: float = 240) -> tuple[int, str]:
    proc = processes.start(["bash", str(DEPLOY / "slurm" / "chitally.sbatch")], env=environment,
                           name=name, cwd=tmp_path)
    code = proc.wait(timeout=timeout)
    return code, proc.stdout() + proc.stderr()


def test_slurm_allocation_as_the_batch_script_starts_it(tmp_path, processes, points, expected, faults):
    src = write_points(tmp_path / "points.npy", points)
    store = tmp_path / "shared" / "points.run"
    store.parent.mkdir()
    code, out = run_batch(processes, tmp_path, "sbatch",
                          slurm_env(tmp_path, "101", store, src, faults()))
    assert code == 0, out
    assert read_result(open_run(str(store))) == expected
    computed = [a for a in deploy_tasks.attempts(faults.log) if a[2] == "computed"]
    assert sorted(t for t, _, _ in computed) == list(range(open_run(str(store)).n_tasks))
    assert len({pid for _, pid, _ in computed}) == 2  # both srun tasks' workers took part
    assert not (tmp_path / "dask-scheduler-101.json").exists()  # cleaned up on exit
    # a later element of a job array finds the run complete and starts no cluster
    code, out = run_batch(processes, tmp_path, "again", slurm_env(tmp_path, "102", store, src, faults()))
    assert code == 0 and "is complete" in out, out


@pytest.mark.slow
def test_workers_reaching_their_lifetime_mid_run_then_the_next_allocation_resumes(
        tmp_path, processes, points, expected, faults):
    src = write_points(tmp_path / "points.npy", points)
    store = tmp_path / "points.run"
    hold_from = 4
    cfg = faults(hold_from)
    # first allocation: the workers leave after about 25 s, while later tasks wait
    code, out = run_batch(processes, tmp_path, "first", slurm_env(
        tmp_path, "201", store, src, cfg, WORKER_LIFETIME="25s", WORKER_STAGGER="2s", LOST_AFTER="3"))
    assert code == 3, out
    assert "the next allocation resumes it" in out
    first = open_run(str(store)).commits.committed()
    assert set(np.flatnonzero(first)) >= set(range(hold_from)), out
    assert not first.all()
    log_before = deploy_tasks.attempts(faults.log)
    faults.gate.touch()
    code, out = run_batch(processes, tmp_path, "second", slurm_env(tmp_path, "202", store, src, cfg))
    assert code == 0, out
    assert read_result(open_run(str(store))) == expected
    again = _computed_after(log_before, deploy_tasks.attempts(faults.log))
    assert not (again & set(np.flatnonzero(first)))


# ----------------------------------------------------------------------- Compose

def interpolate(text: str, variables: dict[str, str]) -> str:
    """Compose's ``${NAME:-default}`` and ``${NAME}`` substitution."""
    def one(m: re.Match) -> str:
        return variables.get(m.group(1)) or (m.group(3) or "")
    return re.sub(r"\$\{([A-Z_][A-Z0-9_]*)(:-([^}]*))?\}", one, text)


def test_compose_topology_emulated_with_processes(tmp_path, processes, points, expected):
    """No Docker engine can run here: the compose file's own commands run as processes,
    with only the names Docker would resolve replaced (the service name `scheduler`, its
    ports, the volumes /runs and /data, the worker's scratch folder) and every server
    held to 127.0.0.1."""
    spec = yaml.safe_load((DEPLOY / "compose" / "compose.yaml").read_text())
    services = spec["services"]
    assert services["scheduler"]["ports"] == ["127.0.0.1:8786:8786", "127.0.0.1:8787:8787"]
    assert "runs" in spec["volumes"]
    for name in ("worker", "client"):
        assert "runs:/runs" in services[name]["volumes"]
    limits = services["worker"]["deploy"]["resources"]["limits"]
    assert limits["memory"] == "4g"
    variables = {"INPUT": "points.npy", "EPS": repr(EPS), "WORKERS": "2"}
    port, dash = free_port(), free_port()
    (tmp_path / "data").mkdir()
    (tmp_path / "runs").mkdir()
    write_points(tmp_path / "data" / "points.npy", points)
    names = {"tcp://scheduler:8786": f"tcp://{HOST}:{port}", "/data/": f"{tmp_path}/data/",
             "/runs/": f"{tmp_path}/runs/", "/tmp/dask": str(tmp_path / "scratch")}

    def argv(service: str, host: bool = True) -> list[str]:
        words = [interpolate(str(w), variables) for w in services[service]["command"]]
        for old, new in names.items():
            words = [w.replace(old, new) for w in words]
        return words + (["--host", HOST] if host else [])

    sched = argv("scheduler")
    sched[sched.index("--port") + 1] = str(port)
    sched[sched.index("--dashboard-address") + 1] = f"{HOST}:{dash}"
    processes.start([str(BIN / w) if i == 0 else w for i, w in enumerate(sched)], env=env(), name="scheduler")
    replicas = int(interpolate(str(services["worker"]["deploy"]["replicas"]), variables))
    assert replicas == 2
    for k in range(replicas):
        words = argv("worker")
        processes.start([str(BIN / words[0]), *words[1:]], env=env(), name=f"worker{k}")
    client = argv("client", host=False)
    assert client[:2] == ["chitally", "run"] and "--wait-workers" in client
    res = command(*client[1:], timeout=240)  # waits for the workers itself
    assert res.returncode == 0, explain(res)
    assert read_result(open_run(str(tmp_path / "runs" / "points.run"))) == expected


# ---------------------------------------------------------- the files and their commands

_HELP: dict[tuple[str, ...], set[str]] = {}


def options_of(cmd: tuple[str, ...]) -> set[str]:
    """Every --option the real command accepts, read from its --help."""
    if cmd not in _HELP:
        if cmd[0] == "chitally":
            argv = [PY, "-m", "chitally.cli", *cmd[1:], "--help"]
        else:
            argv = [str(BIN / "dask"), *cmd[1:], "--help"]
        res = subprocess.run(argv, capture_output=True, text=True, timeout=120,
                             env={**os.environ, **env()})
        assert res.returncode == 0, res.stderr
        _HELP[cmd] = set(re.findall(r"(--[a-z0-9][a-z0-9-]*)", res.stdout))
    return _HELP[cmd]


COMMANDS = {("chitally", c) for c in ("run", "resume", "status", "export", "batch", "plan", "curve")} | {
    ("dask", "scheduler"), ("dask", "worker")}


def command_lines(text: str) -> list[list[str]]:
    """Shell command lines (continuations joined) starting with chitally or dask."""
    joined = re.sub(r"\\\n\s*", " ", text)
    found = []
    for line in joined.splitlines():
        line = line.split(" #", 1)[0].strip()
        try:
            words = shlex.split(line, posix=True)
        except ValueError:
            continue
        for i, w in enumerate(words):
            if w in ("chitally", "dask") and i + 1 < len(words) and (w, words[i + 1]) in COMMANDS:
                found.append(words[i:])
                break
    return found


def argv_lists(doc) -> list[list[str]]:
    """Container command+args lists (Kubernetes) and compose `command:` lists."""
    out = []
    if isinstance(doc, dict):
        cmd = doc.get("command")
        args = doc.get("args")
        if isinstance(cmd, list) or isinstance(args, list):
            out.append([str(x) for x in (cmd or []) + (args or [])])
        elif isinstance(cmd, str):
            out.append(shlex.split(cmd))
        for v in doc.values():
            out.extend(argv_lists(v))
    elif isinstance(doc, list):
        for v in doc:
            out.extend(argv_lists(v))
    return out


def check_options(words: list[str], where: str) -> tuple[str, str]:
    """Every --option of one command line exists in the real command."""
    for i, w in enumerate(words):
        if (w, words[i + 1] if i + 1 < len(words) else "") in COMMANDS:
            cmd = (w, words[i + 1])
            rest = words[i + 2:]
            break
    else:
        raise AssertionError(f"{where}: no chitally or dask command in {words}")
    known = options_of(cmd)
    for word in rest:
        if word in ("&&", "||", ";", "|"):
            break
        if word.startswith("--"):
            opt = word.split("=", 1)[0]
            assert opt in known, f"{where}: `{' '.join(cmd)}` has no option {opt}"
    return cmd


def deployment_files() -> dict[str, Path]:
    files = {str(p.relative_to(ROOT)): p for p in sorted(DEPLOY.rglob("*")) if p.is_file()}
    files["docs/cluster.md"] = ROOT / "docs" / "cluster.md"
    return files


def test_every_deployment_file_parses_and_its_commands_exist():
    files = deployment_files()
    kinds = {p.suffix for p in files.values()}
    assert {".yaml", ".sbatch", ".md"} <= kinds, files
    seen: dict[str, set[tuple[str, str]]] = {}
    for name, path in files.items():
        text = path.read_text()
        lines: list[list[str]] = []
        if path.suffix in (".yaml", ".yml"):
            docs = [d for d in yaml.safe_load_all(text) if d is not None]
            assert docs, name
            for d in docs:
                lines += [a for a in argv_lists(d) if any(w in ("chitally", "dask") for w in a)]
                for a in argv_lists(d):
                    for w in a:  # shell strings inside a container (sh -c "...")
                        lines += command_lines(w) if "\n" in w or " " in w else []
        elif path.suffix in (".sh", ".sbatch") or text.startswith("#!/bin/bash"):
            res = subprocess.run(["bash", "-n", str(path)], capture_output=True, text=True)
            assert res.returncode == 0, f"{name}: {res.stderr}"
            lines += command_lines(text)
        elif path.name == "Dockerfile" or path.suffix == ".md":
            lines += command_lines(text)
            if path.name == "Dockerfile":
                assert re.search(r"^FROM \S+:\S+@sha256:[0-9a-f]{64}", text, re.M) or \
                    re.search(r"^FROM python:\d+\.\d+\.\d+-", text, re.M), "pin the base image"
        seen[name] = {check_options(words, name) for words in lines}
    # each file starts every role it is meant to
    roles = {("dask", "scheduler"), ("dask", "worker"), ("chitally", "run")}
    assert roles | {("chitally", "resume")} <= seen["deploy/slurm/chitally.sbatch"]
    assert roles <= seen["deploy/compose/compose.yaml"]
    for name in ("daskjob-pvc.yaml", "daskjob-s3.yaml"):
        assert roles <= seen[f"deploy/kubernetes/{name}"]
    assert ("chitally", "run") in seen["deploy/kubernetes/client-job.yaml"]


def test_kubernetes_manifests_follow_the_operator_schema():
    """Fields as in the dask-kubernetes operator's CRDs (kubernetes.dask.org/v1; see
    deploy/kubernetes/README.md for the version followed)."""
    docs = []
    for path in sorted((DEPLOY / "kubernetes").glob("*.yaml")):
        docs += [d for d in yaml.safe_load_all(path.read_text()) if d]
    kinds = {d["kind"] for d in docs}
    assert {"DaskCluster", "DaskJob", "DaskAutoscaler", "PersistentVolumeClaim", "NetworkPolicy"} <= kinds
    for d in docs:
        if d["apiVersion"] != "kubernetes.dask.org/v1":
            continue
        spec = d["spec"]
        if d["kind"] == "DaskAutoscaler":
            assert set(spec) == {"cluster", "minimum", "maximum"}
            assert 0 <= spec["minimum"] <= spec["maximum"]
            continue
        cluster = spec["cluster"]["spec"] if d["kind"] == "DaskJob" else spec
        assert {"scheduler", "worker"} <= set(cluster)
        assert "service" in cluster["scheduler"] and "spec" in cluster["scheduler"]
        pods = [cluster["scheduler"]["spec"], cluster["worker"]["spec"]]
        if d["kind"] == "DaskJob":
            pods.append(spec["job"]["spec"])
        for pod in pods:
            for c in pod["containers"]:
                res = c["resources"]
                assert res["requests"]["memory"] and res["limits"]["memory"], c["name"]
                for e in c.get("env", []):  # credentials come from Secrets, never inline
                    if re.search(r"KEY|SECRET|TOKEN|PASSWORD", e["name"]):
                        assert "valueFrom" in e and "value" not in e, e
        svc = cluster["scheduler"]["service"]
        assert svc.get("type", "ClusterIP") == "ClusterIP"
        # the operator reaches the scheduler's HTTP API by the port named http-dashboard
        assert {p["name"] for p in svc["ports"]} == {"tcp-comm", "http-dashboard"}
        assert svc["selector"]["dask.org/cluster-name"] == d["metadata"]["name"]
