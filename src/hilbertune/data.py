"""Data in, features out: CSV loading, bundled datasets, the invented demo, split + scaling.

First stage of the data flow. Loaders return a ``Dataset`` (features as float64, labels as
given); ``split_and_scale`` makes a stratified train/test split and fits every
preprocessing step (standardization, PCA, min-max scaling to rotation angles) on the TRAIN
part only. The fitted ``Preprocessing`` is plain arrays, so it is saved without pickle and
reapplied at predict time. Only the loaders read files; everything else is pure.
"""

from __future__ import annotations

import csv
import difflib
import hashlib
import io
import math
import os
from typing import NamedTuple

import numpy as np

from hilbertune.errors import InvalidInputError

#: Cells read as a missing value (case-insensitive, after stripping blanks).
MISSING_TOKENS = frozenset({"", "na", "n/a", "nan", "null", "?"})

#: Default angle range of the scaled features: [0, pi]. On this interval x -> RY(x)|0> is
#: one-to-one (the Bloch vector runs along half a great circle from |0> to |1>), so no two
#: distinct feature values encode the same state; a range of 2*pi would make both ends
#: coincide.
ANGLE_RANGE = (0.0, math.pi)
# A value this many robust spreads (scaled median absolute deviation) from its column's
# median is taken for a data error: min-max scaling would squash every other row into one
# point. Real heavy-tailed columns stay far below (bundled digits: 1.4e3, incomes: ~3e4).
OUTLIER_LIMIT = 1e6

BUNDLED_NAMES = ("iris", "wine", "breast_cancer", "digits", "moons", "circles")

_DELIMITERS = (",", ";", "\t")


class Dataset(NamedTuple):
    """A classification dataset as loaded, before any split or scaling."""

    X: np.ndarray  # float64 [N, F] features
    y: np.ndarray  # [N] original labels (ints, floats or strings)
    feature_names: tuple  # F column names
    target_name: str  # label column name
    source: str  # where the data came from, in words
    sha256: str  # hex digest of the file bytes (or of the canonical array bytes)
    invented: bool  # True for data made up by our own generator
    n_dropped: int = 0  # rows removed by ``drop_missing``


class Preprocessing(NamedTuple):
    """Fitted preprocessing, all plain arrays: ``z = (x - center) / scale @ projection``,
    then ``z * minmax_scale + minmax_offset``, clipped to ``feature_range`` when ``clip``.

    ``reduce == "pca"``: center/scale standardize (train mean and std) with the PCA mean
    folded into ``center``; ``projection`` holds the PCA axes. ``"first"`` and ``"none"``:
    center 0, scale 1 and ``projection`` picks the first columns.
    """

    reduce: str  # "none", "first" or "pca"
    center: np.ndarray  # float64 [F]
    scale: np.ndarray  # float64 [F]
    projection: np.ndarray  # float64 [F, D]
    minmax_scale: np.ndarray  # float64 [D]
    minmax_offset: np.ndarray  # float64 [D]
    feature_range: np.ndarray  # float64 [2]
    clip: bool

    @property
    def n_input_features(self) -> int:
        return int(self.projection.shape[0])

    @property
    def n_output_features(self) -> int:
        return int(self.projection.shape[1])

    def transform(self, X) -> np.ndarray:
        """Apply the fitted preprocessing: float array [N, F] -> [N, D]."""
        X = _check_matrix(X, "X")
        if X.shape[1] != self.n_input_features:
            raise InvalidInputError(
                f"X has {X.shape[1]} feature columns but the preprocessing was fitted on "
                f"{self.n_input_features}; pass the same feature columns as in training")
        reduced = ((X - self.center) / self.scale) @ self.projection
        scaled = reduced * self.minmax_scale + self.minmax_offset
        if self.clip:
            scaled = np.clip(scaled, self.feature_range[0], self.feature_range[1])
        return scaled

    def to_arrays(self) -> dict:
        """Plain numpy arrays (no object dtype) for ``np.savez`` without pickle."""
        return {"reduce": np.asarray(self.reduce), "center": self.center,
                "scale": self.scale, "projection": self.projection,
                "minmax_scale": self.minmax_scale, "minmax_offset": self.minmax_offset,
                "feature_range": self.feature_range, "clip": np.asarray(self.clip)}

    @staticmethod
    def from_arrays(arrays) -> "Preprocessing":
        """Inverse of ``to_arrays`` (accepts a dict or an ``np.load`` result)."""
        names = ("reduce", "center", "scale", "projection", "minmax_scale",
                 "minmax_offset", "feature_range", "clip")
        missing = [name for name in names if name not in arrays]
        if missing:
            raise InvalidInputError(f"preprocessing arrays lack {missing}; save them with "
                                    "Preprocessing.to_arrays()")
        as_float = {name: np.asarray(arrays[name], dtype=np.float64) for name in names[1:7]}
        prep = Preprocessing(reduce=str(np.asarray(arrays["reduce"])),
                             clip=bool(np.asarray(arrays["clip"])), **as_float)
        d = prep.projection.shape
        if (len(d) != 2 or prep.center.shape != (d[0],) or prep.scale.shape != (d[0],)
                or prep.minmax_scale.shape != (d[1],) or prep.minmax_offset.shape != (d[1],)
                or prep.feature_range.shape != (2,)):
            raise InvalidInputError("preprocessing arrays have inconsistent shapes; the "
                                    "saved file is damaged, refit the preprocessing")
        return prep


