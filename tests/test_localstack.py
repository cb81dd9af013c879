"""closure.localstack and `closure up`: our own Redis (config, persistence, clean stop), the
stack's processes, the state file, and that it never talks to a Redis it did not start."""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import threading
import time

import pytest
import redis
from service_support import pid_alive

from closure.client import Client, ServiceError
from closure.errors import UserError
from closure.localstack import STATE_FILE, LocalStack, RedisServer, read_state

CLI = [sys.executable, "-c", "import sys; from closure.cli import main; "
       "sys.exit(main(sys.argv[1:]))"]


def test_redis_config_is_ours(tmp_path):
    server = RedisServer(tmp_path)
    text = server.config_text()
    for line in ("daemonize no", "bind 127.0.0.1", "appendonly yes", "port 0",
                 f'unixsocket "{tmp_path.resolve() / "redis.sock"}"',
                 f'dir "{tmp_path.resolve() / "redis"}"'):
        assert line in text.splitlines(), line
    assert server.url == f"unix://{tmp_path.resolve() / 'redis.sock'}"


def test_long_state_dir_falls_back_to_a_free_tcp_port(tmp_path):
    deep = tmp_path / ("x" * 120)
    server = RedisServer(deep)
    assert server.port is not None and server.port != 6379
    assert f"port {server.port}" in server.config_text()
    assert "unixsocket" not in server.config_text()


def test_redis_persists_across_a_clean_restart(tmp_path):
    server = RedisServer(tmp_path)
    url = server.start()
    try:
        c = redis.Redis.from_url(url)
        c.set("closure:test", "kept")
        c.close()
        assert server.stop() == 0  # SIGTERM: flush the append-only file, exit 0
        assert (tmp_path / "redis").is_dir()
        server.start()
        c = redis.Redis.from_url(url)
        assert c.get("closure:test") == b"kept"
        c.close()
    finally:
        server.stop()
    assert server.proc.poll() is not None


def test_redis_that_cannot_start_says_why(tmp_path):
    blocker = socket.socket()
    blocker.bind(("127.0.0.1", 0))
    blocker.listen(1)
    try:
        server = RedisServer(tmp_path, port=blocker.getsockname()[1])
        with pytest.raises(UserError, match="redis-server exited"):
            server.start(timeout=10)
    finally:
        blocker.close()


def test_state_file_of_a_dead_stack_is_ignored(tmp_path):
    (tmp_path / STATE_FILE).write_text(json.dumps({"server": "http://x", "pids": {
        "api": 2**22 + 12345}}))
    assert read_state(tmp_path) is None
    (tmp_path / STATE_FILE).write_text("{broken")
    assert read_state(tmp_path) is None


def test_a_second_stack_names_the_process_to_signal(tmp_path):
    # a running stack as its state file describes it: the supervisor (`closure up`) and its
    # API child; the message must name the supervisor, which stops everything on SIGTERM
    supervisor = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    api = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        (tmp_path / STATE_FILE).write_text(json.dumps({"server": "http://127.0.0.1:1", "pids": {
            "supervisor": supervisor.pid, "api": api.pid, "redis": None, "workers": []}}))
        with pytest.raises(UserError) as err:
            LocalStack(tmp_path, port=0).start()
        msg = str(err.value)
        assert f"`kill {supervisor.pid}`" in msg and str(api.pid) not in msg
        assert "another --state-dir" in msg
        # a stack still starting (no state file yet) holds the lock, which names its pid
        (tmp_path / STATE_FILE).unlink()
        import fcntl

        with open(tmp_path / "stack.lock", "w") as lock:
            fcntl.flock(lock, fcntl.LOCK_EX | fcntl.LOCK_NB)
            lock.write(f"{supervisor.pid}\n")
            lock.flush()
            with pytest.raises(UserError, match=f"already running \\(or starting\\).*"
                                                f"`kill {supervisor.pid}`"):
                LocalStack(tmp_path, port=0).start()
    finally:
        for p in (supervisor, api):
            p.kill()
            p.wait()


