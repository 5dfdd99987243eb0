"""Tables in: CSV with and without a header row, and Parquet by row groups, on scikit-learn's bundled data sets.

References, each named beside its check: the arrays scikit-learn ships (written here as text with 17 significant
digits, which reads back to the same float64, IEEE 754-2008 §5.12.2), Python's ``csv`` module with ``float``, and
``pyarrow.parquet.read_table``. Training from a table must give the very parameters training from .npy files gives.
"""

from __future__ import annotations

import csv
import json
import os
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import shardmill as sm
from helpers import run_mpi, write_job
from shardmill.config import job_from_dict
from shardmill.data import files, tables
from shardmill.data.dataset import load_dataset
from shardmill.data.files import read_array
from shardmill.errors import JobError
from shardmill.model.mlp import model_from_job
from shardmill.parallel.comm import Comm
from sklearn.datasets import load_diabetes, load_wine

WINE = load_wine()
WINE_NAMES = [name.replace("/", "_") for name in WINE.feature_names]  # 'od280/od315_…' → a plain name
DIABETES = load_diabetes()


def write_csv(path: Path, columns: dict[str, np.ndarray], header: bool = True) -> Path:
    """One line per row, 17 significant digits (reads back to the same float64); integer columns as integers."""
    data = list(columns.values())
    with open(path, "w") as f:
        if header:
            f.write(",".join(columns) + "\n")
        for i in range(data[0].shape[0]):
            f.write(",".join(str(int(c[i])) if c.dtype.kind in "iu" else f"{c[i]:.17g}" for c in data) + "\n")
    return path


def wine_columns() -> dict[str, np.ndarray]:
    return {**{name: WINE.data[:, j] for j, name in enumerate(WINE_NAMES)}, "class": WINE.target.astype(np.int64)}


def csv_reference(path: Path, skip_header: bool) -> np.ndarray:
    """An independent read: Python's csv module and float()."""
    with open(path, newline="") as f:
        rows = list(csv.reader(f))
    return np.array([[float(v) for v in row] for row in rows[1 if skip_header else 0:]])


def job(folder: Path, data: dict, layers: list[int], loss: str = "softmax_cross_entropy", **run) -> sm.Job:
    return job_from_dict({"model": {"layers": layers, "loss": loss, "activation": "tanh", "dtype": "float64"},
                          "data": {"validation_fraction": 0.2, **data},
                          "run": {"workdir": str(folder / "run"), "global_batch": 16, "seed": 4, **run}},
                         base=folder)