class Split(NamedTuple):
    """A stratified train/test split with preprocessing fitted on the train part."""

    X_train: np.ndarray  # float64 [N_train, D], scaled
    X_test: np.ndarray  # float64 [N_test, D], scaled with the train fit
    y_train: np.ndarray  # [N_train] labels as given
    y_test: np.ndarray  # [N_test]
    preprocessing: Preprocessing
    train_indices: np.ndarray  # int64 [N_train] rows of the input
    test_indices: np.ndarray  # int64 [N_test]


# --------------------------------------------------------------------------- CSV

def _parse_number(text: str):
    """float for a number, None for a missing token; raises ValueError otherwise."""
    cell = text.strip()
    if cell.lower() in MISSING_TOKENS:
        return None
    return float(cell)


def _is_number(text: str) -> bool:
    try:
        return _parse_number(text) is not None
    except ValueError:
        return False


def _read_text(path) -> tuple:
    """File bytes and decoded text; one-line errors for missing, empty and binary files."""
    path = os.fspath(path)
    if not os.path.exists(path):
        raise InvalidInputError(f"data file {path!r} does not exist; check the path")
    if os.path.isdir(path):
        raise InvalidInputError(f"{path!r} is a folder, not a CSV file; pass the file itself")
    with open(path, "rb") as handle:
        raw = handle.read()
    if not raw.strip():
        raise InvalidInputError(f"data file {path!r} is empty; pass a CSV file with a header "
                                "row and one row per sample")
    if b"\x00" in raw[:65536]:
        raise InvalidInputError(f"data file {path!r} looks binary (compressed, a spreadsheet "
                                "or an array file); export it as plain-text CSV")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as error:
        raise InvalidInputError(f"data file {path!r} is not UTF-8 text (byte {error.start}); "
                                "save it as a UTF-8 CSV file") from None
    if not text.strip():
        raise InvalidInputError(f"data file {path!r} is empty; pass a CSV file with a header "
                                "row and one row per sample")
    return raw, text


def _pick_delimiter(first_line: str) -> str:
    # the most frequent of , ; TAB in the header line; a comma when none occurs
    counts = [first_line.count(d) for d in _DELIMITERS]
    return _DELIMITERS[int(np.argmax(counts))] if max(counts) > 0 else ","


def _rows_to_labels(cells: list) -> np.ndarray:
    """Labels as ints when all are integral numbers, floats when numeric, else strings."""
    try:
        values = [float(cell) for cell in cells]
    except ValueError:
        return np.asarray(cells, dtype=str)
    if all(math.isfinite(v) and v == int(v) for v in values):
        return np.asarray([int(v) for v in values], dtype=np.int64)
    return np.asarray(values, dtype=np.float64)


def _shown(cells: list) -> str:
    """Cells joined for a one-line message (a cell with a line break is shown quoted)."""
    return ", ".join(c if c.isprintable() else repr(c) for c in cells)


