"""Reading a user's data files: SVM-light (own streaming reader), CSV, Parquet, npz; bad files."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp

from benchsuite.datafiles import DataFileError, file_digest, labels_for, read_data, read_svmlight
from benchsuite.errors import UserError

SVM = """# a comment line
+1 1:0.5 3:-2 7:1e-3
-1 2:4 # trailing comment

-1 qid:3 1:1 5:2.5
+1
"""


def write(tmp_path: Path, name: str, text: str) -> Path:
    p = tmp_path / name
    p.write_text(text)
    return p


def test_svmlight_reader_matches_scikit_learn(tmp_path: Path) -> None:
    from sklearn.datasets import load_svmlight_file

    p = write(tmp_path, "a.svm", SVM)
    ds = read_svmlight(p)
    # scikit-learn's load_svmlight_file as the reference (1-based indices, qid ignored)
    X_ref, y_ref = load_svmlight_file(str(p), zero_based=False)
    assert ds.X.shape == (4, 7) and sp.isspmatrix_csr(ds.X)
    np.testing.assert_array_equal(ds.X.toarray(), X_ref.toarray())
    np.testing.assert_array_equal(ds.y, y_ref)
    assert list(ds.rows) == [2, 3, 5, 6]  # physical lines of the samples (comments, blanks skipped)


def test_svmlight_random_file_round_trip_against_scikit_learn(tmp_path: Path) -> None:
    from sklearn.datasets import dump_svmlight_file, load_svmlight_file

    rng = np.random.default_rng(0)
    X = sp.random(200, 50, density=0.1, format="csr", random_state=1)
    y = np.where(rng.random(200) < 0.5, -1.0, 1.0)
    p = tmp_path / "r.svm"
    dump_svmlight_file(X, y, str(p), zero_based=False)  # scikit-learn's writer
    ds = read_data(p)
    X_ref, _ = load_svmlight_file(str(p), zero_based=False, n_features=50)
    # both parse the same decimal text: equal to the bit
    np.testing.assert_array_equal(read_svmlight(p, n_features=50).X.toarray(), X_ref.toarray())
    assert ds.X.shape[0] == 200 and np.array_equal(ds.y, y)


@pytest.mark.parametrize(
    "text, line, words",
    [
        ("+1 1:0.5 2:1\n-1 1:0.25 3:\n", 2, "truncated or malformed pair '3:'"),
        ("+1 1:0.5\n-1 1:0.2 4\n", 2, "truncated or malformed pair '4'"),
        ("+1 1:0.5\n+1 2:abc\n", 2, "non-numeric value 'abc' for feature 2"),
        ("+1 1:0.5\nyes 2:1\n", 2, "non-numeric label 'yes'"),
        ("+1 1:0.5\n\n-1 0:1.0\n", 3, "feature index 0 <= 0"),
        ("+1 1:0.5\n-1 -3:1.0\n", 2, "feature index -3 <= 0"),
        ("+1 3:0.5 2:1\n", 1, "indices must increase"),
        ("+1 1:nan\n", 1, "is not finite"),
        ("", 1, "empty file"),
        ("# only a comment\n\n", 2, "no data lines"),
    ],
)
def test_bad_svmlight_files_name_file_and_line(tmp_path: Path, text: str, line: int, words: str) -> None:
    p = write(tmp_path, "bad.svm", text)
    with pytest.raises(DataFileError) as exc:
        read_data(p)
    msg = str(exc.value)
    assert isinstance(exc.value, UserError) and "\n" not in msg
    assert msg.startswith(f"{p}: line {line}: ") and words in msg


def test_mixed_label_sets(tmp_path: Path) -> None:
    p = write(tmp_path, "m.svm", "1 1:1\n-1 1:2\n1 2:1\n0 1:1\n")
    ds = read_data(p)
    with pytest.raises(DataFileError, match=r"m.svm: line 4: label 0 mixes label sets.*-1 \(first at line 2\)"):
        labels_for(ds, "binary")
    ok = read_data(write(tmp_path, "ok.svm", "0 1:1\n1 1:2\n0 2:1\n"))
    assert list(labels_for(ok, "binary")) == [-1.0, 1.0, -1.0]  # {0, 1} mapped to {-1, +1}
    one = read_data(write(tmp_path, "one.svm", "1 1:1\n1 1:2\n"))
    with pytest.raises(DataFileError, match="only one class"):
        labels_for(one, "binary")
    frac = read_data(write(tmp_path, "f.svm", "1 1:1\n2.5 1:2\n"))
    with pytest.raises(DataFileError, match=r"f.svm: line 2: class label 2.5 is not an integer"):
        labels_for(frac, "classes")
    assert list(labels_for(read_data(write(tmp_path, "c.svm", "7 1:1\n3 1:2\n7 2:1\n")), "classes")) == [1, 0, 1]


CSV = "a,b,label\n1.0,2.0,1\n\n3,4.5,0\n-1,0,1\n"


def test_csv_reads_features_and_label_with_line_numbers(tmp_path: Path) -> None:
    ds = read_data(write(tmp_path, "t.csv", CSV))
    np.testing.assert_array_equal(ds.X, [[1.0, 2.0], [3.0, 4.5], [-1.0, 0.0]])
    np.testing.assert_array_equal(ds.y, [1.0, 0.0, 1.0])
    assert list(ds.rows) == [2, 4, 5]  # the blank line 3 is skipped, lines still exact


@pytest.mark.parametrize(
    "text, line, words",
    [
        ("a,b,label\n1,2,1\n3,4\n", 3, "2 fields, expected 3 (truncated line?)"),
        ("a,b,label\n1,2,1\n3,x7,0\n", 3, "column 'b': non-numeric value 'x7'"),
        ("a,b,label\n1,2,1\n3,,0\n", 3, "column 'b': missing value"),
        ("a,b,label\n1,2,1\n3,4,0,9\n", 3, "4 fields, expected 3 (extra values)"),
        ("", 1, "empty file"),
        ("a,b,label\n", 2, "no data rows"),
    ],
)
def test_bad_csv_files_name_file_and_line(tmp_path: Path, text: str, line: int, words: str) -> None:
    p = write(tmp_path, "bad.csv", text)
    with pytest.raises(DataFileError) as exc:
        read_data(p)
    msg = str(exc.value)
    assert "\n" not in msg and msg.startswith(f"{p}: line {line}: ") and words in msg, msg


def test_csv_label_column_must_exist(tmp_path: Path) -> None:
    with pytest.raises(DataFileError, match=r"no label column 'y' \(columns: a, b, label\)"):
        read_data(write(tmp_path, "t.csv", CSV), label="y")


def test_parquet(tmp_path: Path) -> None:
    # pyarrow is an optional extra (pandas reads Parquet through it); without it this test has
    # nothing to check, and the reader's one-line message is tested below instead
    pytest.importorskip("pyarrow", reason="pyarrow not installed: Parquet support is an optional extra")
    import pandas as pd

    df = pd.DataFrame({"f1": [1.0, 2.0, 3.0], "f2": [0.5, -1.0, 2.0], "label": [1, -1, 1]})
    p = tmp_path / "t.parquet"
    df.to_parquet(p)
    ds = read_data(p)
    np.testing.assert_array_equal(ds.X, df[["f1", "f2"]].to_numpy())
    np.testing.assert_array_equal(ds.y, [1.0, -1.0, 1.0])
    bad = pd.DataFrame({"f1": ["1.0", "oops", "3"], "label": [1, -1, 1]})
    bad.to_parquet(tmp_path / "bad.parquet")
    with pytest.raises(DataFileError, match=r"bad.parquet: row 2: column 'f1': non-numeric value 'oops'"):
        read_data(tmp_path / "bad.parquet")


def test_parquet_without_pyarrow_is_one_line(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import builtins

    real_import = builtins.__import__

    def no_pyarrow(name, *args, **kwargs):
        if name == "pyarrow" or name.startswith("pyarrow."):
            raise ImportError("no pyarrow")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", no_pyarrow)
    p = write(tmp_path, "t.parquet", "not really parquet")
    with pytest.raises(DataFileError, match=r"t.parquet: reading Parquet needs pyarrow \(pip install pyarrow\)"):
        read_data(p)


def test_npz_dense_and_csr(tmp_path: Path) -> None:
    X = np.arange(6.0).reshape(3, 2)
    np.savez(tmp_path / "d.npz", X=X, y=np.array([1, 0, 1]))
    ds = read_data(tmp_path / "d.npz")
    np.testing.assert_array_equal(ds.X, X)
    S = sp.random(4, 5, density=0.5, format="csr", random_state=0)
    np.savez(tmp_path / "s.npz", data=S.data, indices=S.indices, indptr=S.indptr, shape=S.shape, y=np.ones(4))
    assert (read_data(tmp_path / "s.npz").X != S).nnz == 0
    np.savez(tmp_path / "bad.npz", X=X)
    with pytest.raises(DataFileError, match=r"bad.npz: array 'y' \(labels\) missing \(found: X\)"):
        read_data(tmp_path / "bad.npz")
    np.savez(tmp_path / "n.npz", X=np.array([[1.0, np.inf]]), y=np.ones(1))
    with pytest.raises(DataFileError, match="array 'X': non-finite value"):
        read_data(tmp_path / "n.npz")


def test_unknown_suffix_and_missing_file(tmp_path: Path) -> None:
    with pytest.raises(DataFileError, match="data file not found"):
        read_data(tmp_path / "nope.csv")
    with pytest.raises(DataFileError, match=r"cannot tell the format from the suffix '.dat'"):
        read_data(write(tmp_path, "x.dat", "1 1:1\n"))
    assert read_data(write(tmp_path, "x.dat", "1 1:1\n"), fmt="svmlight").X.shape == (1, 1)


def test_digest_follows_the_bytes(tmp_path: Path) -> None:
    p = write(tmp_path, "a.svm", SVM)
    d1 = file_digest(p)
    p.write_text(SVM.replace("0.5", "0.6"))
    assert file_digest(p) != d1