class FakeRedis:
    """A TCP listener that counts connections (standing in for someone else's Redis)."""

    def __init__(self):
        self.sock = socket.socket()
        self.sock.bind(("127.0.0.1", 0))
        self.sock.listen(16)
        self.sock.settimeout(0.2)
        self.port = self.sock.getsockname()[1]
        self.accepted = 0
        self._stop = False
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def _run(self):
        while not self._stop:
            try:
                conn, _ = self.sock.accept()
            except OSError:
                continue
            self.accepted += 1
            conn.close()

    def close(self):
        self._stop = True
        self.thread.join(2)
        self.sock.close()


@pytest.mark.slow
def test_stack_uses_only_the_redis_it_started(tmp_path, monkeypatch):
    """With another 'Redis' advertised in the environment, the stack still starts and uses
    its own (unix socket in its folder); the other one sees no connection at all. The
    system Redis on 6379, when there is one, keeps its keys."""
    fake = FakeRedis()
    url = f"redis://127.0.0.1:{fake.port}/0"
    for var in ("CLOSURE_REDIS_URL", "REDIS_URL", "RQ_REDIS_URL"):
        monkeypatch.setenv(var, url)
    system = redis.Redis(host="127.0.0.1", port=6379, socket_connect_timeout=0.5)
    try:
        system_keys = system.dbsize()
    except redis.ConnectionError:
        system_keys = None
    try:
        with LocalStack(tmp_path / "stack", port=0, workers=1) as stack:
            assert stack.redis_url.startswith("unix://")
            assert stack.redis_url.endswith(str(tmp_path / "stack" / "redis.sock"))
            with Client(stack.server_url) as c:
                assert c.health()["workers"] == 1
            state = read_state(stack.state_dir)
            assert state["redis_url"] == stack.redis_url
            assert state["server"] == stack.server_url
        assert fake.accepted == 0
        if system_keys is not None:
            assert system.dbsize() == system_keys
    finally:
        fake.close()
        system.close()


@pytest.mark.slow
def test_stack_with_a_token_requires_it(tmp_path):
    with LocalStack(tmp_path / "stack", port=0, workers=0, token="tok-123") as stack:
        with Client(stack.server_url, token="") as anonymous:
            with pytest.raises(ServiceError) as err:
                anonymous.jobs()
            assert err.value.status == 401 and "needs a token" in str(err.value)
        with Client(stack.server_url, token="nope") as wrong:
            with pytest.raises(ServiceError, match="wrong token"):
                wrong.jobs()
        with Client(stack.server_url, token="tok-123") as right:
            assert right.jobs() == []


def test_up_refuses_a_public_address_without_a_token(tmp_path):
    env = {k: v for k, v in os.environ.items() if k != "CLOSURE_TOKEN"}
    r = subprocess.run([*CLI, "up", "--host", "0.0.0.0", "--state-dir", str(tmp_path)],
                       capture_output=True, text=True, env=env, timeout=60)
    assert r.returncode == 2 and "without a token" in r.stderr
    assert not (tmp_path / STATE_FILE).exists()
    r = subprocess.run([*CLI, "api", "--host", "0.0.0.0", "--redis", "unix:///nonexistent"],
                       capture_output=True, text=True, env=env, timeout=60)
    assert r.returncode == 2 and "without a token" in r.stderr


