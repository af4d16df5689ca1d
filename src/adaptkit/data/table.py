"""The user's own table as a domain pair: ``data=table data.path=... data.label=...`` (registered in
:data:`~adaptkit.data.shifts.SHIFTS` as ``table``, by the shifts module).

:func:`table` reads a CSV file (the ``csv`` module; a first row holding any non-numeric cell is the header, else the
columns are named by their index ``0, 1, …``), a Parquet file (pyarrow, the optional extra ``adaptkit[parquet]``;
columns by name), a ``.npy`` file (one 2-D numeric array; columns named by index) or a
``.npz`` file (its arrays are the columns, named by their keys: 1-D arrays of one value per row, and — when it is the
only feature array — one ``(N, …)`` array kept with its shape, e.g. images). Every column that is neither the label
nor the domain column is a feature, unless ``features`` lists them.

Which rows are the target: either a ``domain`` column, whose value ``source_value`` marks the source rows
(``target_value`` the target rows; unset: every other row), or a second file ``target_path`` with the same feature
columns. Labels are integer classes ``0..K-1``; an empty cell or ``-1`` is an unknown label. Every source row must
be labelled; target labels, where the file has them, are kept for *scoring only* (as the bundled shifts' are): the
training loop never receives them (:class:`~adaptkit.data.pair.DomainPair`). The splits (source validation share,
target test share) are drawn as the bundled shifts draw theirs, seeded by ``seed`` (the run's seed unless set).

Every error is one line naming the file and the column: a missing file, an unknown column, a non-numeric value, a
source with one class only.

Example:
    >>> pair = table(path="site_a_and_b.csv", label="outcome", domain="site", source_value="A")  # doctest: +SKIP
    >>> pair.n_classes, pair.has_target_labels  # doctest: +SKIP
    (2, False)
"""
from __future__ import annotations

import csv
from pathlib import Path
from typing import Dict, List, Optional

import numpy as np

from .._checks import check_number
from .pair import UNLABELLED, DomainPair

SUFFIXES = (".csv", ".npy", ".npz", ".parquet")


def _fail(path, message: str) -> ValueError:
    return ValueError(f"table {str(path)!r}: {message}")


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def read_columns(path) -> Dict[str, np.ndarray]:
    """The columns of the file ``path`` by name, in file order: string arrays for a CSV file, numeric arrays for
    ``.npy``/``.npz``. Raises a one-line ``ValueError`` naming the file when it is missing or unreadable."""
    p = Path(str(path)).expanduser()
    if p.suffix.lower() not in SUFFIXES:
        raise _fail(path, f"unsupported file type {p.suffix or '(none)'!r}; accepted: {', '.join(SUFFIXES)}.")
    if not p.is_file():
        raise _fail(path, f"no such file (looked in {str(p.resolve().parent)!r}).")
    if p.suffix.lower() == ".parquet":
        return _read_parquet(p, path)
    try:
        if p.suffix.lower() == ".csv":
            return _read_csv(p, path)
        loaded = np.load(p, allow_pickle=False)
    except (OSError, ValueError, UnicodeDecodeError, csv.Error) as e:
        if str(e).startswith("table "):
            raise
        raise _fail(path, f"cannot be read ({type(e).__name__}: {str(e).splitlines()[0] if str(e) else ''}).") from None
    if isinstance(loaded, np.ndarray):
        if loaded.ndim != 2:
            raise _fail(path, f"a .npy table must hold one 2-D array (rows, columns); got shape {loaded.shape}.")
        return {str(j): loaded[:, j] for j in range(loaded.shape[1])}
    with loaded:
        cols = {k: loaded[k] for k in loaded.files}
    lengths = {k: (v.shape[0] if v.ndim else None) for k, v in cols.items()}
    if len(set(lengths.values())) != 1 or None in lengths.values():
        raise _fail(path, f"the arrays of a .npz table must have one entry per row; got lengths {lengths}.")
    return cols


