"""The results index on a PostgreSQL server: same rows as SQLite, several stations at once.

The server comes from ``LOOPWRIGHT_TEST_PG_URL`` (``.ci/run`` starts one on loopback
and exports it). Without it, these tests start a private server themselves
(``initdb`` + ``pg_ctl`` in a temporary folder on a free loopback port, as the
``postgres`` user when run as root). If that is impossible they skip with the
reason, except in CI (``CI=true``), where a missing server is a failure.
"""

from __future__ import annotations

import glob
import io
import itertools
import multiprocessing
import os
import shutil
import socket
import subprocess
import tempfile
import time
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
from rich.console import Console

from loopwright import cli
from loopwright.production.batch import run_batch
from loopwright.production.index import index_run_folders, open_index
from test_production_scaffold import LIMITS, AnalyticBoardRunner, batch_worker

pytestmark = pytest.mark.postgres
psycopg = pytest.importorskip("psycopg", reason="psycopg 3 is not installed (extra: index)")
sqlalchemy = pytest.importorskip("sqlalchemy")


def _unavailable(reason: str) -> None:
    if os.environ.get("CI") == "true":
        pytest.fail(f"PostgreSQL is required in CI: {reason}")
    pytest.skip(f"no PostgreSQL server: {reason}")


def _pg_bin_dir() -> Path | None:
    found = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"), key=lambda p: int(
        Path(p).parent.parent.name) if Path(p).parent.parent.name.isdigit() else 0)
    if found:
        return Path(found[-1]).parent
    initdb = shutil.which("initdb")
    return Path(initdb).resolve().parent if initdb else None


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


@pytest.fixture(scope="module")
def pg_server() -> Iterator[str]:
    """URL of a PostgreSQL server to create test databases on (superuser)."""
    url = os.environ.get("LOOPWRIGHT_TEST_PG_URL")
    if url:
        yield url
        return
    bin_dir = _pg_bin_dir()
    if bin_dir is None:
        _unavailable("LOOPWRIGHT_TEST_PG_URL is not set and no initdb was found")
    prefix: list[str] = []
    # Not under pytest's temporary root: that is private to its owner, and the
    # server may run as another user.
    home = Path(tempfile.mkdtemp(prefix="loopwright-pg-"))
    if os.geteuid() == 0:  # initdb refuses root: run the server as postgres
        if shutil.which("runuser") is None:
            _unavailable("running as root without runuser")
        prefix = ["runuser", "-u", "postgres", "--"]
        try:
            shutil.chown(home, user="postgres")
        except (LookupError, PermissionError) as exc:
            _unavailable(f"cannot hand {home} to the postgres user: {exc}")
    data, port = home / "data", _free_port()
    run = [
        [*prefix, str(bin_dir / "initdb"), "-D", str(data), "-U", "loopwright",
         "--auth=trust", "-E", "UTF8", "--no-instructions"],
        [*prefix, str(bin_dir / "pg_ctl"), "-D", str(data), "-l", str(home / "log"), "-w",
         "-t", "30", "-o", f"-h 127.0.0.1 -p {port} -k {home} -c fsync=off", "start"],
    ]
    for cmd in run:
        done = subprocess.run(cmd, capture_output=True, text=True, timeout=60, check=False)
        if done.returncode != 0:
            _unavailable(f"{Path(cmd[len(prefix)]).name} failed: {done.stderr.strip()[-300:]}")
    try:
        yield f"postgresql://loopwright@127.0.0.1:{port}/postgres"
    finally:
        subprocess.run(
            [*prefix, str(bin_dir / "pg_ctl"), "-D", str(data), "-m", "immediate", "stop"],
            capture_output=True, timeout=60, check=False,
        )
        shutil.rmtree(home, ignore_errors=True)


@pytest.fixture
def pg_url(pg_server: str) -> Iterator[str]:
    """A fresh database for one test, dropped afterwards."""
    admin = sqlalchemy.engine.make_url(pg_server)
    name = f"lw_test_{uuid.uuid4().hex[:12]}"
    conninfo = admin.set(drivername="postgresql").render_as_string(hide_password=False)
    try:
        with psycopg.connect(conninfo, autocommit=True, connect_timeout=5) as conn:
            conn.execute(f'CREATE DATABASE "{name}"')
    except psycopg.Error as exc:
        _unavailable(f"cannot create a test database on {admin!r}: {exc}")
    yield admin.set(database=name).render_as_string(hide_password=False)
    with psycopg.connect(conninfo, autocommit=True) as conn:
        conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


def _count(url: str, table: str) -> int:
    """Rows of a table, counted with psycopg directly (not through our code)."""
    with psycopg.connect(url) as conn:
        return conn.execute(f"SELECT count(*) FROM {table}").fetchone()[0]