@pytest.mark.slow
def test_closure_up_runs_and_stops_cleanly_on_sigterm(tmp_path):
    state_dir = tmp_path / "home"
    env = {**os.environ, "CLOSURE_HOME": str(state_dir)}
    env.pop("CLOSURE_SERVER", None)
    proc = subprocess.Popen([*CLI, "up", "--port", "0", "--workers", "2"], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 90
        state = None
        while time.monotonic() < deadline and state is None:
            assert proc.poll() is None, proc.stderr.read()
            state = read_state(state_dir)
            time.sleep(0.2)
        assert state is not None, "no state file"
        pids = [state["pids"]["api"], state["pids"]["redis"], *state["pids"]["workers"]]
        # client commands find the stack through its state file
        r = subprocess.run([*CLI, "models"], env=env, capture_output=True, text=True,
                           timeout=60)
        assert r.returncode == 0 and "no models" in r.stdout, r.stderr
        # a second stack on the same folder is refused
        r = subprocess.run([*CLI, "up", "--port", "0"], env=env, capture_output=True,
                           text=True, timeout=60)
        assert r.returncode == 2 and "already running" in r.stderr
        # a worker that dies is replaced
        os.kill(state["pids"]["workers"][0], signal.SIGKILL)
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            new = read_state(state_dir)
            if new and new["pids"]["workers"][0] != state["pids"]["workers"][0]:
                break
            time.sleep(0.2)
        else:
            proc.send_signal(signal.SIGTERM)
            raise AssertionError(f"the dead worker was not replaced: {proc.communicate(30)}")
        pids += new["pids"]["workers"]
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(60) == 0
        for pid in pids:
            assert not pid_alive(pid), pid
        assert not (state_dir / STATE_FILE).exists()
        assert "redis" in os.listdir(state_dir) and os.listdir(state_dir / "redis")
    finally:
        if proc.poll() is None:
            proc.kill()


@pytest.mark.slow
def test_demo_runs_the_whole_job_and_stops_the_stack(tmp_path):
    r = subprocess.run([*CLI, "demo", "--n", "32", "--state-dir", str(tmp_path / "demo")],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    out = r.stdout
    assert "Closure model for stress" in out and "Active terms" in out
    model_id = out.split("model m-")[1].split()[0]
    folder = tmp_path / "demo" / "stack" / "store" / "models" / f"m-{model_id}"
    assert f"stored in {folder}" in out and (folder / "model.json").exists()
    assert "validate the model a posteriori" in out
    assert read_state(tmp_path / "demo" / "stack") is None  # stopped
    assert not (tmp_path / "demo" / "stack" / STATE_FILE).exists()


@pytest.mark.slow
def test_closure_up_heals_a_killed_redis_and_api_and_the_job_finishes(tmp_path):
    """kill -9 of the stack's Redis while a job runs, then of its API: `closure up` restarts
    each (Redis from its append-only file, the API on the same port) and the job ends
    succeeded."""
    from closure.synth import turb2d, write

    data = tmp_path / "data"
    data.mkdir()
    path = write(turb2d(n=32, snapshots=8, spinup=1.0, interval=0.2), data / "t.nc")
    state_dir = tmp_path / "home"
    env = {**os.environ, "CLOSURE_HOME": str(state_dir), "CLOSURE_SNAPSHOTS_PER_TASK": "1"}
    env.pop("CLOSURE_SERVER", None)
    proc = subprocess.Popen([*CLI, "up", "--port", "0", "--workers", "1", "--data-root",
                             str(data)], env=env, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)

    def state_after(check, seconds=60):
        deadline = time.monotonic() + seconds
        while time.monotonic() < deadline:
            assert proc.poll() is None, proc.communicate()
            state = read_state(state_dir)
            if state is not None and check(state):
                return state
            time.sleep(0.2)
        raise AssertionError("the stack did not get there in time")

    try:
        state = state_after(lambda s: True, 90)
        with Client(state["server"]) as c:
            job = c.submit({"input": {"path": str(path)}, "filter": {"ratio": 4},
                            "fit": {"resamples": 4}})
            deadline = time.monotonic() + 60
            while c.status(job["id"])["state"] == "queued" and time.monotonic() < deadline:
                time.sleep(0.2)
            os.kill(state["pids"]["redis"], signal.SIGKILL)
            state = state_after(lambda s: s["pids"]["redis"] != state["pids"]["redis"])
            done = c.wait(job["id"], timeout=180)
            assert done["state"] == "succeeded" and done["model_id"]
            os.kill(state["pids"]["api"], signal.SIGKILL)
            new = state_after(lambda s: s["pids"]["api"] != state["pids"]["api"])
            assert new["server"] == state["server"]
            deadline = time.monotonic() + 30
            while True:
                try:
                    assert c.health()["status"] == "ok"
                    break
                except ServiceError:
                    assert time.monotonic() < deadline
                    time.sleep(0.3)
            assert c.status(job["id"])["state"] == "succeeded"
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(60) == 0
        assert "restarted it from its append-only file" in proc.stderr.read()
    finally:
        if proc.poll() is None:
            proc.kill()