def _rows_phrase(line_numbers: list) -> str:
    shown = ", ".join(str(n) for n in line_numbers[:5])
    more = f" and {len(line_numbers) - 5} more" if len(line_numbers) > 5 else ""
    return f"line{'s' if len(line_numbers) > 1 else ''} {shown}{more}"


def load_csv(path, target: str, *, drop_missing: bool = False) -> Dataset:
    """Load a classification dataset from a CSV file with a header row.

    Every column except ``target`` is a numeric feature. The delimiter is the most frequent
    of ``,`` ``;`` TAB in the header line. Cells in ``MISSING_TOKENS`` are missing values;
    ``inf`` counts as invalid too. With ``drop_missing`` such rows (in features or label)
    are removed and counted in ``n_dropped``; otherwise they are an error.

    Labels stay as written: integers when every label is an integral number, otherwise
    floats, otherwise strings (use ``encode_labels`` for 0..C-1 codes).

    Args:
      path: path of the CSV file.
      target: name of the label column.
      drop_missing: drop rows with missing or infinite values instead of failing.

    Returns:
      ``Dataset`` with X float64 [N, F] and y [N]; ``sha256`` is the digest of the file bytes.

    Raises:
      InvalidInputError: with a one-line message naming the problem and the fix.
    """
    raw, text = _read_text(path)
    name = os.fspath(path)
    lines = text.splitlines()
    first = next(line for line in lines if line.strip())
    reader = csv.reader(io.StringIO(text), delimiter=_pick_delimiter(first))
    header, rows, row_lines = None, [], []
    try:
        for cells in reader:
            if not cells or all(not c.strip() for c in cells):
                continue  # blank line
            if header is None:
                header = [c.strip() for c in cells]
                header_line = reader.line_num
                continue
            if len(cells) != len(header):
                raise InvalidInputError(
                    f"{name}: line {reader.line_num} has {len(cells)} cells but the header "
                    f"has {len(header)}; fix that row (quote cells that contain the "
                    "delimiter)")
            rows.append(cells)
            row_lines.append(reader.line_num)
    except csv.Error as error:
        raise InvalidInputError(f"{name}: line {reader.line_num} is not valid CSV ({error}); "
                                "fix the quoting in that row") from None
    if header is None:
        raise InvalidInputError(f"{name}: no header row found (only empty cells); add a "
                                "header row with column names")
    if all(_is_number(cell) for cell in header):
        raise InvalidInputError(f"{name}: the first row ({_shown(header[:4])}...) looks "
                                "like data, not column names; add a header row")
    if any(not cell for cell in header):
        position = header.index("") + 1
        raise InvalidInputError(f"{name}: header column {position} has no name; give every "
                                "column a name")
    duplicates = sorted({c for c in header if header.count(c) > 1})
    if duplicates:
        raise InvalidInputError(f"{name}: duplicate column name(s) {duplicates}; rename them "
                                "so each column name is unique")
    if target not in header:
        close = difflib.get_close_matches(str(target), header, n=1, cutoff=0.5)
        hint = f"did you mean {close[0]!r}? " if close else ""
        raise InvalidInputError(f"{name}: no column named {target!r}; {hint}available "
                                f"columns: {_shown(header)}")
    if len(header) < 2:
        raise InvalidInputError(f"{name}: only the label column {target!r} is present; the "
                                "file needs at least one feature column")
    if not rows:
        raise InvalidInputError(f"{name}: the header is present but there are no data rows; "
                                "add one row per sample")

    target_col = header.index(target)
    feature_cols = [j for j in range(len(header)) if j != target_col]
    X = np.empty((len(rows), len(feature_cols)), dtype=np.float64)
    bad_cells = []  # (row index, column name, kind)
    for i, cells in enumerate(rows):
        for k, j in enumerate(feature_cols):
            try:
                value = _parse_number(cells[j])
            except ValueError:
                raise InvalidInputError(
                    f"{name}: column {header[j]!r} is not numeric (line {row_lines[i]} has "
                    f"{cells[j].strip()!r}); convert it to numbers or remove the column"
                ) from None
            if value is None or not math.isfinite(value):
                bad_cells.append((i, header[j], "missing" if value is None else "infinite"))
                value = math.nan
            X[i, k] = value
    labels = [cells[target_col].strip() for cells in rows]
    bad_labels = [i for i, label in enumerate(labels) if label.lower() in MISSING_TOKENS]

    bad_rows = sorted({i for i, _, _ in bad_cells} | set(bad_labels))
    if bad_rows and not drop_missing:
        if bad_cells:
            columns = sorted({column for _, column, _ in bad_cells})
            kinds = " or ".join(sorted({kind for _, _, kind in bad_cells}))
            feature_rows = sorted({row_lines[i] for i, _, _ in bad_cells})
            raise InvalidInputError(
                f"{name}: {kinds} values in column(s) {columns} at "
                f"{_rows_phrase(feature_rows)}; fill them in or pass --drop-missing "
                "(drop_missing=True) to drop those rows")
        raise InvalidInputError(
            f"{name}: empty or NaN label in column {target!r} at "
            f"{_rows_phrase([row_lines[i] for i in bad_labels])}; fill them in or pass "
            "--drop-missing (drop_missing=True) to drop those rows")
    keep = np.setdiff1d(np.arange(len(rows)), bad_rows)
    if keep.size == 0:
        raise InvalidInputError(f"{name}: every row has a missing value, nothing is left "
                                "after dropping; fill in the missing values")
    X = X[keep]
    feature_names = [header[j] for j in feature_cols]
    check_feature_values(X, feature_names, [f"line {row_lines[i]}" for i in keep], name)
    y = _rows_to_labels([labels[i] for i in keep])
    classes = np.unique(y)
    if classes.size < 2:
        raise InvalidInputError(f"{name}: column {target!r} has only one class "
                                f"({str(classes[0])!r}); classification needs at least two "
                                "classes — check the target column")
    return Dataset(X=X, y=y, feature_names=tuple(header[j] for j in feature_cols),
                   target_name=target,
                   source=f"CSV file {os.path.basename(name)} (header on line {header_line}"
                          f", {len(keep)} rows used, {len(bad_rows)} dropped)",
                   sha256=hashlib.sha256(raw).hexdigest(), invented=False,
                   n_dropped=len(bad_rows))