def _read_parquet(p: Path, path) -> Dict[str, np.ndarray]:
    """A Parquet file's columns through pyarrow (the optional extra ``adaptkit[parquet]``): numeric columns without
    missing values as numeric arrays, every other column as strings with ``""`` for a missing value (then read as
    the cells of a CSV file are: an unknown label, or an error naming the feature column and row)."""
    try:
        import pyarrow.parquet as pq
    except ImportError:
        raise _fail(path, "reading Parquet needs the pyarrow package, which is not installed: "
                    "pip install 'adaptkit[parquet]' (or convert the file to CSV).") from None
    try:
        t = pq.read_table(p)
    except (OSError, ValueError) as e:  # pyarrow's ArrowInvalid is a ValueError
        raise _fail(path, f"cannot be read ({type(e).__name__}: {str(e).splitlines()[0] if str(e) else ''}).") from None
    if t.num_rows == 0:
        raise _fail(path, "has no rows.")
    out = {}
    for name, col in zip(t.column_names, t.columns):
        import pyarrow.types as pt

        if col.null_count == 0 and (pt.is_integer(col.type) or pt.is_floating(col.type) or pt.is_boolean(col.type)):
            out[str(name)] = col.to_numpy()
        else:
            out[str(name)] = np.array(["" if v is None else str(v) for v in col.to_pylist()], dtype=object)
    return out


def _read_csv(p: Path, path) -> Dict[str, np.ndarray]:
    with open(p, newline="", encoding="utf-8-sig") as f:
        rows = [[cell.strip() for cell in row] for row in csv.reader(f) if any(cell.strip() for cell in row)]
    if not rows:
        raise _fail(path, "is empty.")
    header = any(cell and not _is_number(cell) for cell in rows[0])
    names = rows[0] if header else [str(j) for j in range(len(rows[0]))]
    body = rows[1:] if header else rows
    if not body:
        raise _fail(path, "has a header but no rows.")
    if len(set(names)) != len(names):
        raise _fail(path, f"the header names a column twice: {names}.")
    for i, row in enumerate(body):
        if len(row) != len(names):
            raise _fail(path, f"row {i + 1 + header} has {len(row)} cells, the header {len(names)}.")
    return {name: np.array([row[j] for row in body], dtype=object) for j, name in enumerate(names)}


def _column(cols: Dict[str, np.ndarray], spec: str, path, what: str) -> str:
    """The name of the column ``spec`` (a name, or an index into the columns) names."""
    spec = str(spec)
    if spec in cols:
        return spec
    names = list(cols)
    if spec.lstrip("-").isdigit() and -len(names) <= int(spec) < len(names):
        return names[int(spec)]
    raise _fail(path, f"no column {spec!r} ({what}); columns: {', '.join(names)}.")


def _numeric(values: np.ndarray, path, column: str) -> np.ndarray:
    """``values`` as float64; a non-numeric or empty cell raises an error naming the file, column and row."""
    if values.dtype != object:
        if values.dtype.kind not in "biuf":
            raise _fail(path, f"column {column!r} holds non-numeric values (dtype {values.dtype}).")
        return values.astype(np.float64)
    out = np.empty(len(values), dtype=np.float64)
    for i, v in enumerate(values):
        try:
            out[i] = float(v)
        except ValueError:
            shown = "an empty cell" if v == "" else f"the non-numeric value {v!r}"
            raise _fail(path, f"column {column!r} holds {shown} in data row {i + 1}; features must be numbers "
                        "(encode categories as numbers, or leave the column out with data.features).") from None
    return out


def _labels(values: np.ndarray, path, column: str) -> np.ndarray:
    """Integer class labels, ``-1`` for an empty cell or ``-1``; anything else raises naming the column."""
    if values.dtype == object:
        y = np.array([UNLABELLED if v == "" else float(v) if _is_number(v) else np.nan for v in values])
    elif values.dtype.kind in "biuf":
        y = values.astype(np.float64)
    else:
        raise _fail(path, f"label column {column!r} holds non-numeric values (dtype {values.dtype}).")
    bad = ~np.isfinite(y) | (y != np.round(y)) | (y < UNLABELLED)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise _fail(path, f"label column {column!r} holds {values[i]!r} in data row {i + 1}; labels are classes "
                    "0..K-1, with an empty cell or -1 for an unknown label.")
    return y.astype(np.int64)


