"""The one launcher: which mpiexec, with which arguments and environment, and how a run past its limit ends.

A stand-in launcher (a small Python script that writes down its arguments and environment) shows the exact
command line without starting MPI; one test also runs the real mpiexec behind an ``env`` wrapper.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest
from helpers import mpiexec
from shardmill.parallel.launch import (
    BLAS_THREAD_VARIABLES,
    LAUNCHED,
    THREAD_WAITS,
    find_mpiexec,
    rank_environment,
    relaunch,
    run_command,
    run_for_status,
    run_ranks,
)

RECORDER = """\
import json, os, sys
with open(os.environ["RECORD_TO"], "w") as out:
    json.dump({"argv": sys.argv[1:], "env": dict(os.environ)}, out)
"""


def stand_in(tmp_path: Path) -> tuple[Path, Path]:
    """An executable stand-in for mpiexec that records its arguments and environment to record.json."""
    script = tmp_path / "fake mpiexec"  # a space in the path: it must survive the shell-style split
    script.write_text(f"#!{sys.executable}\n{RECORDER}")
    script.chmod(0o755)
    return script, tmp_path / "record.json"


def test_launcher_arguments_in_the_variable_come_first(tmp_path, monkeypatch) -> None:
    script, record = stand_in(tmp_path)
    # POSIX shell quoting, as shlex.split documents it (Python docs, shlex): quotes keep words together.
    monkeypatch.setenv("SHARDMILL_MPIEXEC", f"'{script}' -bind-to core --label \"two words\"")
    monkeypatch.setenv("RECORD_TO", str(record))
    assert find_mpiexec() == [str(script), "-bind-to", "core", "--label", "two words"]
    done = run_ranks(3, ["-c", "pass"], threads=2, launcher_args=["-ppn", "1"], timeout=60)
    assert done.returncode == 0
    seen = json.loads(record.read_text())
    assert seen["argv"] == ["-bind-to", "core", "--label", "two words", "-n", "3", "-ppn", "1",
                            sys.executable, "-c", "pass"]
    for name in BLAS_THREAD_VARIABLES:
        assert seen["env"][name] == "2"
    assert seen["env"]["PYTHONUNBUFFERED"] == "1" and seen["env"][LAUNCHED] == "1"


def test_ranks_option_leaves_blas_threads_to_the_job(tmp_path, monkeypatch) -> None:
    script, record = stand_in(tmp_path)
    monkeypatch.setenv("SHARDMILL_MPIEXEC", f"'{script}'")
    monkeypatch.setenv("RECORD_TO", str(record))
    monkeypatch.setenv("OPENBLAS_NUM_THREADS", "3")
    assert relaunch(2, ["train", "job.toml"]) == 0
    seen = json.loads(record.read_text())
    assert seen["argv"] == ["-n", "2", sys.executable, "-P", "-m", "shardmill", "train", "job.toml"]
    assert seen["env"]["OPENBLAS_NUM_THREADS"] == "3" and seen["env"][LAUNCHED] == "1"


def test_without_the_variable_the_bundled_mpiexec_is_used(monkeypatch) -> None:
    monkeypatch.delenv("SHARDMILL_MPIEXEC", raising=False)
    beside = Path(sys.executable).parent / "mpiexec"
    if not beside.exists():
        pytest.skip("no mpiexec beside this interpreter (the MPICH wheel puts one there)")
    assert find_mpiexec() == [str(beside)]


def test_environment_without_marker_or_thread_count() -> None:
    env = rank_environment(threads=None, launched=False, base={"OPENBLAS_NUM_THREADS": "8", "GOMP_SPINCOUNT": "5"})
    # the idle threads' spin limits are added where unset; a value already set wins
    assert env == {"OPENBLAS_NUM_THREADS": "8", "PYTHONUNBUFFERED": "1", "GOMP_SPINCOUNT": "5",
                   "OPENBLAS_THREAD_TIMEOUT": THREAD_WAITS["OPENBLAS_THREAD_TIMEOUT"]}


@pytest.mark.mpi
def test_real_mpiexec_behind_an_env_wrapper(monkeypatch) -> None:
    # env(1) from POSIX: `env NAME=VALUE command …` runs the command with NAME added to its environment.
    real = mpiexec()
    monkeypatch.setenv("SHARDMILL_MPIEXEC", " ".join(["env", "SHARDMILL_PROBE=seen", *real]))
    # One write(2) per rank: print() of two values unbuffered is several writes, and the ranks' output interleaves.
    probe = ("import os; e = os.environ; "
             "os.write(1, (e['SHARDMILL_PROBE'] + ' ' + e['SHARDMILL_LAUNCHED'] + '\\n').encode())")
    done = run_ranks(2, ["-c", probe], timeout=60, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    assert done.returncode == 0, done.stderr
    assert done.stdout.splitlines() == ["seen 1", "seen 1"]  # one line per rank


def _gone(pid: int, within_s: float = 10.0) -> bool:
    end = time.monotonic() + within_s
    while time.monotonic() < end:
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return True
        time.sleep(0.1)
    return False


def test_run_past_its_limit_ends_the_whole_group(tmp_path) -> None:
    pid_file = tmp_path / "grandchild.pid"
    # The command starts a grandchild (as mpiexec starts ranks) and both sleep far past the limit.
    code = ("import subprocess, sys, time; "
            "p = subprocess.Popen([sys.executable, '-c', 'import time; time.sleep(60)']); "
            f"open({str(pid_file)!r}, 'w').write(str(p.pid)); time.sleep(60)")
    begin = time.perf_counter()
    with pytest.raises(subprocess.TimeoutExpired):
        run_command([sys.executable, "-c", code], rank_environment(launched=False), timeout=1.0)
    assert time.perf_counter() - begin < 20
    assert pid_file.exists() and _gone(int(pid_file.read_text()))


def test_status_past_the_limit_is_124_with_a_message(tmp_path, monkeypatch, capsys) -> None:
    script = tmp_path / "slow-mpiexec"
    script.write_text(f"#!{sys.executable}\nimport time\ntime.sleep(60)\n")
    script.chmod(0o755)
    monkeypatch.setenv("SHARDMILL_MPIEXEC", str(script))
    assert run_for_status(2, ["-c", "pass"], timeout=0.5) == 124  # 124: timeout(1)'s status, GNU coreutils
    assert "the 2-process job ran past 0.5 s and was stopped" in capsys.readouterr().err


def test_importing_shardmill_sets_the_thread_waits_before_numpy_loads() -> None:
    """A single process (`shardmill bench --threads 2`, `sm.train` in a script) gets the short waits too, not only the
    ranks the launcher starts. The libraries read them once, when they load: GNU OpenMP's manual says so of
    GOMP_SPINCOUNT; OpenBLAS reads OPENBLAS_THREAD_TIMEOUT in its start-up scan of the environment (its source, from
    memory). So the package sets them before it imports numpy; a value the user set wins."""
    code = textwrap.dedent(f"""
        import importlib.abc, json, os, sys
        seen = {{}}
        class Watch(importlib.abc.MetaPathFinder):  # notes the variables when numpy starts to load
            def find_spec(self, name, path, target=None):
                if name == "numpy" and not seen:
                    seen.update({{k: os.environ.get(k) for k in {sorted(THREAD_WAITS)!r}}})
                return None
        sys.meta_path.insert(0, Watch())
        import shardmill
        print(json.dumps(seen))
    """)
    env = {k: v for k, v in os.environ.items() if k not in THREAD_WAITS}
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True).stdout
    assert json.loads(out) == THREAD_WAITS
    env["OPENBLAS_THREAD_TIMEOUT"] = "9"
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True).stdout
    assert json.loads(out) == dict(THREAD_WAITS, OPENBLAS_THREAD_TIMEOUT="9")