def check_feature_values(X, feature_names, row_labels, name: str) -> None:
    """Refuse feature values no encoding can use: every column constant, or a value so far
    from its column (``OUTLIER_LIMIT`` robust spreads) that scaling would erase the rest.

    Robust spread: 1.4826 x the median absolute deviation (consistent with the standard
    deviation for normal data; Rousseeuw & Croux, JASA 88, 1993), or 1.2533 x the mean
    absolute deviation from the median where more than half the values are equal.
    """
    constant = [feature_names[k] for k in range(X.shape[1]) if np.all(X[:, k] == X[0, k])]
    if len(constant) == X.shape[1]:
        raise InvalidInputError(f"{name}: every feature column is constant ({_shown(constant)}), "
                                "so no kernel can tell the rows apart; add columns that vary")
    with np.errstate(over="ignore", invalid="ignore"):
        median = np.median(X, axis=0)
        deviation = np.abs(X - median)
        spread = 1.4826 * np.median(deviation, axis=0)
        spread = np.where(spread > 0, spread, 1.2533 * np.mean(deviation, axis=0))
        score = np.where(spread > 0, deviation / np.where(spread > 0, spread, 1.0), 0.0)
    extreme = ~(score <= OUTLIER_LIMIT)  # NaN (an overflow) counts as extreme
    if extreme.any():
        i, k = (int(v) for v in np.argwhere(extreme)[0])
        rows = sorted({int(r) for r in np.nonzero(extreme.any(axis=1))[0]})
        more = f" (and {len(rows) - 1} more row(s))" if len(rows) > 1 else ""
        raise InvalidInputError(
            f"{name}: value {X[i, k]:.6g} in column {feature_names[k]!r} at {row_labels[i]}"
            f"{more} lies more than {OUTLIER_LIMIT:.0e} robust spreads from the column's "
            "median, so scaling would squash every other row together; correct or remove "
            "that row, or transform the column (e.g. a logarithm)")