def _features(cols: Dict[str, np.ndarray], names: List[str], path) -> np.ndarray:
    if not names:
        raise _fail(path, "has no feature column left besides the label and domain columns.")
    arrays = [cols[n] for n in names]
    if len(arrays) == 1 and arrays[0].ndim > 1:  # one (N, ...) array of a .npz: kept with its shape
        a = arrays[0]
        if a.dtype.kind not in "biuf":
            raise _fail(path, f"column {names[0]!r} holds non-numeric values (dtype {a.dtype}).")
        return a.astype(np.float64)
    parts = []
    for n, a in zip(names, arrays):
        if a.ndim > 2:
            raise _fail(path, f"column {n!r} has shape {a.shape}; an array of more than two dimensions must be the "
                        "only feature (list it alone in data.features).")
        parts.append(_numeric(a, path, n).reshape(len(a), 1) if a.ndim == 1 or a.dtype == object
                     else _numeric(a.reshape(-1), path, n).reshape(a.shape))
    return np.concatenate(parts, axis=1)


def _matches(values: np.ndarray, wanted: str) -> np.ndarray:
    if values.dtype == object:
        return np.array([str(v) == str(wanted) for v in values])
    if _is_number(str(wanted)):
        return values.astype(np.float64) == float(wanted)
    return np.zeros(len(values), dtype=bool)


def _values(values: np.ndarray, limit: int = 8) -> str:
    shown = sorted({str(v) for v in values.tolist()})
    return ", ".join(map(repr, shown[:limit])) + (", …" if len(shown) > limit else "")