def _batch(scaffold_files, out: Path, index_url: str | None, serials: list[str]):
    procedure, bench = scaffold_files
    runner = AnalyticBoardRunner(procedure, gains={"P-5": 55.0})
    return run_batch(
        procedure, bench, station="station-a", operator="tester", out_dir=out,
        index_url=index_url, input_stream=io.StringIO("\n".join(serials) + "\n\n"),
        console=Console(file=io.StringIO()), run_one=runner,
    )


def test_postgresql_holds_the_same_rows_as_sqlite(
    scaffold_files, tmp_path: Path, pg_url: str
) -> None:
    serials = ["P-1", "P-2", "P-3", "P-4", "P-5", "P-2"]
    _batch(scaffold_files, tmp_path / "a", pg_url, serials)
    _batch(scaffold_files, tmp_path / "b", None, serials)
    skip = {"run_id", "indexed_utc", "run_dir"}
    with open_index(pg_url, create=False) as pg, open_index(tmp_path / "b", create=False) as lite:
        pg_runs, lite_runs = pg.list_runs(), lite.list_runs()
        assert [{k: v for k, v in r.items() if k not in skip} for r in pg_runs] == [
            {k: v for k, v in r.items() if k not in skip} for r in lite_runs
        ]
        pg_figs = [{k: v for k, v in r.items() if k not in skip} for r in pg.figure_rows()]
        lite_figs = [{k: v for k, v in r.items() if k not in skip} for r in lite.figure_rows()]
        assert pg_figs == lite_figs
    assert _count(pg_url, "runs") == len(serials)
    assert _count(pg_url, "figures") == len(serials) * len(LIMITS)


def test_three_stations_write_at_once(scaffold_files, tmp_path: Path, pg_url: str) -> None:
    """Three batch processes share one PostgreSQL index: no row lost or duplicated."""
    procedure, bench = scaffold_files
    per_station = 8
    start_at = time.time() + 4.0  # after every spawned worker has imported
    jobs = [
        (str(procedure), str(bench), str(tmp_path / f"out{k}"), pg_url, f"st{k}", per_station,
         start_at)
        for k in range(3)
    ]
    with multiprocessing.get_context("spawn").Pool(3) as pool:
        assert pool.map(batch_worker, jobs) == [per_station] * 3
    assert _count(pg_url, "runs") == 3 * per_station
    assert _count(pg_url, "figures") == 3 * per_station * len(LIMITS)
    with psycopg.connect(pg_url) as conn:
        serials = [row[0] for row in conn.execute("SELECT serial FROM runs")]
        distinct_ids = conn.execute("SELECT count(DISTINCT run_id) FROM runs").fetchone()[0]
        order = [row[0] for row in conn.execute("SELECT station FROM runs ORDER BY indexed_utc")]
    assert sorted(serials) == sorted(
        f"st{k}-SN{i:04d}" for k in range(3) for i in range(per_station)
    )
    assert distinct_ids == 3 * per_station
    # the stations really wrote at once: their rows interleave (not three blocks)
    assert sum(a != b for a, b in itertools.pairwise(order)) > 2


def _add_all(job: tuple[str, list[str]]) -> int:
    url, folders = job
    with open_index(url) as index:
        return sum(added for _id, added in index_run_folders(index, folders, station="s"))


def test_racing_to_add_the_same_folders_adds_each_once(scaffold_files, tmp_path: Path,
                                                      pg_url: str) -> None:
    procedure, _bench = scaffold_files
    runner = AnalyticBoardRunner(procedure)
    folders = [str(runner(f"R-{i}", retest=False, out_dir=tmp_path / "made")[0])
               for i in range(10)]
    with multiprocessing.get_context("spawn").Pool(3) as pool:
        added = pool.map(_add_all, [(pg_url, folders)] * 3)
    assert sum(added) == 10  # each folder added by exactly one process
    assert _count(pg_url, "runs") == 10


def test_stats_and_queries_from_the_cli(
    scaffold_files, tmp_path: Path, pg_url: str, capsys
) -> None:
    _batch(scaffold_files, tmp_path / "a", pg_url, ["P-1", "P-2", "P-3", "P-5"])
    assert cli.main(["stats", pg_url, "--json", "--figure", "crossover_hz"]) == 0
    assert '"count": 4' in capsys.readouterr().out
    assert cli.main(["index", "failures", "--index", pg_url]) == 0
    assert "P-5" in capsys.readouterr().out


def test_wrong_password_names_the_server_not_the_password(pg_server: str, capsys) -> None:
    url = sqlalchemy.engine.make_url(pg_server).set(
        username="nobody_here", password="s3cret-word", database="nope"
    ).render_as_string(hide_password=False)
    assert cli.main(["index", "list", "--index", url]) == 1
    err = capsys.readouterr().err
    assert "s3cret-word" not in err and "nobody_here" in err and "127.0.0.1" in err
