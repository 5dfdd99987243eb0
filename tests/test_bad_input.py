"""Bad input never ends in a traceback: job tables of random shape and type, unreadable job files, and data files of
odd dtypes or damaged bytes give either a working job or one JobError line (exit 2 on the command line).

Generated with hypothesis (property-based testing) over the job schema's keys, plus hand-made files for the cases
a user actually hit: non-UTF-8 text, 2000-deep nesting, a workdir that is not text, a thread count past a C int,
float16 / long double / big-endian inputs, zero-byte and truncated archives.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from helpers import make_classification, run_cli, write_job
from hypothesis import given, settings
from hypothesis import strategies as st
from shardmill import config
from shardmill.config import job_from_dict, load_job
from shardmill.errors import JobError

values = st.recursive(st.none() | st.booleans() | st.integers(-2**70, 2**70) | st.floats() | st.text(max_size=8),
                      lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=5), inner,
                                                                                   max_size=3), max_leaves=6)
KEYS = [key.path for key in config.SCHEMA]


@settings(max_examples=300, deadline=None)
@given(picks=st.dictionaries(st.sampled_from(KEYS + ["model.nope", "extra.key"]), values, max_size=6),
       layers=st.one_of(st.just([4, 8, 3]), values))
def test_any_job_table_is_accepted_or_refused_with_a_job_error(picks, layers):
    raw: dict = {"model": {"layers": layers}}
    for path, value in picks.items():
        section, key = path.split(".")
        raw.setdefault(section, {})[key] = value
    try:
        job_from_dict(raw)
    except JobError as err:
        assert "\n" not in str(err) and str(err)  # one line that says something. common practice


@pytest.mark.parametrize("content", [b"\xff\xfe[\x00m\x00", bytes(range(256)), b"[model]\nlayers = [" +
                                     b"[" * 2000, b"[model]\nlayers = [4, 3]\n[run]\nthreads = 99999999999\n",
                                     b"[model]\nlayers = [4, 3]\n[run]\nworkdir = 7\n",
                                     b"[model]\nlayers = [4, 3]\n[run]\nworkdir = \"\"\n",
                                     b"[model]\nlayers = [100000, 100000, 100000]\n"])
def test_unreadable_or_impossible_job_files_give_one_line(tmp_path, content):
    path = tmp_path / "job.toml"
    path.write_bytes(content)
    with pytest.raises(JobError) as caught:
        load_job(path)
    assert "\n" not in str(caught.value)


def test_a_job_file_that_is_a_folder_gives_one_line(tmp_path):
    (tmp_path / "job.toml").mkdir()
    with pytest.raises(JobError, match="job file"):
        load_job(tmp_path / "job.toml")


def _damaged(kind: str, folder: Path) -> Path:
    X = np.load(folder / "x.npy")
    path = folder / f"bad-{kind}.npy"
    if kind == "float16":
        np.save(path, X.astype(np.float16))
    elif kind == "longdouble":
        np.save(path, X.astype(np.longdouble))
    elif kind == "big_endian":
        np.save(path, X.astype(">f8"))
    elif kind == "empty":
        path.write_bytes(b"")
    elif kind == "truncated":
        np.save(path, X)
        path.write_bytes(path.read_bytes()[:100])
    elif kind in ("npz_truncated", "npz_crc"):
        path = folder / f"bad-{kind}.npz"
        np.savez(path, x=X)
        data = bytearray(path.read_bytes())
        if kind == "npz_truncated":
            data = data[: len(data) // 2]
        else:
            data[200] ^= 0xFF  # inside the stored array: the zip CRC no longer matches
        path.write_bytes(bytes(data))
    return path


@pytest.mark.parametrize("kind, works", [("float16", True), ("longdouble", True), ("big_endian", True),
                                         ("empty", False), ("truncated", False), ("npz_truncated", False),
                                         ("npz_crc", False)])
def test_odd_or_damaged_input_files(tmp_path, kind, works):
    make_classification(tmp_path, rows=60, features=6, classes=3, seed=1)
    inputs = _damaged(kind, tmp_path)
    job = write_job(tmp_path, {"layers": [6, 8, 3]}, {"global_batch": 8, "epochs": 1},
                    data={"inputs": inputs.name, "targets": "y.npy"})
    proc = run_cli(["train", str(job), "--no-progress"], timeout=120)
    assert "Traceback" not in proc.stderr, proc.stderr[-2000:]
    if works:  # converted to float64, in this machine's byte order (numpy's astype)
        assert proc.returncode == 0, proc.stderr[-2000:]
    else:
        assert proc.returncode == 2 and "`data.inputs`" in proc.stderr, proc.stderr[-2000:]