def check_new_rows(X_scaled_unclipped, feature_range, feature_names, name: str) -> None:
    """The same rule for rows to predict: refuse a value that the run's preprocessing puts
    more than ``OUTLIER_LIMIT`` training ranges outside the training range."""
    low, high = (float(v) for v in feature_range)
    with np.errstate(over="ignore", invalid="ignore"):
        score = np.abs((np.asarray(X_scaled_unclipped) - (low + high) / 2) / (high - low))
    extreme = ~(score <= OUTLIER_LIMIT)
    if extreme.any():
        i, k = (int(v) for v in np.argwhere(extreme)[0])
        column = feature_names[k] if len(feature_names) == score.shape[1] else f"#{k + 1}"
        raise InvalidInputError(
            f"{name}: data row {i + 1} lies more than {OUTLIER_LIMIT:.0e} training ranges "
            f"outside the run's training data (feature {column}); correct or remove that row")


# --------------------------------------------------------------------------- bundled + demo

def arrays_sha256(X, y) -> str:
    """Digest of a dataset given as arrays: float64 C-order feature bytes, then the labels
    as newline-joined text (so the value does not depend on the label dtype's width)."""
    digest = hashlib.sha256()
    digest.update(np.ascontiguousarray(np.asarray(X, dtype=np.float64)).tobytes())
    digest.update("\n".join(str(v) for v in np.asarray(y).tolist()).encode("utf-8"))
    return digest.hexdigest()


def load_bundled(name: str, *, seed: int = 0, n_samples: int = 200,
                 noise: float = 0.1) -> Dataset:
    """A dataset shipped with scikit-learn, or one of its 2-D generators (no network).

    Names: "iris", "wine", "breast_cancer", "digits" (``sklearn.datasets.load_*``), and
    "moons", "circles" (``make_moons`` / ``make_circles`` with ``n_samples``, ``noise`` and
    ``random_state=seed``; ``factor=0.5`` for circles). ``seed``, ``n_samples`` and
    ``noise`` only matter for the generators. ``sha256`` is ``arrays_sha256(X, y)``.
    """
    from sklearn import datasets

    loaders = {"iris": datasets.load_iris, "wine": datasets.load_wine,
               "breast_cancer": datasets.load_breast_cancer, "digits": datasets.load_digits}
    if name in loaders:
        bunch = loaders[name]()
        X = np.asarray(bunch.data, dtype=np.float64)
        y = np.asarray(bunch.target, dtype=np.int64)
        features = tuple(str(f) for f in getattr(bunch, "feature_names",
                                                 [f"pixel_{i}" for i in range(X.shape[1])]))
        source = f"scikit-learn bundled dataset sklearn.datasets.load_{name}()"
    elif name in ("moons", "circles"):
        if not (isinstance(n_samples, int) and n_samples >= 4):
            raise InvalidInputError(f"n_samples must be an integer >= 4, got {n_samples!r}")
        if not (noise >= 0 and math.isfinite(noise)):
            raise InvalidInputError(f"noise must be a finite number >= 0, got {noise!r}")
        if name == "moons":
            X, y = datasets.make_moons(n_samples=n_samples, noise=noise, random_state=seed)
            call = f"make_moons(n_samples={n_samples}, noise={noise}, random_state={seed})"
        else:
            X, y = datasets.make_circles(n_samples=n_samples, noise=noise, factor=0.5,
                                         random_state=seed)
            call = (f"make_circles(n_samples={n_samples}, noise={noise}, factor=0.5, "
                    f"random_state={seed})")
        X, y = np.asarray(X, np.float64), np.asarray(y, np.int64)
        features = ("x0", "x1")
        source = f"scikit-learn generator sklearn.datasets.{call}"
    else:
        close = difflib.get_close_matches(str(name), BUNDLED_NAMES, n=1)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        raise InvalidInputError(f"unknown bundled dataset {name!r}{hint}; choose one of "
                                f"{', '.join(BUNDLED_NAMES)} or load a CSV file")
    return Dataset(X=X, y=y, feature_names=features, target_name="target", source=source,
                   sha256=arrays_sha256(X, y), invented=False)


DEMO_FEATURES = ("peak_moisture_hour", "leaf_temperature_c", "wind_exposure",
                 "logger_battery_v")