@pytest.fixture(scope="module")
def wine(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("wine")
    write_csv(folder / "wine.csv", wine_columns())
    write_csv(folder / "wine-bare.csv", wine_columns(), header=False)
    table = pa.table({**{n: WINE.data[:, j] for j, n in enumerate(WINE_NAMES)}, "class": pa.array(WINE.target)})
    pq.write_table(table, folder / "wine.parquet", row_group_size=50)  # 178 rows: groups of 50, 50, 50, 28
    return folder


# --- reading ------------------------------------------------------------------------------------------------------

def test_csv_with_header_reads_the_values_and_names(wine):
    table = tables.describe(wine / "wine.csv", "data.inputs")
    assert table.named and table.columns == WINE_NAMES + ["class"]  # the header row as written
    values = tables.read_table(table, list(range(14)))
    # reference: the arrays scikit-learn ships (17 significant digits read back exactly, IEEE 754-2008 §5.12.2)
    assert np.array_equal(values[:, :13], WINE.data) and np.array_equal(values[:, 13], WINE.target)
    # reference: Python's csv module and float()
    assert np.array_equal(values, csv_reference(wine / "wine.csv", skip_header=True))


def test_csv_without_header_is_detected_and_named_by_position(wine):
    table = tables.describe(wine / "wine-bare.csv", "data.inputs")
    assert not table.named and table.columns == [str(j) for j in range(14)]
    values = tables.read_table(table, tables.select(table, ["13", "0"], "data.target"))
    reference = csv_reference(wine / "wine-bare.csv", skip_header=False)  # reference: csv module and float()
    assert np.array_equal(values, reference[:, [13, 0]])


def test_header_setting_overrides_the_detection(wine):
    forced = tables.describe(wine / "wine-bare.csv", "data.inputs", header="yes")
    assert forced.named and forced.columns[0] == f"{WINE.data[0, 0]:.17g}"  # the first row taken as names
    assert tables.read_table(forced, [0]).shape == (177, 1)
    refused = tables.describe(wine / "wine.csv", "data.inputs", header="no")
    with pytest.raises(JobError, match=r"line 1, column '0': 'alcohol' is not a number"):
        tables.read_table(refused, [0])


def test_csv_read_in_small_chunks_gives_the_same_rows(wine, monkeypatch):
    monkeypatch.setattr(tables, "CSV_CHUNK_LINES", 7)  # 178 rows: 26 chunks, the last one partial
    table = tables.describe(wine / "wine.csv", "data.inputs")
    assert np.array_equal(tables.read_table(table, [12, 0]), WINE.data[:, [12, 0]])  # reference: scikit-learn's arrays


def test_parquet_is_read_by_row_groups(wine):
    meta = pq.ParquetFile(wine / "wine.parquet").metadata
    assert meta.num_row_groups == 4
    table = tables.describe(wine / "wine.parquet", "data.inputs")
    assert table.rows == 178 and table.group_rows == [50, 50, 50, 28]
    values = tables.read_table(table, tables.select(table, ["class", "proline"], "data.features"))
    reference = pq.read_table(wine / "wine.parquet", columns=["class", "proline"])  # reference: pyarrow
    assert np.array_equal(values[:, 0], reference.column("class").to_numpy().astype(np.float64))
    assert np.array_equal(values[:, 1], reference.column("proline").to_numpy())


def test_parquet_integer_and_boolean_columns_become_float64(tmp_path):
    pq.write_table(pa.table({"i": pa.array([3, -2, 7], pa.int32()), "b": [True, False, True],
                             "f": pa.array([0.5, 1.5, 2.5], pa.float32())}), tmp_path / "t.parquet")
    values = read_array(tmp_path / "t.parquet", "inputs")
    # reference: pyarrow's own conversion to numpy, then numpy's astype
    expected = np.column_stack([pq.read_table(tmp_path / "t.parquet").column(c).to_numpy().astype(np.float64)
                                for c in ("i", "b", "f")])
    assert values.dtype == np.float64 and np.array_equal(values, expected)


def test_read_array_keeps_plain_csv_and_reads_headed_csv(wine, tmp_path):
    plain = read_array(wine / "wine-bare.csv", "inputs")
    assert np.array_equal(plain, np.loadtxt(wine / "wine-bare.csv", delimiter=","))  # reference: numpy.loadtxt
    headed = read_array(wine / "wine.csv", "inputs")
    assert np.array_equal(headed, plain)


def test_read_inputs_selects_features_by_name_or_drops_the_target(wine):
    picked = files.read_inputs(wine / "wine.parquet", "inputs", features=["hue", "alcohol"])
    assert np.array_equal(picked, WINE.data[:, [10, 0]])  # reference: scikit-learn's arrays
    dropped = files.read_inputs(wine / "wine.csv", "inputs", drop=["class", "not-there"])
    assert np.array_equal(dropped, WINE.data)
    bare = files.read_inputs(wine / "wine-bare.csv", "inputs", features=[str(j) for j in range(14)])
    assert np.array_equal(bare[:, :13], WINE.data)
    with pytest.raises(JobError, match=r"no header row and 14 columns; the model takes 13 columns"):
        files.read_inputs(wine / "wine-bare.csv", "inputs", features=WINE_NAMES)


# --- a job's data -------------------------------------------------------------------------------------------------

def test_target_column_by_name_and_feature_order(wine, tmp_path):
    for source in ("wine.csv", "wine.parquet"):
        X, y, names = files.open_job_data(job(tmp_path, {"inputs": str(wine / source), "target": "class"},
                                               [13, 8, 3]), Comm())
        assert isinstance(X, np.memmap) and not X.flags.writeable  # every rank maps the cache read-only
        assert names == WINE_NAMES and np.array_equal(X, WINE.data)  # reference: scikit-learn's arrays
        assert y.dtype == np.int64 and np.array_equal(y, WINE.target)
    features = ["proline", "alcohol", "hue"]
    X, y, names = files.open_job_data(job(tmp_path, {"inputs": str(wine / "wine.csv"), "target": ["class"],
                                                      "features": features}, [3, 8, 3]), Comm())
    assert names == features and np.array_equal(X, WINE.data[:, [12, 0, 10]])  # the order asked for


def test_headerless_table_with_target_by_position(wine, tmp_path):
    X, y, names = files.open_job_data(job(tmp_path, {"inputs": str(wine / "wine-bare.csv"), "target": "13"},
                                           [13, 8, 3]), Comm())
    assert names is None and np.array_equal(X, WINE.data) and np.array_equal(y, WINE.target)


def test_inputs_table_with_a_one_column_targets_table(wine, tmp_path):
    write_csv(tmp_path / "labels.csv", {"class": WINE.target.astype(np.int64)})
    X, y, names = files.open_job_data(job(tmp_path, {"inputs": str(wine / "wine.parquet"), "features": WINE_NAMES,
                                                      "targets": "labels.csv"}, [13, 8, 3]), Comm())
    assert names == WINE_NAMES and y.shape == (178,) and y.dtype == np.int64 and np.array_equal(y, WINE.target)
    dataset = load_dataset(job(tmp_path, {"inputs": str(wine / "wine.parquet"), "features": WINE_NAMES,
                                          "targets": "labels.csv"}, [13, 8, 3]),
                           model_from_job(job(tmp_path, {}, [13, 8, 3])), Comm())
    assert dataset.feature_names == WINE_NAMES and np.array_equal(dataset.targets, WINE.target)


def test_plain_arrays_are_read_as_before(tmp_path):
    np.save(tmp_path / "x.npy", WINE.data)
    np.save(tmp_path / "y.npy", WINE.target)
    np.savetxt(tmp_path / "y.csv", WINE.target, fmt="%d")
    X, y, names = files.open_job_data(job(tmp_path, {"inputs": "x.npy", "targets": "y.npy"}, [13, 8, 3]), Comm())
    assert names is None and isinstance(X, np.memmap) and np.array_equal(X, WINE.data)
    assert y.dtype == WINE.target.dtype and np.array_equal(y, WINE.target)
    assert not (tmp_path / "run" / "tables").exists()  # nothing converted for .npy files
    _, y, _ = files.open_job_data(job(tmp_path, {"inputs": "x.npy", "targets": "y.csv"}, [13, 8, 3]), Comm())
    assert y.shape == (178,) and np.array_equal(y, WINE.target)  # a numeric .csv of labels: (n,) as before


def test_the_cache_is_reused_and_renewed_when_the_source_changes(wine, tmp_path, monkeypatch):
    source = tmp_path / "wine.csv"
    source.write_bytes((wine / "wine.csv").read_bytes())
    the_job = job(tmp_path, {"inputs": "wine.csv", "target": "class"}, [13, 8, 3])
    files.open_job_data(the_job, Comm())
    sidecars = list((tmp_path / "run" / "tables").glob("*.json"))
    record = json.loads(sidecars[0].read_text())
    assert len(sidecars) == 1 and record["rows"] == 178 and record["parts"]["targets"] == ["class"]

    def refuse(*args):
        raise AssertionError("converted again")

    monkeypatch.setattr(tables, "_convert_csv", refuse)
    X, _, _ = files.open_job_data(the_job, Comm())  # a resume: the cache is found
    assert np.array_equal(X, WINE.data)
    monkeypatch.undo()
    stat = source.stat()
    os.utime(source, ns=(stat.st_atime_ns, stat.st_mtime_ns + 10**9))  # the file changed
    files.open_job_data(the_job, Comm())
    assert len(list((tmp_path / "run" / "tables").glob("*.json"))) == 2


# --- errors -------------------------------------------------------------------------------------------------------

def damaged_wine(folder: Path, row: int, column: int, text: str) -> Path:
    lines = (folder / "wine.csv").read_text().splitlines()
    fields = lines[row + 1].split(",")
    fields[column] = text
    lines[row + 1] = ",".join(fields)
    path = folder / "damaged.csv"
    path.write_text("\n".join(lines) + "\n")
    return path


def test_a_missing_column_is_named_with_the_closest_one(wine, tmp_path):
    with pytest.raises(JobError) as caught:
        files.open_job_data(job(tmp_path, {"inputs": str(wine / "wine.csv"), "target": "clas"}, [13, 8, 3]), Comm())
    message = str(caught.value)
    assert "`data.target` column 'clas'" in message and "did you mean 'class'?" in message
    assert "'alcohol', 'malic_acid'" in message
    with pytest.raises(JobError, match=r"`data.features` column 'prolin' .*did you mean 'proline'"):
        files.open_job_data(job(tmp_path, {"inputs": str(wine / "wine.parquet"), "target": "class",
                                            "features": ["prolin", "hue"]}, [2, 3]), Comm())


@pytest.mark.parametrize("text, expected", [
    ("abc", r"line 12, column 'ash': 'abc' is not a number"),
    ("", r"line 12, column 'ash': the field is empty"),
])
def test_a_bad_field_names_line_column_and_text(wine, tmp_path, monkeypatch, text, expected):
    monkeypatch.setattr(tables, "CSV_CHUNK_LINES", 5)  # the bad line lies in the third chunk
    path = damaged_wine(wine, row=10, column=2, text=text)  # row 10 of the data is line 12 (header is line 1)
    with pytest.raises(JobError, match=expected):
        tables.read_table(tables.describe(path, "data.inputs"), list(range(14)))


def test_an_unread_column_may_hold_text(wine, tmp_path):
    path = damaged_wine(wine, row=10, column=2, text="n/a")
    table = tables.describe(path, "data.inputs")
    assert np.array_equal(tables.read_table(table, [0]), WINE.data[:, :1])  # reference: scikit-learn's arrays


def test_a_ragged_row_names_its_line_and_field_counts(wine, tmp_path):
    lines = (wine / "wine.csv").read_text().splitlines()
    lines[30] += ",0.5"
    (tmp_path / "ragged.csv").write_text("\n".join(lines) + "\n")
    with pytest.raises(JobError, match=r"line 31 has 15 fields but the header row \(line 1\) has 14"):
        tables.read_table(tables.describe(tmp_path / "ragged.csv", "data.inputs"), [0])


def test_parquet_text_columns_and_nulls_are_refused(tmp_path):
    pq.write_table(pa.table({"x": [1.0, 2.0, None, 4.0], "name": ["a", "b", "c", "d"]}), tmp_path / "t.parquet",
                   row_group_size=2)
    table = tables.describe(tmp_path / "t.parquet", "data.inputs")
    with pytest.raises(JobError, match=r"column 'name' has type string; only integer, floating-point and boolean"):
        tables.read_table(table, [1])
    with pytest.raises(JobError, match=r"column 'x' is null \(missing\) in row 2"):  # row 0 of the second group
        tables.read_table(table, [0])


def test_missing_pyarrow_says_what_to_install(wine, monkeypatch):
    monkeypatch.setitem(sys.modules, "pyarrow.parquet", None)  # import fails as if pyarrow were absent
    with pytest.raises(JobError, match=r'pip install "shardmill\[parquet\]"'):
        tables.describe(wine / "wine.parquet", "data.inputs")


def test_column_selection_on_a_plain_array_is_refused(tmp_path):
    np.save(tmp_path / "x.npy", WINE.data)
    with pytest.raises(JobError, match=r"`data.target` selects columns by name, but `data.inputs` .*x.npy"):
        files.open_job_data(job(tmp_path, {"inputs": "x.npy", "target": "class"}, [13, 8, 3]), Comm())


# --- training -----------------------------------------------------------------------------------------------------

def final_parameters(workdir: Path) -> dict[str, np.ndarray]:
    with np.load(workdir / "final.npz", allow_pickle=False) as f:
        return {k: f[k] for k in f.files if k[0] in "Wb" and k[1:].isdigit()}


def test_training_from_a_csv_table_equals_training_from_npy(wine, tmp_path):
    np.save(tmp_path / "x.npy", WINE.data)
    np.save(tmp_path / "y.npy", WINE.target.astype(np.int64))
    runs = {"npy": {"inputs": "x.npy", "targets": "y.npy"}, "csv": {"inputs": str(wine / "wine.csv"),
                                                                       "target": "class"}}
    params = {}
    for name, data in runs.items():
        folder = tmp_path / name
        folder.mkdir()
        (folder / "x.npy").symlink_to(tmp_path / "x.npy")
        (folder / "y.npy").symlink_to(tmp_path / "y.npy")
        sm.train(job(folder, data, [13, 8, 3], epochs=2), progress=False)
        params[name] = final_parameters(folder / "run")
    assert sorted(params["csv"]) == ["W0", "W1", "b0", "b1"]
    for key, value in params["npy"].items():
        assert np.array_equal(params["csv"][key], value), key  # same data, same seed: the same arithmetic


@pytest.mark.mpi
def test_two_ranks_train_from_parquet_as_one_does_and_agree_on_a_bad_column(tmp_path):
    columns = {**{n: DIABETES.data[:, j] for j, n in enumerate(DIABETES.feature_names)},
               "target": DIABETES.target}
    pq.write_table(pa.table(columns), tmp_path / "diabetes.parquet", row_group_size=60)  # 442 rows: 8 groups
    model = {"layers": [10, 8, 1], "loss": "squared_error", "activation": "tanh", "dtype": "float64"}
    run = {"epochs": 2, "global_batch": 32, "seed": 1, "reduction": "exact", "exact_chunk": 4,
           "workdir": "run"}
    data = {"inputs": "../diabetes.parquet", "target": "target", "validation_fraction": 0.2}
    for name in ("one", "two", "bad"):
        (tmp_path / name).mkdir()
    sm.train(sm.load_job(write_job(tmp_path / "one", model, run, data=data)), progress=False)
    proc = run_mpi(2, ["-m", "shardmill", "train", str(write_job(tmp_path / "two", model, run, data=data)),
                       "--no-progress"], timeout=120)
    assert proc.returncode == 0, proc.stderr[-3000:]
    one, two = final_parameters(tmp_path / "one" / "run"), final_parameters(tmp_path / "two" / "run")
    for key, value in one.items():
        # exact reduction is bit-identical for every process count (README, fast and exact reduction)
        assert np.array_equal(two[key], value), key
    bad = write_job(tmp_path / "bad", model, run, data={**data, "target": "targte"})
    proc = run_mpi(2, ["-m", "shardmill", "train", str(bad), "--no-progress"], timeout=120)
    assert proc.returncode == 2, proc.stderr[-3000:]
    assert "`data.target` column 'targte'" in proc.stderr and "did you mean 'target'?" in proc.stderr
    assert "Traceback" not in proc.stderr


# --- hostile text: over-long fields, byte-order marks, control characters ----------------------------------------

FIELD_LIMIT = 131072  # Python's csv module: field_size_limit() defaults to 128 * 1024 characters (its documentation)


def test_an_over_long_header_name_is_one_line_naming_file_line_and_column(tmp_path):
    path = tmp_path / "long.csv"
    path.write_text("a," + "n" * (FIELD_LIMIT + 1) + "\n1,2\n")
    with pytest.raises(JobError) as caught:
        tables.describe(path, "data.inputs")
    message = str(caught.value)
    assert str(path) in message and "line 1, column 2" in message and f"{FIELD_LIMIT + 1:,} characters" in message
    assert "\n" not in message and len(message) < 400  # the value is not echoed in full


def test_an_over_long_quoted_field_names_its_column_when_converted_or_read_as_text(wine, tmp_path):
    lines = (wine / "wine.csv").read_text().splitlines()
    lines.insert(5, '"1' + "0" * (FIELD_LIMIT + 5) + '",' + ",".join(["1"] * 13))  # data row 4 is line 6
    path = tmp_path / "quoted.csv"
    path.write_text("\n".join(lines) + "\n")
    table = tables.describe(path, "data.inputs")
    with pytest.raises(JobError, match=r"line 6, column 'alcohol': a field of 131,078 characters; at most 131,072"):
        tables.read_table(table, [0, 1])
    with pytest.raises(JobError, match=r"line 6, column 'alcohol': a field of 131,078 characters"):
        tables.read_text(table, ["hue"], "data.categorical")


def test_one_byte_order_mark_is_the_encodings_and_a_second_is_refused(wine, tmp_path):
    text = (wine / "wine.csv").read_text()
    once, twice = tmp_path / "bom.csv", tmp_path / "bom2.csv"
    # U+FEFF at the start of a UTF-8 file is a byte-order mark, not text (The Unicode Standard, §23.8; Python's
    # "utf-8-sig" codec); a file that starts with two holds one mark and one U+FEFF character.
    once.write_bytes(b"\xef\xbb\xbf" + text.encode())
    twice.write_bytes(b"\xef\xbb\xbf\xef\xbb\xbf" + text.encode())
    assert tables.describe(once, "data.inputs").columns == WINE_NAMES + ["class"]
    with pytest.raises(JobError, match=r"line 1: the header name of column 1 \('\\ufeffalcohol'\) holds a second "
                                       r"byte-order mark"):
        tables.describe(twice, "data.inputs")


def test_a_nul_byte_in_a_header_name_is_refused(wine, tmp_path):
    text = (wine / "wine.csv").read_text().replace("ash,", "a\x00sh,", 1)
    (tmp_path / "nul.csv").write_text(text)
    with pytest.raises(JobError, match=r"line 1: the header name of column 3 \('a\\x00sh'\) holds the control "
                                       r"character U\+0000"):
        tables.describe(tmp_path / "nul.csv", "data.inputs")


def test_a_wrong_first_layer_is_blamed_before_anything_is_converted(wine, tmp_path):
    for inputs, data in (("wine.csv", {"target": "class"}), ("x.npy", {"targets": "y.npy"})):
        np.save(tmp_path / "x.npy", WINE.data)
        np.save(tmp_path / "y.npy", WINE.target)
        (tmp_path / "wine.csv").write_bytes((wine / "wine.csv").read_bytes())
        with pytest.raises(JobError) as caught:
            files.open_job_data(job(tmp_path, {"inputs": inputs, **data}, [12, 8, 3]), Comm())
        message = str(caught.value)
        assert message.startswith("`model.layers[0]` = 12 does not match the data") and "gives 13 numeric" in message
        assert "set `model.layers[0]` to 13" in message
        assert not (tmp_path / "run" / "tables").exists()  # the refused job converted nothing