def table(seed: int = 0, path: Optional[str] = None, label: Optional[str] = None, domain: Optional[str] = None,
          source_value: Optional[str] = None, target_value: Optional[str] = None,
          target_path: Optional[str] = None, features: Optional[List[str]] = None,
          source_val_fraction: float = 0.2, target_test_fraction: float = 0.3) -> DomainPair:
    """The user's own table (CSV, ``.npy`` or ``.npz``; see the module docstring) as a :class:`DomainPair`.

    Args:
        seed: seeds the source-validation and target-test splits.
        path: the file holding the source rows (and, with ``domain``, the target rows too).
        label: the label column, by name or index (``.npy``: an index).
        domain: the column telling source rows from target rows (with ``source_value``/``target_value``).
        source_value: the ``domain`` value of the source rows.
        target_value: the ``domain`` value of the target rows (unset: every row that is not a source row).
        target_path: a second file holding the target rows (instead of ``domain``); its label column, if it has
            one, is kept for scoring only.
        features: the feature columns, by name or index (unset: every column but the label and domain columns).
        source_val_fraction: share of the source rows held out (stratified) for validation.
        target_test_fraction: share of the target rows held out for scoring.

    Example:
        >>> pair = table(path="source.csv", target_path="target.csv", label="y")  # doctest: +SKIP
    """
    owner = "data source 'table'"
    seed = check_number("seed", owner, seed, low=0, integer=True)
    if not path:
        raise ValueError("data source 'table' needs data.path: the CSV, .npy or .npz file of the source rows "
                         "(e.g. adaptkit-train data=table data.path=mine.csv data.label=y data.domain=site "
                         "data.source_value=A).")
    if label is None or str(label) == "":
        raise ValueError(f"table {str(path)!r}: set data.label, the label column (by name or index).")
    if (domain is None) == (target_path is None):
        raise ValueError(f"table {str(path)!r}: set exactly one of data.domain (a column naming each row's domain, "
                         "with data.source_value) and data.target_path (a second file of target rows).")
    cols = read_columns(path)
    label_col = _column(cols, label, path, "the label")
    used = [label_col]
    if domain is not None:
        domain_col = _column(cols, domain, path, "the domain")
        if domain_col == label_col:
            raise _fail(path, f"column {domain_col!r} cannot be both the label and the domain.")
        used.append(domain_col)
        if source_value is None:
            raise _fail(path, f"set data.source_value: the value of column {domain_col!r} that marks source rows "
                        f"(its values: {_values(cols[domain_col])}).")
        is_source = _matches(cols[domain_col], source_value)
        is_target = ~is_source if target_value is None else _matches(cols[domain_col], target_value)
        for what, mask, value in (("source", is_source, source_value), ("target", is_target, target_value)):
            if not mask.any():
                raise _fail(path, f"no row has {value!r} in column {domain_col!r} (the {what}_value); its values: "
                            f"{_values(cols[domain_col])}.")
    if features is None:
        feature_cols = [n for n in cols if n not in used]
    else:
        feature_cols = [_column(cols, f, path, "a feature") for f in features]
        clash = sorted(set(feature_cols) & set(used))
        if clash:
            raise _fail(path, f"column {clash[0]!r} is listed in data.features but is the label or domain column.")
    x = _features(cols, feature_cols, path)
    y = _labels(cols[label_col], path, label_col)

    if domain is not None:
        xs, ys, xt, yt = x[is_source], y[is_source], x[is_target], y[is_target]
        source_file, target_file = path, path
    else:
        xs, ys = x, y
        tcols = read_columns(target_path)
        missing = [n for n in feature_cols if n not in tcols]
        if missing:
            raise _fail(target_path, f"no column {missing[0]!r} (a feature of {str(path)!r}); columns: "
                        f"{', '.join(tcols)}.")
        xt = _features(tcols, feature_cols, target_path)
        yt = _labels(tcols[label_col], target_path, label_col) if label_col in tcols else None
        source_file, target_file = path, target_path
    if xs.shape[1:] != xt.shape[1:]:
        raise _fail(target_file, f"target rows have shape {xt.shape[1:]} per row, the source {xs.shape[1:]}.")
    unlabelled = int((ys == UNLABELLED).sum())
    if unlabelled:
        raise _fail(source_file, f"{unlabelled} source row(s) have no label in column {label_col!r}; every source "
                    "row needs a class (unlabelled rows belong in the target).")
    classes = np.unique(ys)
    if len(classes) < 2:
        raise _fail(source_file, f"the source rows hold one class only ({int(classes[0])}) in column {label_col!r}; "
                    "a classifier needs at least two.")
    if not np.array_equal(classes, np.arange(int(classes.max()) + 1)):
        missing_classes = sorted(set(range(int(classes.max()) + 1)) - set(classes.tolist()))
        raise _fail(source_file, f"the source labels in column {label_col!r} skip class(es) {missing_classes}; "
                    "relabel the classes to 0..K-1.")
    if yt is not None:
        extra = sorted(set(yt[yt != UNLABELLED].tolist()) - set(classes.tolist()))
        if extra:
            raise _fail(target_file, f"target labels {extra} in column {label_col!r} are no class of the source "
                        f"(0..{int(classes.max())}).")
        if not (yt != UNLABELLED).any():
            yt = None
    return DomainPair(xs, ys, xt, yt, name="table", source_val_fraction=source_val_fraction,
                      target_test_fraction=target_test_fraction, split_seed=seed)



FILE_PARAMETERS = ("path", "target_path")  # the parameters of table() naming files: their contents are hashed


def files_digest(entry) -> "Optional[str]":
    """SHA-256 of the contents of the files a ``data=table`` entry names (``path``, ``target_path``), for the
    config hash: a changed file is not the same run, though its settings read the same. ``None`` for any other
    data entry. A file that cannot be read is hashed as missing (reading it fails later, naming it).

    Example:
        >>> files_digest({"name": "rotated_moons"}) is None
        True
    """
    import hashlib

    if not isinstance(entry, dict) or entry.get("name") != "table":
        return None
    h = hashlib.sha256()
    for name in FILE_PARAMETERS:
        value = entry.get(name)
        if value is None:
            continue
        h.update(f"{name}\0".encode())
        try:
            with open(Path(str(value)).expanduser(), "rb") as f:
                for block in iter(lambda: f.read(1 << 20), b""):
                    h.update(block)
        except OSError:
            h.update(b"<unreadable>")
        h.update(b"\0")
    return h.hexdigest()
