"""``winnow serve`` against a real Prefect server on loopback (issue 18 items 1, 2).

A real ``prefect server start`` (temporary PREFECT_HOME, in-memory database) and a real
``winnow serve`` process; a run of the served deployment is triggered through the API and
must end Completed. This is the path every scheduled run takes: the runner starts the served
flow in a child process, so anything the flow needs that is not importable by name there
(issue 18 item 1: a string annotation naming ``StudyConfig``) fails each scheduled run.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import httpx
import pytest

sys.path.insert(0, str(Path(__file__).parent / "study_models"))
from make_study import make_study  # noqa: E402

pytestmark = pytest.mark.slow

BIN = Path(sys.executable).parent
MEMORY_DB = "sqlite+aiosqlite:///file::memory:?cache=shared&uri=true&check_same_thread=false"


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _wait(what: str, check, timeout: float, proc=None, log: Path | None = None):
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        got = check()
        if got:
            return got
        if proc is not None and proc.poll() is not None:
            break
        time.sleep(0.5)
    tail = log.read_text()[-4000:] if log is not None and log.exists() else ""
    raise AssertionError(f"timed out waiting for {what}\n{tail}")


def _stop(proc: subprocess.Popen | None) -> None:
    if proc is None or proc.poll() is not None:
        return
    os.killpg(proc.pid, signal.SIGTERM)
    try:
        proc.wait(timeout=20)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(timeout=10)


@pytest.fixture(scope="module")
def real_server():
    """A ``prefect server start`` on a free loopback port; yields (api url, env)."""
    home = Path(tempfile.mkdtemp(prefix="winnow-serve-home-"))
    port = _free_port()
    api = f"http://127.0.0.1:{port}/api"
    env = {
        k: v
        for k, v in os.environ.items()
        if not k.startswith("PREFECT_") or k == "PREFECT_LOGGING_LEVEL"
    }
    env.update(
        PREFECT_HOME=str(home),
        PREFECT_API_DATABASE_CONNECTION_URL=MEMORY_DB,
        PREFECT_SERVER_ANALYTICS_ENABLED="false",
        DO_NOT_TRACK="1",
        PREFECT_UI_ENABLED="false",
    )
    log = home / "server.log"
    with log.open("w") as out:
        proc = subprocess.Popen(
            [str(BIN / "prefect"), "server", "start", "--host", "127.0.0.1", "--port", str(port)],
            env=env, stdout=out, stderr=subprocess.STDOUT, start_new_session=True,
        )  # fmt: skip
    try:

        def healthy():
            try:
                return httpx.get(f"{api}/health", timeout=2).status_code == 200
            except httpx.HTTPError:
                return False

        _wait("the Prefect server", healthy, 60, proc, log)
        yield api, dict(env, PREFECT_API_URL=api)
    finally:
        _stop(proc)


def _client(api: str):
    from prefect.client.orchestration import SyncPrefectClient

    return SyncPrefectClient(api)


@pytest.fixture
def served(real_server, tmp_path):
    """``winnow serve`` of a tiny study; yields (deployment, api, folder)."""
    api, env = real_server
    folder = tmp_path / "study"
    path = make_study(folder, budget=3, **{"sample.draws": 600, "collect.bootstrap": 0})
    text = path.read_text().replace("name: line-test", "name: line-serve")
    path.write_text(text)
    log = tmp_path / "serve.log"
    # a schedule far in the future: the test triggers the run itself
    with log.open("w") as out:
        proc = subprocess.Popen(
            [str(BIN / "winnow"), "serve", str(path), "--cron", "0 3 1 1 *"],
            env=env, stdout=out, stderr=subprocess.STDOUT, start_new_session=True,
            cwd=tmp_path,
        )  # fmt: skip
    try:
        with _client(api) as client:

            def deployment():
                try:
                    return client.read_deployment_by_name(
                        "winnow-scheduled-study/line-serve-schedule"
                    )
                except Exception:  # noqa: BLE001 - not registered yet
                    return None

            dep = _wait("the served deployment", deployment, 60, proc, log)
        yield dep, api, log
    finally:
        _stop(proc)


def test_served_study_run_completes(served):
    """A run of the served deployment ends Completed (item 1)."""
    dep, api, log = served
    with _client(api) as client:
        run = client.create_flow_run_from_deployment(dep.id)

        def final():
            fr = client.read_flow_run(run.id)
            return fr if fr.state is not None and fr.state.is_final() else None

        fr = _wait("the served run to finish", final, 80, log=log)
        assert fr.state.is_completed(), (fr.state, log.read_text()[-4000:])


def test_served_deployment_allows_one_run_at_a_time(served):
    """Overlapping scheduled runs queue instead of failing on the store lock (item 2)."""
    dep, api, _ = served
    with _client(api) as client:
        dep = client.read_deployment(dep.id)
    opts = dep.concurrency_options
    assert dep.global_concurrency_limit is not None
    assert dep.global_concurrency_limit.limit == 1
    assert opts is not None and opts.collision_strategy.value == "ENQUEUE"