def invented_demo(n_samples: int = 240, seed: int = 0) -> Dataset:
    """INVENTED demo data, generated by our own code; no real measurements behind it.

    The made-up scenario: sensor masts in a fictional vineyard log, per plot and night,
    the hour of the soil-moisture peak (0-24 h), the leaf temperature (8-30 C), a wind
    exposure index (0-1) and the logger's battery voltage (3.3-4.2 V, pure nuisance). The
    label says whether a (fictional) mildew outbreak followed: "outbreak" or "healthy".

    The invented rule, in unit-scaled variables u = hour/24, t = (temp - 8)/22, w = wind:
    ``score = cos(2 pi u) * (2 t - 1) + 0.35 * cos(3 pi t) * (1 - w) - 0.3 * (w - 0.5)``,
    outbreak when ``score > 0`` — an XOR-like pattern (night peak and warm leaves, or day
    peak and cool leaves) with a wavy edge along temperature, where the bandwidth of a
    kernel matters and the battery feature should be ignored. 4 % of the labels are
    flipped at random to mimic mislabelled plots. Four features, so four qubits in an angle
    encoding; 240 samples train in seconds.

    Args:
      n_samples: number of rows (at least 20).
      seed: seed of the numpy generator; the same seed gives the same data.

    Returns:
      ``Dataset`` with ``invented=True``, X float64 [n_samples, 4], y strings [n_samples].
    """
    if not (isinstance(n_samples, (int, np.integer)) and not isinstance(n_samples, bool)
            and n_samples >= 20):
        raise InvalidInputError(f"n_samples must be an integer >= 20, got {n_samples!r}")
    rng = np.random.default_rng(seed)
    u = rng.uniform(0.0, 1.0, n_samples)
    t = rng.uniform(0.0, 1.0, n_samples)
    w = rng.beta(2.0, 2.0, n_samples)
    battery = rng.uniform(3.3, 4.2, n_samples)
    score = (np.cos(2 * np.pi * u) * (2 * t - 1) + 0.35 * np.cos(3 * np.pi * t) * (1 - w)
             - 0.3 * (w - 0.5))
    outbreak = score > 0
    flip = rng.uniform(size=n_samples) < 0.04
    outbreak = outbreak ^ flip
    X = np.column_stack([24.0 * u, 8.0 + 22.0 * t, w, battery])
    y = np.where(outbreak, "outbreak", "healthy")
    return Dataset(X=X, y=y, feature_names=DEMO_FEATURES, target_name="mildew",
                   source=f"INVENTED demo data (fictional vineyard sensor masts; "
                          f"hilbertune.data.invented_demo(n_samples={n_samples}, "
                          f"seed={seed})); not real measurements",
                   sha256=arrays_sha256(X, y), invented=True)


# --------------------------------------------------------------------------- labels

def encode_labels(y) -> tuple:
    """Labels -> (codes int64 [N] in 0..C-1, classes [C] sorted as by ``np.unique``)."""
    y = np.asarray(y)
    if y.ndim != 1:
        raise InvalidInputError(f"labels must be 1-D, got shape {y.shape}; pass one label "
                                "per sample")
    classes, codes = np.unique(y, return_inverse=True)
    return codes.astype(np.int64).reshape(-1), classes


def decode_labels(codes, classes) -> np.ndarray:
    """Inverse of ``encode_labels``: codes int [N] -> original labels [N]."""
    codes = np.asarray(codes)
    classes = np.asarray(classes)
    if codes.size and (codes.min() < 0 or codes.max() >= classes.size):
        raise InvalidInputError(f"label codes must lie in 0..{classes.size - 1}; the codes "
                                "do not belong to these classes")
    return classes[codes]


# --------------------------------------------------------------------------- split + scale

