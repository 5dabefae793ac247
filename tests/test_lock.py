"""One writer per run folder: the lock file, refusals of a second command, stale locks of killed runs.

The concurrent-run test is real: two ``wetlandflow run`` processes on the same project.  The first is
paused with SIGSTOP while it builds the feature cube (so that the second surely meets it, whatever the
load of the machine), the second is refused, the first is resumed and finishes; its outputs are then
complete, and a third run reuses every step, which it does only when every output still has the
fingerprint recorded when it was written.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest
import tomli_w
from conftest import read_toml

from wetlandflow.errors import OutputError, RunFolderLocked
from wetlandflow.pipeline.lock import LOCK_NAME, LockHolder, read_lock, run_folder_lock

pytestmark = pytest.mark.skipif(not hasattr(signal, "SIGSTOP"), reason="needs POSIX signals")

COMMITTED = Path(__file__).resolve().parent.parent / "demo_data" / "orlenmere_small"


def light_copy(folder: Path, name: str = "light") -> Path:
    """The committed small demo copied into ``folder``, with a light project ``<name>.toml`` (optical and
    terrain features, 30 trees, 3 plot folds, 64 px chunks, no explanations)."""
    if not (folder / "project.toml").exists():
        shutil.copytree(COMMITTED, folder, dirs_exist_ok=True)
    doc = read_toml(folder / "project.toml")
    doc["project"]["output_dir"] = f"runs/{name}"
    doc["features"] = {"select": ["optical", "terrain"]}
    doc["model"].update(n_estimators=30)
    doc["validation"].update(design="group", n_folds=3)
    doc["output"] = {"chunk_size": 64, "explain": False}
    out = folder / f"{name}.toml"
    out.write_text(tomli_w.dumps(doc))
    return out


def cli(*args: str, cwd: Path) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "wetlandflow.ui.cli", *args], cwd=cwd,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def wait_for(ready, proc: subprocess.Popen, *, timeout: float = 300.0) -> None:
    t0 = time.monotonic()
    while not ready():
        if proc.poll() is not None:
            pytest.fail(f"the run ended (code {proc.returncode}) too early: {proc.stderr.read()[-2000:]}")
        if time.monotonic() - t0 > timeout:
            proc.kill()
            pytest.fail("the run did not reach the stage in time")
        time.sleep(0.01)


def running_step(run_dir: Path) -> str | None:
    try:
        steps = json.loads((run_dir / "manifest.json").read_text())["steps"]
    except (OSError, ValueError, KeyError):
        return None
    return next((k for k, v in steps.items() if v.get("status") == "running"), None)


def test_second_run_on_a_locked_folder_is_refused_and_the_first_finishes_intact(tmp_path):
    from test_faults import assert_final_files_complete, leftovers

    from wetlandflow.pipeline.run import run_project

    project = light_copy(tmp_path)
    run_dir = tmp_path / "runs" / "light"
    first = cli("run", "--quiet", project.name, cwd=tmp_path)
    try:
        wait_for(lambda: running_step(run_dir) == "features", first)
        holder = read_lock(run_dir)
        assert holder is not None and holder.pid == first.pid and holder.host == socket.gethostname()
        os.kill(first.pid, signal.SIGSTOP)  # paused mid-write: the second command surely meets it
        second = cli("run", "--quiet", project.name, cwd=tmp_path)
        out, err = second.communicate(timeout=300)
        others = {verb: cli(*args, cwd=tmp_path).communicate(timeout=300)[1] for verb, args in (
            ("report", ("report", "runs/light")),
            ("compare", ("compare", "runs/light", "--quick")),
            ("sample", ("sample", project.name)),
            ("assess", ("assess", project.name, "validation_sample/sample.gpkg")))}
    finally:
        os.kill(first.pid, signal.SIGCONT)
    assert second.returncode == 2, err
    message = err.strip()
    assert message.count("\n") == 0 and "Traceback" not in message  # one clear message
    for part in ("runs/light", f"PID {first.pid}", socket.gethostname(), holder.started, "output_dir",
                 LOCK_NAME):
        assert part in message, part
    for verb, verb_err in others.items():
        assert f"cannot start `wetlandflow {verb}" in verb_err and f"PID {first.pid}" in verb_err, verb_err

    assert first.wait(timeout=600) == 0, first.stderr.read()[-2000:]
    assert not (run_dir / LOCK_NAME).exists()
    assert not leftovers(run_dir)
    assert_final_files_complete(run_dir)
    assert not (run_dir / "validation_sample").exists() and not (run_dir / "report").exists()
    again = run_project(project, progress=False)  # every output still has the fingerprint it was written with
    assert all(again.manifest["steps"][s].get("reused") for s in
               ("features", "samples", "validation", "model", "mapping", "inventory"))


def test_a_stale_lock_of_a_process_that_is_gone_is_removed_with_a_note(tmp_path):
    gone = subprocess.Popen([sys.executable, "-c", "pass"])
    gone.wait()
    stale = LockHolder(host=socket.gethostname(), pid=gone.pid, command="run killed.toml",
                       started="2026-01-01T00:00:00+00:00")
    (tmp_path / LOCK_NAME).write_text(json.dumps(stale.__dict__))
    with run_folder_lock(tmp_path, "run") as record:
        assert f"PID {gone.pid}" in record["stale_lock_removed"]
        assert read_lock(tmp_path).pid == os.getpid()
    assert not (tmp_path / LOCK_NAME).exists()


def test_a_reused_pid_does_not_keep_a_stale_lock_alive(tmp_path):
    """The lock records the kernel's start time of its process: a live process with the same PID but
    another start time is not the holder."""
    me = LockHolder.this_process("run")
    if not me.process_start:
        pytest.skip("no /proc: process start times unknown")
    other = LockHolder(host=me.host, pid=me.pid, command="run", started=me.started,
                       process_start=str(int(me.process_start) - 1))
    (tmp_path / LOCK_NAME).write_text(json.dumps(other.__dict__))
    with run_folder_lock(tmp_path, "run") as record:
        assert "stale_lock_removed" in record


def test_a_lock_held_on_another_host_is_never_broken(tmp_path):
    remote = LockHolder(host="not-" + socket.gethostname(), pid=1, command="run a.toml",
                        started="2026-01-01T00:00:00+00:00")
    (tmp_path / LOCK_NAME).write_text(json.dumps(remote.__dict__))
    with pytest.raises(RunFolderLocked, match="another host") as info:
        with run_folder_lock(tmp_path, "assess"):
            pass
    assert isinstance(info.value, OutputError) and info.value.holder == remote
    assert read_lock(tmp_path) == remote


def test_the_lock_is_reentrant_for_its_thread_and_refused_to_another(tmp_path):
    seen: list[BaseException] = []

    def other_thread():
        try:
            with run_folder_lock(tmp_path, "assess"):
                pass
        except RunFolderLocked as exc:
            seen.append(exc)

    with run_folder_lock(tmp_path, "run"):
        with run_folder_lock(tmp_path, "sample"):  # the same thread: demo runs, then samples
            assert read_lock(tmp_path).command == "run"
        t = threading.Thread(target=other_thread)
        t.start()
        t.join()
        assert (tmp_path / LOCK_NAME).exists()
    assert len(seen) == 1 and f"PID {os.getpid()}" in str(seen[0])
    assert not (tmp_path / LOCK_NAME).exists()


def test_a_lock_is_released_when_the_command_fails(tmp_path):
    with pytest.raises(ZeroDivisionError), run_folder_lock(tmp_path, "run"):
        raise ZeroDivisionError("a step failed")
    with run_folder_lock(tmp_path, "run") as record:
        assert "stale_lock_removed" not in record
