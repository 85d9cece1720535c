"""The real servers of tests/servers.py work: PostgreSQL, a Dask cluster, an HTTP receiver.

These double as a check that CI installed everything (under WEIR_NO_SKIPS=1 a missing
binary or library fails here first, with the package to install in the reason).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
import urllib.error
import urllib.request
from datetime import UTC, datetime
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest
import servers
from servers import LOOPBACK, ROOT, START_BOUND, TESTS, DaskCluster, PostgresServer, Receiver

CHILD_BOUND = 120  # seconds: turns a hung child process into a failure, not a speed check


def listening_addresses(pid: int) -> set[str]:
    """The IP addresses a process has listening TCP sockets on (read by psutil from /proc)."""
    psutil = pytest.importorskip("psutil")
    return {c.laddr.ip for c in psutil.Process(pid).net_connections(kind="inet") if c.status == "LISTEN"}


def postmaster_pid(server: PostgresServer) -> int:
    return int((server.data_dir / "postmaster.pid").read_text().split()[0])


def pg_text(zone: str, instant: datetime) -> str:
    """How PostgreSQL prints a timestamptz in `zone` (DateStyle ISO: 'YYYY-MM-DD HH:MM:SS+HH'),
    with the local time and offset taken from the IANA database through zoneinfo."""
    local = instant.astimezone(ZoneInfo(zone))
    hours = int(local.utcoffset().total_seconds()) // 3600
    return f"{local:%Y-%m-%d %H:%M:%S}{hours:+03d}"


def database_name(url: str) -> str:
    return url.rsplit("/", 1)[-1]


# ---------------------------------------------------------------- PostgreSQL


def test_postgres_server_is_a_real_postgresql_listening_on_loopback_only(postgres_server, pg_url):
    import sqlalchemy as sa

    with postgres_server.connect() as conn:
        (version,) = conn.execute("SELECT version()").fetchone()
    assert version.startswith("PostgreSQL ")
    assert listening_addresses(postmaster_pid(postgres_server)) == {LOOPBACK}
    assert pg_url.startswith(f"postgresql+psycopg://postgres@{LOOPBACK}:{postgres_server.port}/")
    engine = sa.create_engine(pg_url)
    try:
        with engine.connect() as conn:
            assert conn.execute(sa.text("SELECT current_database()")).scalar() == database_name(pg_url)
    finally:
        engine.dispose()


def test_each_new_database_starts_empty_and_apart_from_the_others(postgres_server, make_pg_database):
    first, second = make_pg_database(), make_pg_database()
    assert first != second
    with postgres_server.connect(database_name(first)) as conn:
        conn.execute("CREATE TABLE rides (id int)")
        conn.execute("INSERT INTO rides VALUES (1)")
    with postgres_server.connect(database_name(second)) as conn:
        tables = conn.execute("SELECT table_name FROM information_schema.tables "
                              "WHERE table_schema = 'public'").fetchall()
    assert tables == []
    postgres_server.drop_database(first)
    with postgres_server.connect() as conn:
        names = {name for (name,) in conn.execute("SELECT datname FROM pg_database").fetchall()}
    assert database_name(first) not in names and database_name(second) in names


def test_a_database_set_to_europe_berlin_starts_its_sessions_in_that_zone(postgres_server, make_pg_database):
    plain, berlin = make_pg_database(), make_pg_database(timezone="Europe/Berlin")
    # 2026-03-29: Berlin moves from UTC+1 to UTC+2 at 01:00 UTC (EU summer time rule, in the IANA database)
    before, after = datetime(2026, 3, 29, 0, 30, tzinfo=UTC), datetime(2026, 3, 29, 1, 30, tzinfo=UTC)
    with postgres_server.connect(database_name(plain)) as conn:
        assert conn.execute("SHOW timezone").fetchone() == ("UTC",)
    with postgres_server.connect(database_name(berlin)) as conn:
        assert conn.execute("SHOW timezone").fetchone() == ("Europe/Berlin",)
        shown = conn.execute("SELECT %s::timestamptz::text, %s::timestamptz::text", (before, after)).fetchone()
    assert shown == (pg_text("Europe/Berlin", before), pg_text("Europe/Berlin", after))
    assert shown == ("2026-03-29 01:30:00+01", "2026-03-29 03:30:00+02")  # the same, written by hand


def test_pgtz_in_a_child_process_overrides_the_database_zone(postgres_server, make_pg_database):
    berlin = make_pg_database(timezone="Europe/Berlin")
    probe = textwrap.dedent(f"""
        import psycopg
        with psycopg.connect({postgres_server.dsn(database_name(berlin))!r}) as conn:
            print(conn.execute("SHOW timezone").fetchone()[0])
    """)
    tokyo = postgres_server.client_env(pgtz="Asia/Tokyo")
    plain = {k: v for k, v in postgres_server.client_env().items() if k != "PGTZ"}
    shown = [subprocess.run([sys.executable, "-c", probe], env=env, capture_output=True, text=True,
                            check=True, timeout=CHILD_BOUND).stdout.strip() for env in (tokyo, plain)]
    assert shown == ["Asia/Tokyo", "Europe/Berlin"]


def test_postgres_server_skips_naming_the_debian_package_when_binaries_are_missing(monkeypatch):
    monkeypatch.setattr(servers, "find_pg_bin", lambda: None)
    with pytest.raises(pytest.skip.Exception, match="Debian's package postgresql"):
        servers.start_postgres()


# ---------------------------------------------------------------- Dask


def test_dask_cluster_has_two_worker_processes_that_import_this_checkout(dask_cluster: DaskCluster):
    pids = dask_cluster.worker_pids()
    assert len(pids) == 2
    with dask_cluster.client() as client:
        workers = sorted(client.scheduler_info()["workers"])
        answered = [client.submit(os.getpid, workers=[w], pure=False).result(timeout=START_BOUND)
                    for w in workers]
        imported = client.run(servers.where_is, "runner")
    assert sorted(answered) == sorted(pids)  # the pids of the processes this fixture started
    assert set(imported.values()) == {str(ROOT / "runner" / "__init__.py")}


def test_killing_a_dask_worker_leaves_the_other_answering_and_the_next_test_gets_two(dask_cluster):
    survivor = dask_cluster.worker_pids()[1]
    killed = dask_cluster.kill_worker(0)
    with dask_cluster.client() as client:
        answered = {client.submit(os.getpid, pure=False).result(timeout=START_BOUND) for _ in range(4)}
    assert answered == {survivor}
    dask_cluster.ensure_workers()  # what the fixture does before each test
    pids = dask_cluster.worker_pids()
    assert len(pids) == 2 and survivor in pids and killed not in pids


def test_dask_scheduler_and_workers_listen_on_loopback_only(dask_cluster):
    for pid in [dask_cluster.scheduler.pid, *dask_cluster.worker_pids()]:
        assert listening_addresses(pid) == {LOOPBACK}


# ---------------------------------------------------------------- the HTTP receiver


def send(url: str, body: bytes, timeout: float = CHILD_BOUND):
    """POST with urllib, ignoring any *_proxy variables (loopback only)."""
    opener = urllib.request.build_opener(urllib.request.ProxyHandler({}))
    request = urllib.request.Request(url, data=body, headers={"Content-Type": "application/json",
                                                              "X-Bike-Dock": "riverside-12"})
    with opener.open(request, timeout=timeout) as answer:
        return answer.status


def test_http_receiver_records_each_post(http_receiver: Receiver):
    assert send(http_receiver.url, b'{"rides": 3}') == 200
    assert send(http_receiver.url + "?again=1", b"") == 200
    first, second = http_receiver.requests
    assert (first.method, first.path, first.body) == ("POST", "/hooks/weir", b'{"rides": 3}')
    assert first.headers["X-Bike-Dock"] == "riverside-12"
    assert (second.path, second.body) == ("/hooks/weir?again=1", b"")


def test_http_receiver_answers_500_when_told_to(http_receiver):
    http_receiver.default = 500
    for _ in range(2):
        with pytest.raises(urllib.error.HTTPError) as failed:
            send(http_receiver.url, b"{}")
        assert failed.value.code == 500
    assert len(http_receiver.requests) == 2


def test_http_receiver_hangs_when_told_to(http_receiver):
    http_receiver.script = ["hang"]
    with pytest.raises(TimeoutError):
        send(http_receiver.url, b"{}", timeout=1)
    assert [r.method for r in http_receiver.requests] == ["POST"]
    assert send(http_receiver.url, b"{}") == 200  # the script is used up: back to the default


# ---------------------------------------------------------------- clean-up


def test_servers_are_stopped_and_removed_when_the_session_fails(tmp_path: Path):
    """A session whose test fails still stops PostgreSQL and the Dask processes and removes their folders."""
    inner = tmp_path / "inner"
    inner.mkdir()
    (inner / "conftest.py").write_text("from servers import _dask_session, dask_cluster, postgres_server\n")
    seen = tmp_path / "seen.json"
    (inner / "test_fails.py").write_text(textwrap.dedent(f"""
        import json

        def test_fails(postgres_server, dask_cluster):
            pid = int((postgres_server.data_dir / "postmaster.pid").read_text().split()[0])
            json.dump({{"folders": [str(postgres_server.base), str(dask_cluster.base)],
                       "pids": [pid, dask_cluster.scheduler.pid, *dask_cluster.worker_pids()]}},
                      open({str(seen)!r}, "w"))
            assert False, "this test fails on purpose"
    """))
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(TESTS), os.environ.get("PYTHONPATH", "")])}
    done = subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", str(inner)],
                          cwd=tmp_path, env=env, capture_output=True, text=True, timeout=CHILD_BOUND * 2)
    assert done.returncode == 1, done.stdout + done.stderr  # pytest's exit code for failed tests
    assert "1 failed" in done.stdout
    record = json.loads(seen.read_text())
    assert len(record["pids"]) == 4
    for folder in record["folders"]:
        assert not Path(folder).exists()
    for pid in record["pids"]:
        assert not Path(f"/proc/{pid}").exists() or _is_zombie(pid)


def _is_zombie(pid: int) -> bool:
    with open(f"/proc/{pid}/stat") as stat:
        return stat.read().rsplit(")", 1)[1].split()[0] == "Z"