def _check_matrix(X, name: str) -> np.ndarray:
    try:
        X = np.asarray(X, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidInputError(f"{name} must be numeric; convert or drop non-numeric "
                                "columns") from None
    if X.ndim != 2:
        raise InvalidInputError(f"{name} must be 2-D [samples, features], got shape "
                                f"{X.shape}; reshape with X.reshape(-1, 1) for one feature")
    if X.shape[0] == 0 or X.shape[1] == 0:
        raise InvalidInputError(f"{name} is empty (shape {X.shape}); pass at least one row "
                                "and one feature")
    bad = ~np.isfinite(X)
    if bad.any():
        rows = np.unique(np.nonzero(bad)[0])[:5].tolist()
        raise InvalidInputError(f"{name} contains NaN or infinite values (rows {rows}); "
                                "drop or impute them first")
    return X


def fit_preprocessing(X_train, *, n_components: int | None = None, reduce: str = "pca",
                      feature_range=ANGLE_RANGE, clip: bool = True,
                      seed: int = 0) -> Preprocessing:
    """Fit the preprocessing on training rows only.

    Steps: when there are more features than ``n_components`` and ``reduce == "pca"``:
    standardize (``StandardScaler``), then ``PCA(n_components, svd_solver="full")`` —
    standardizing first so features in large units do not dominate the axes; with
    ``reduce == "first"``: keep the first ``n_components`` columns. Then
    ``MinMaxScaler(feature_range)`` so each output column spans ``feature_range`` on the
    training rows (common practice for rotation-angle encodings).

    Test rows outside the training range are clipped to ``feature_range`` when ``clip``
    (the default): rotation encodings are periodic, so an unclipped value past one end
    would encode like a point near the other end.

    Args:
      X_train: float array [N_train, F].
      n_components: output features D (None: keep all F). When F <= n_components all F
        columns are kept (D = F); no padding.

    Returns:
      ``Preprocessing`` (plain arrays).
    """
    from sklearn.decomposition import PCA
    from sklearn.preprocessing import MinMaxScaler, StandardScaler

    X_train = _check_matrix(X_train, "X_train")
    n, f = X_train.shape
    if reduce not in ("pca", "first"):
        raise InvalidInputError(f"reduce must be 'pca' or 'first', got {reduce!r}")
    if n_components is not None and (not isinstance(n_components, (int, np.integer))
                                     or isinstance(n_components, bool) or n_components < 1):
        raise InvalidInputError(f"n_components must be a positive integer or None, got "
                                f"{n_components!r}")
    low, high = (float(v) for v in feature_range)
    if not (math.isfinite(low) and math.isfinite(high) and low < high):
        raise InvalidInputError(f"feature_range must be two finite numbers low < high, got "
                                f"{feature_range!r}")
    d = f if n_components is None else min(int(n_components), f)
    center, scale, projection = np.zeros(f), np.ones(f), np.eye(f)[:, :d]
    kind = "none" if d == f else reduce
    if kind == "pca":
        if d > n:
            raise InvalidInputError(f"PCA to {d} components needs at least {d} training rows, "
                                    f"got {n}; lower n_components or use more data")
        standard = StandardScaler().fit(X_train)
        pca = PCA(n_components=d, svd_solver="full", random_state=seed)
        pca.fit(standard.transform(X_train))
        scale = np.asarray(standard.scale_, dtype=np.float64)
        # (x - mu)/s - m  ==  (x - (mu + s m))/s : fold the PCA mean into the centering
        center = np.asarray(standard.mean_, dtype=np.float64) + scale * pca.mean_
        projection = np.asarray(pca.components_, dtype=np.float64).T
    reduced = ((X_train - center) / scale) @ projection
    minmax = MinMaxScaler(feature_range=(low, high)).fit(reduced)
    return Preprocessing(reduce=kind, center=center, scale=scale, projection=projection,
                         minmax_scale=np.asarray(minmax.scale_, dtype=np.float64),
                         minmax_offset=np.asarray(minmax.min_, dtype=np.float64),
                         feature_range=np.asarray([low, high], dtype=np.float64),
                         clip=bool(clip))


def split_and_scale(X, y, *, test_fraction: float = 0.25, seed: int = 0,
                    n_components: int | None = None, reduce: str = "pca",
                    feature_range=ANGLE_RANGE, clip: bool = True) -> Split:
    """Stratified train/test split from ``seed``, then preprocessing fitted on TRAIN only.

    The split is ``sklearn.model_selection.train_test_split(..., stratify=y,
    random_state=seed)``; see ``fit_preprocessing`` for the scaling, reduction and
    clipping rules. Labels are returned as given.

    Args:
      X: float array [N, F]; y: labels [N] (any dtype).
      test_fraction: share of rows in the test part, 0 < test_fraction < 1.

    Returns:
      ``Split`` with scaled X_train [N_train, D], X_test [N_test, D], labels, the fitted
      ``Preprocessing`` and the row indices of both parts.
    """
    from sklearn.model_selection import train_test_split

    X = _check_matrix(X, "X")
    y = np.asarray(y)
    if y.ndim != 1 or y.shape[0] != X.shape[0]:
        raise InvalidInputError(f"y must be 1-D with one label per row of X ({X.shape[0]}), "
                                f"got shape {y.shape}")
    if not (isinstance(test_fraction, (int, float)) and 0 < test_fraction < 1):
        raise InvalidInputError(f"test_fraction must lie strictly between 0 and 1, got "
                                f"{test_fraction!r}")
    classes, counts = np.unique(y, return_counts=True)
    if classes.size < 2:
        raise InvalidInputError("y has only one class; classification needs at least two")
    if counts.min() < 2:
        rare = classes[counts < 2][:3].tolist()
        raise InvalidInputError(f"class(es) {rare} have a single sample; a stratified split "
                                "needs at least 2 per class — add samples or drop that class")
    n_test = math.ceil(test_fraction * X.shape[0])
    if n_test < classes.size or X.shape[0] - n_test < classes.size:
        raise InvalidInputError(
            f"a test fraction of {test_fraction} gives {n_test} test and "
            f"{X.shape[0] - n_test} train rows for {classes.size} classes; each part needs "
            "at least one row per class — change test_fraction or add data")
    train_idx, test_idx = train_test_split(np.arange(X.shape[0]), test_size=test_fraction,
                                           random_state=seed, stratify=y)
    prep = fit_preprocessing(X[train_idx], n_components=n_components, reduce=reduce,
                             feature_range=feature_range, clip=clip, seed=seed)
    return Split(X_train=prep.transform(X[train_idx]), X_test=prep.transform(X[test_idx]),
                 y_train=y[train_idx], y_test=y[test_idx], preprocessing=prep,
                 train_indices=np.asarray(train_idx, np.int64),
                 test_indices=np.asarray(test_idx, np.int64))


def load_features(path, feature_names) -> np.ndarray:
    """Feature columns ``feature_names`` (in that order) of a CSV, for prediction.

    Other columns (a label column, identifiers) are ignored; every named column must be
    present and numeric, without missing values.

    Returns:
      float64 array of shape [N, len(feature_names)].
    """
    _, text = _read_text(path)
    name = os.fspath(path)
    first = next(line for line in text.splitlines() if line.strip())
    try:
        rows = [r for r in csv.reader(io.StringIO(text), delimiter=_pick_delimiter(first))
                if r and any(c.strip() for c in r)]
    except csv.Error as error:
        raise InvalidInputError(f"{name}: not valid CSV ({error}); fix the quoting") from None
    if not rows:
        raise InvalidInputError(f"{name}: no header row found (only empty cells); add a "
                                f"header row with the run's columns: {', '.join(feature_names)}")
    header = [c.strip() for c in rows[0]]
    doubled = sorted({f for f in feature_names if header.count(f) > 1})
    if doubled:
        raise InvalidInputError(f"{name}: duplicate column name(s) {doubled}; rename them so "
                                "each column name is unique")
    missing = [f for f in feature_names if f not in header]
    if missing:
        raise InvalidInputError(f"{name}: missing feature column(s) {missing}; the file needs "
                                f"the run's columns: {', '.join(feature_names)}")
    if len(rows) < 2:
        raise InvalidInputError(f"{name}: no data rows after the header; add rows to predict")
    columns = [header.index(f) for f in feature_names]
    X = np.empty((len(rows) - 1, len(columns)))
    for i, cells in enumerate(rows[1:]):
        if len(cells) != len(header):
            raise InvalidInputError(f"{name}: data row {i + 1} has {len(cells)} cells but the "
                                    f"header has {len(header)}; fix that row")
        for k, j in enumerate(columns):
            try:
                value = _parse_number(cells[j])
            except ValueError:
                raise InvalidInputError(f"{name}: column {header[j]!r} is not numeric (data row "
                                        f"{i + 1} has {cells[j].strip()!r}); fix that value"
                                        ) from None
            if value is None or not math.isfinite(value):
                raise InvalidInputError(f"{name}: missing or infinite value in column "
                                        f"{header[j]!r}, data row {i + 1}; fill it in or drop "
                                        "the row")
            X[i, k] = value
    return X
