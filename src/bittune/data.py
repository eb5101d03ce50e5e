"""Data readers (svmlight/libsvm text, CSV, .npz) and partitioners over simulated workers.

Every problem found in a data file is reported as ``path:LINE: message`` (1-based
lines), every settings problem with its key path (``workers.count: ...``); all
problems of one file are raised together in one :class:`~bittune.errors.InputError`.
"""

from __future__ import annotations

import contextlib
import csv
import io
import lzma
import math
import operator
import re
import tokenize
import warnings
import zipfile
import zlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import scipy.sparse as sp

from bittune.errors import InputError

__all__ = ["Dataset", "load_data", "binary_labels", "check_learnable", "partition", "FORMATS", "SPLITS",
           "LABEL_KINDS"]

#: Format name -> file extensions inferred as that format.
FORMATS = {"svmlight": (".svm", ".svmlight", ".libsvm", ".txt"), "csv": (".csv",), "npz": (".npz",)}
#: Allowed values of ``workers.split``.
SPLITS = ("iid", "by_label", "dirichlet", "column")
_MAX_SHOWN = 20

# A decimal number, unambiguous so that backtracking stays linear; inf/nan are
# accepted here and rejected later with their own message.
_NUM = r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?|[+-]?(?i:inf(?:inity)?|nan)"
_NUM_S = re.compile(_NUM, re.ASCII)
_NUM_B = re.compile(_NUM.encode())
_WS = rb"[ \t\r\f\v]"  # the bytes.split() whitespace, without the line break
_LINE_B = re.compile(rb"%s*(%s)((?:%s+\d{1,18}:(?:%s))*)%s*" % (_WS, _NUM.encode(), _WS, _NUM.encode(), _WS))
_INT_S = re.compile(r"[+-]?\d{1,18}", re.ASCII)  # group ids that fit int64


@dataclass
class Dataset:
    """Features ``X`` (dense float64, or CSR float64 for sparse files), raw labels ``y``."""

    X: np.ndarray | sp.csr_matrix
    y: np.ndarray
    groups: np.ndarray | None
    source: str
    label_column: str | None = None  # CSV: the column the labels came from (named in label errors)
    group_column: str | None = None  # CSV: the column the group ids came from

    @property
    def label_source(self) -> str:
        """Where the labels come from, as errors name it: ``f.csv, column 'frost'`` or the file."""
        return self.source if self.label_column is None else f"{self.source}, column {self.label_column!r}"

    @property
    def n_samples(self) -> int:
        return int(self.X.shape[0])

    @property
    def n_features(self) -> int:
        return int(self.X.shape[1])

    @property
    def is_sparse(self) -> bool:
        return sp.issparse(self.X)


def _raise(problems: list[str]) -> None:
    if problems:
        shown = problems[:_MAX_SHOWN]
        if len(problems) > _MAX_SHOWN:
            shown.append(f"... and {len(problems) - _MAX_SHOWN} more")
        raise InputError(shown)


def _show(token: bytes | str) -> str:
    text = token.decode("utf-8", "replace") if isinstance(token, bytes) else token
    return repr(text if len(text) <= 40 else text[:37] + "...")


def load_data(
    path: str | Path,
    *,
    format: str | None = None,
    label_column: str | None = None,
    group_column: str | None = None,
    n_features: int | None = None,
) -> Dataset:
    """Read a data file; the format comes from the extension unless ``format`` is given.

    ``label_column`` and ``group_column`` apply to CSV only (setting them for another
    format is an error, not silently ignored); ``n_features`` fixes the width of an
    svmlight file and must match the width of the others.
    """
    src = str(path)
    names = ", ".join(FORMATS)
    if format is None:
        ext = Path(src).suffix.lower()
        format = next((f for f, exts in FORMATS.items() if ext in exts), None)
        if format is None:
            raise InputError(f"{src}: cannot infer the data format from the extension {ext!r}; "
                             f"allowed formats: {names} (set data.format)")
    elif format == "libsvm":
        format = "svmlight"
    if format not in FORMATS:
        raise InputError(f"data.format: must be one of {names}, got {format!r}")
    if format != "csv":
        for key, value in (("label_column", label_column), ("group_column", group_column)):
            if value is not None:
                raise InputError(f"data.{key}: only used for CSV data, but {src} is {format}")
    if n_features is not None and (isinstance(n_features, bool) or not isinstance(n_features, int)
                                   or n_features < 1):
        raise InputError(f"data.n_features: must be an integer >= 1, got {n_features!r}")
    p = Path(src)
    try:
        found = p.is_file()
    except (OSError, ValueError):  # a name too long for the file system, a NUL character
        found = False
    if not found:
        raise InputError(f"{src}: no such file")
    try:
        raw = p.read_bytes()
    except OSError as e:
        raise InputError(f"{src}: cannot read the file ({e.strerror})") from None
    if format == "svmlight":
        ds = _read_svmlight(raw, src, n_features)
    elif format == "csv":
        ds = _read_csv(raw, src, label_column, group_column)
    else:
        ds = _read_npz(p, src)
    if ds.n_samples == 0:
        raise InputError(f"{src}: no samples (the file holds no data rows)")
    if ds.n_features == 0:
        raise InputError(f"{src}: no features")
    if n_features is not None and format != "svmlight" and ds.n_features != n_features:
        raise InputError(f"data.n_features: {n_features} given but {src} has {ds.n_features} features")
    return ds


def _svm_line_problem(body: bytes) -> str:
    """The first problem of one svmlight line the fast pattern rejected."""
    toks = body.split()
    if not _NUM_B.fullmatch(toks[0]):
        if b":" in toks[0]:
            return f"missing label (the line starts with {_show(toks[0])})"
        return f"bad label {_show(toks[0])}"
    for t in toks[1:]:
        if t.startswith(b"qid:"):
            return "qid: tokens (ranking data) are not supported; remove them"
        idx, sep, val = t.partition(b":")
        if not sep:
            return f"expected index:value, got {_show(t)}"
        if not re.fullmatch(rb"[+-]?\d+", idx):
            return f"bad feature index {_show(idx)}"
        if len(idx.lstrip(b"+-")) > 18:  # before int(): Python refuses over 4300 digits
            return f"feature index {_show(idx)} is too large"
        if int(idx) < 1:
            return f"feature index must be >= 1 (indices are 1-based), got {int(idx)}"
        if idx.startswith(b"+"):
            return f"bad feature index {_show(idx)} (write indices without a sign)"
        if not _NUM_B.fullmatch(val):
            return f"bad value {_show(val)} for feature {int(idx)}"
    return "cannot parse the line"


#: Largest svmlight feature index accepted without data.n_features: every iterate, gradient and
#: compressed message is a dense vector of this length (our choice, no source).
MAX_FEATURES = 10 ** 8


def _read_svmlight(raw: bytes, src: str, n_features: int | None) -> Dataset:
    """svmlight/libsvm: ``label idx:val ...``, 1-based increasing indices, ``#`` comments.

    ``qid:`` tokens are rejected with a clear error (ranking data is not supported).
    """
    errs: dict[int, str] = {}
    line_no, labels, feats, counts = [], [], [], []
    for no, line in enumerate(raw.split(b"\n"), start=1):
        body = line.split(b"#", 1)[0]
        m = _LINE_B.fullmatch(body)
        if m is None:
            if body.strip():
                errs[no] = _svm_line_problem(body)
            continue
        line_no.append(no)
        labels.append(m.group(1))
        f = m.group(2)
        feats.append(f)
        counts.append(f.count(b":"))
    line_no = np.asarray(line_no, dtype=np.int64)
    y = np.array(list(map(float, labels)), dtype=np.float64)
    toks = b" ".join(feats).replace(b":", b" ").split()
    idx = np.array(list(map(int, toks[0::2])), dtype=np.int64)
    val = np.array(list(map(float, toks[1::2])), dtype=np.float64)
    counts = np.asarray(counts, dtype=np.int64)
    feat_line = np.repeat(line_no, counts)
    same = feat_line[1:] == feat_line[:-1]
    step = np.diff(idx)
    checks = [
        (idx < 1, lambda k: f"feature index must be >= 1 (indices are 1-based), got {idx[k]}"),
        (np.r_[False, same & (step == 0)], lambda k: f"duplicate feature index {idx[k]}"),
        (np.r_[False, same & (step < 0)],
         lambda k: f"feature indices must be strictly increasing, got {idx[k - 1]} then {idx[k]}"),
        (idx > n_features if n_features is not None else np.zeros(idx.shape, bool),
         lambda k: f"feature index {idx[k]} exceeds data.n_features = {n_features}"),
        (idx > MAX_FEATURES if n_features is None else np.zeros(idx.shape, bool),
         lambda k: f"feature index {idx[k]} is too large: at most {MAX_FEATURES:,} features (one dense "
                   f"float64 iterate of that size is {8 * MAX_FEATURES / 1e9:g} GB); a typo?"),
        (~np.isfinite(val), lambda k: f"NaN or infinite value for feature {idx[k]}"),
    ]
    for bad, msg in reversed(checks):  # reversed: per line, the first check at its first token wins
        for k in np.flatnonzero(bad)[::-1]:
            errs[int(feat_line[k])] = msg(k)
    for k in np.flatnonzero(~np.isfinite(y)):
        errs.setdefault(int(line_no[k]), "NaN or infinite label")
    _raise([f"{src}:{no}: {errs[no]}" for no in sorted(errs)])
    d = n_features if n_features is not None else int(idx.max(initial=0))
    indptr = np.concatenate([[0], np.cumsum(counts)])
    X = sp.csr_matrix((val, idx - 1, indptr), shape=(len(y), d), dtype=np.float64)
    return Dataset(X=X, y=y, groups=None, source=src)


def _read_csv(raw: bytes, src: str, label_column: str | None, group_column: str | None) -> Dataset:
    """CSV with a header row; every column but the label and group columns is a feature."""
    if label_column is None:
        raise InputError(f"data.label_column: required for CSV data ({src})")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as e:
        no = raw[: e.start].count(b"\n") + 1
        raise InputError(f"{src}:{no}: not UTF-8 text") from None
    reader = csv.reader(io.StringIO(text, newline=""))
    problems: list[str] = []
    rows, labels, groups = [], [], []
    try:
        header = [c.strip() for c in next((r for r in reader if r), [])]
        if not header:
            raise InputError(f"{src}: no header row (the file is empty)")
        dup = sorted({c for c in header if header.count(c) > 1})
        if dup:
            raise InputError(f"{src}:{reader.line_num}: duplicate column names {dup}")
        for key, col in (("label_column", label_column), ("group_column", group_column)):
            if col is not None and col not in header:
                raise InputError(f"data.{key}: {col!r} is not a column of {src} (columns: {', '.join(header)})")
        if group_column == label_column:
            raise InputError("data.group_column: must differ from data.label_column")
        li = header.index(label_column)
        gi = header.index(group_column) if group_column is not None else -1
        fi = [i for i in range(len(header)) if i not in (li, gi)]
        for row in reader:
            no, bad, values = reader.line_num, None, []
            if not row:
                continue
            if len(row) != len(header):
                problems.append(f"{src}:{no}: expected {len(header)} cells as in the header, got {len(row)}")
                continue
            for i in [li, *fi]:
                cell = row[i].strip()
                v = float(cell) if _NUM_S.fullmatch(cell) else None
                if v is None or not math.isfinite(v):
                    why = "not a number" if v is None else "NaN or infinite value"
                    bad = f"column {header[i]!r}: {why}: {_show(cell)}"
                    break
                values.append(v)
            if bad is None and gi >= 0 and not row[gi].strip():
                bad = f"column {header[gi]!r}: empty group value"
            if bad is not None:
                problems.append(f"{src}:{no}: {bad}")
                continue
            labels.append(values[0])
            rows.append(values[1:])
            if gi >= 0:
                groups.append(row[gi].strip())
    except csv.Error as e:
        raise InputError(f"{src}:{reader.line_num}: {e}") from None
    _raise(problems)
    X = np.array(rows, dtype=np.float64).reshape(len(rows), len(fi))
    g = None
    if gi >= 0:
        _same_ids(groups, f"data.group_column: {src}, column {group_column!r}")
        # Integer group ids sort as numbers (worker order of the column split).
        g = np.array([int(v) for v in groups], dtype=np.int64) if all(
            _INT_S.fullmatch(v) for v in groups) else np.array(groups, dtype=str)
    return Dataset(X=X, y=np.array(labels, dtype=np.float64), groups=g, source=src,
                   label_column=label_column, group_column=group_column)


def _same_ids(ids: list[str], where: str) -> None:
    """Group ids written two ways for one number ('1' and '01', '2' and '2.0') are an error:
    as text they would make two workers of what is one group, as numbers they would merge
    two groups the user may have meant apart."""
    if not ids or not all(_NUM_S.fullmatch(v) for v in ids):
        return
    spellings: dict[float, set[str]] = {}
    for v in set(ids):  # exact ints where possible: 17-digit ids must not merge through float rounding
        spellings.setdefault(int(v) if _INT_S.fullmatch(v) else float(v), set()).add(v)
    clash = sorted((sorted(t) for t in spellings.values() if len(t) > 1), key=lambda t: t[0])
    if clash:
        shown = "; ".join(" and ".join(repr(v) for v in t) for t in clash[:5])
        raise InputError(f"{where} writes one group id in several "
                         f"ways ({shown}); write each id the same way on every row")


#: What reading a damaged archive can raise: zipfile (RuntimeError for an
#: encrypted member, its subclass NotImplementedError for an unknown compression
#: method), its decompressors (zlib, lzma; bz2 raises OSError), numpy's array
#: header parser (ValueError, or tokenize's error on an old-style header), and
#: the allocation of a shape the header declares but the file cannot hold.
_NPZ_ERRORS = (OSError, ValueError, EOFError, zipfile.BadZipFile, zlib.error, lzma.LZMAError,
               RuntimeError, MemoryError, tokenize.TokenError)


@contextlib.contextmanager
def _quiet_array_header():
    """numpy reads a .npy header with ``ast.literal_eval``: a damaged header can make
    Python warn about its escape sequences (DeprecationWarning; SyntaxWarning from
    3.12) before numpy rejects it. The file is reported as unreadable anyway."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        warnings.simplefilter("ignore", SyntaxWarning)
        yield


def _read_npz(p: Path, src: str) -> Dataset:
    """``.npz`` with arrays ``X`` (2-D), ``y`` (1-D) and optional ``groups`` (1-D)."""
    try:
        # Our own handle: np.load leaves the file open when zipfile rejects it.
        with _quiet_array_header(), open(p, "rb") as fh:
            head = fh.read(6)
            fh.seek(0)
            # numpy.savez writes a zip archive (local header PK\3\4, or PK\5\6 when empty);
            # anything else would reach numpy's pickle branch and a misleading message.
            if not head.startswith((b"PK\x03\x04", b"PK\x05\x06", b"\x93NUMPY")):
                raise InputError(f"{src}: not a readable .npz archive (numpy.savez writes a zip file; "
                                 f"this one starts with {head!r})")
            z = np.load(fh, allow_pickle=False)
            if not isinstance(z, np.lib.npyio.NpzFile):
                raise InputError(f"{src}: expected an .npz archive with arrays X and y, got a single array")
            with z:
                arrays = {k: z[k] for k in ("X", "y", "groups") if k in z.files}
                found = ", ".join(z.files) or "none"
    except _NPZ_ERRORS as e:
        raise InputError(f"{src}: not a readable .npz archive ({e})") from None
    _raise([f"{src}: array {k!r} missing (found: {found})" for k in ("X", "y") if k not in arrays])
    X, y, g = arrays["X"], arrays["y"], arrays.get("groups")
    problems = []
    if X.ndim != 2 or X.dtype.kind not in "biuf":
        problems.append(f"{src}: array 'X' must be a 2-D numeric array, got {X.dtype} of shape {X.shape}")
    if y.ndim != 1 or y.dtype.kind not in "biuf":
        problems.append(f"{src}: array 'y' must be a 1-D numeric array, got {y.dtype} of shape {y.shape}")
    if g is not None and (g.ndim != 1 or g.dtype.kind not in "biuUS"):
        problems.append(f"{src}: array 'groups' must be 1-D integers or strings, got {g.dtype} of shape {g.shape}")
    _raise(problems)
    n = X.shape[0]
    if y.shape[0] != n or (g is not None and g.shape[0] != n):
        extra = "" if g is None else f", groups has {g.shape[0]}"
        raise InputError(f"{src}: X has {n} rows but y has {y.shape[0]}{extra}")
    X, y = X.astype(np.float64), y.astype(np.float64)
    for name, bad in (("X", ~np.isfinite(X).all(axis=1)), ("y", ~np.isfinite(y))):
        rows = np.flatnonzero(bad)
        if rows.size:
            more = f" (and {rows.size - 1} more rows)" if rows.size > 1 else ""
            problems.append(f"{src}: {name} row {rows[0]} (0-based) holds NaN or inf{more}")
    _raise(problems)
    if g is not None and g.dtype.kind in "US":  # text ids: '1' and '01' would be two workers
        _same_ids([str(v).strip() for v in g.tolist()], f"{src}, array 'groups'")
    return Dataset(X=X, y=y, groups=g, source=src)


def binary_labels(y: np.ndarray, *, source: str) -> np.ndarray:
    """Map labels {0, 1} or {-1, 1} (or one class of either) to float64 -1/+1, 0 -> -1.

    One class alone is mapped here (a worker's share may hold one class);
    :func:`check_learnable` refuses a whole data set of one class.
    """
    y = np.asarray(y, dtype=np.float64)
    values = np.unique(y)
    if not (set(values.tolist()) <= {0.0, 1.0} or set(values.tolist()) <= {-1.0, 1.0}):
        shown = ", ".join(f"{v:g}" for v in values[:5]) + (", ..." if values.size > 5 else "")
        hint = ("; non-integer values: a regression target? (use least_squares)"
                if np.any(values != np.round(values)) else "")
        raise InputError(f"{source}: labels are not binary (expected {{0, 1}} or {{-1, 1}}); "
                         f"found {values.size} distinct values: {shown}{hint}")
    return np.where(y == 1.0, 1.0, -1.0)


#: How a model reads the labels (``problems.label_kind``): two classes, integer classes, any real.
LABEL_KINDS = ("binary", "classes", "real")


def check_learnable(dataset: Dataset, *, labels: str) -> None:
    """Refuse data nothing can be learnt from, before it is split (InputError naming the cause).

    * every feature constant over all rows (all zero included): the rows cannot be told
      apart, so the model only fits the label mean (a wrong file or wrong columns);
    * ``labels="binary"`` (logistic models): labels {0, 1} or {-1, 1} and both present;
    * ``labels="classes"`` (softmax): integer labels, at least 2 classes, and not one
      class per row (that is an id or a measurement column, not a class column).
    A worker holding one class only is allowed (``by_label`` splits make such workers
    on purpose); an empty worker is refused by :func:`partition`.
    """
    if labels not in LABEL_KINDS:
        raise ValueError(f"labels must be one of {LABEL_KINDS}, got {labels!r}")
    X, n, d, src = dataset.X, dataset.n_samples, dataset.n_features, dataset.source
    # Every column constant <=> every row equals the first. For CSR this is O(nnz), never a
    # dense (n, d) or (d,) array: a typo'd index may make d far too large for memory.
    if dataset.is_sparse:
        A = X.copy()
        A.sum_duplicates()
        A.eliminate_zeros()  # canonical: sorted indices, no explicit zeros
        k = np.diff(A.indptr)
        same = bool(np.all(k == k[0]))
        if same and k[0]:
            same = bool(np.all(A.indices.reshape(n, k[0]) == A.indices[: k[0]])
                        and np.all(A.data.reshape(n, k[0]) == A.data[: k[0]]))
        first = A.data[0] if k[0] and A.indices[0] == 0 else 0.0  # feature 1 on row 1
        zero = k[0] == 0
    else:
        same = bool(np.all(X == X[0]))
        first, zero = X[0, 0], not np.any(X[0])
    if same:
        rows = "the only row" if n == 1 else f"all {n} rows"
        what = ("is zero on " + rows) if zero else (f"takes one value on {rows} (feature 1 = {first:g})")
        raise InputError(f"{src}: every one of the {d} features {what}; the rows cannot be told apart, so "
                         f"there is nothing to learn (wrong data file, or the wrong columns?)")
    if labels == "real":
        return
    y = dataset.y
    where = dataset.label_source
    if labels == "binary":
        values = np.unique(binary_labels(y, source=where))
        if values.size < 2:
            raise InputError(f"{where}: every label is {y[0]:g} ({n} rows): a classifier needs both classes "
                             f"(the wrong label column, or a sample of one class only?)")
        return
    from .problems.softmax import class_labels

    _, classes = class_labels(y, source=where)
    if classes.size == n and n > 2:
        raise InputError(f"{where}: every row has its own class ({n} classes for {n} rows): the labels look "
                         f"like ids or measurements, not classes (the wrong label column?)")


def partition(
    dataset: Dataset, *, n_workers: int, split: str, seed: int, dirichlet_alpha: float = 1.0
) -> list[np.ndarray]:
    """Split the rows over ``n_workers``: one sorted int64 index array per worker.

    ``iid`` seeded shuffle into near-equal shares; ``by_label`` stable sort by label
    cut into contiguous shares; ``dirichlet`` per-label Dirichlet(alpha) proportions;
    ``column`` one worker per distinct group value, ordered by value.
    """
    if split not in SPLITS:
        raise InputError(f"workers.split: must be one of {', '.join(SPLITS)}, got {split!r}")
    try:
        n_workers = operator.index(n_workers)
    except TypeError:
        raise InputError(f"workers.count: must be an integer, got {n_workers!r}") from None
    n = dataset.n_samples
    if n_workers < 1 or n_workers > n:
        raise InputError(f"workers.count: must be between 1 and the number of samples ({n}), got {n_workers}")
    y = dataset.y
    rng = np.random.default_rng(seed)
    if split == "iid":
        parts = np.array_split(rng.permutation(n), n_workers)
    elif split == "by_label":
        parts = np.array_split(np.argsort(y, kind="stable"), n_workers)
    elif split == "dirichlet":
        # Per-label Dirichlet proportions, the standard federated-learning
        # heterogeneity scheme (Hsu, Qi, Brown 2019, "Measuring the effects of
        # non-identical data distribution for federated visual classification";
        # from memory).
        if isinstance(dirichlet_alpha, bool) or not isinstance(dirichlet_alpha, (int, float)) \
                or not (0 < dirichlet_alpha < math.inf):
            raise InputError(f"workers.dirichlet_alpha: must be a number > 0, got {dirichlet_alpha!r}")
        pieces: list[list[np.ndarray]] = [[] for _ in range(n_workers)]
        for label in np.unique(y):
            rows = np.flatnonzero(y == label)
            rng.shuffle(rows)
            share = rng.dirichlet(np.full(n_workers, float(dirichlet_alpha)))
            if not (np.all(np.isfinite(share)) and share.sum() > 0.5):  # numpy gives 0s near the float limit
                raise InputError(f"workers.dirichlet_alpha: {dirichlet_alpha:g} is too large to sample "
                                 f"proportions from; use workers.split: iid for an even mix")
            cuts = np.round(np.cumsum(share)[:-1] * rows.size).astype(np.int64)
            for w, chunk in enumerate(np.split(rows, np.clip(cuts, 0, rows.size))):
                pieces[w].append(chunk)
        parts = [np.concatenate(p) for p in pieces]
    else:
        g = dataset.groups
        if g is None:
            raise InputError("workers.split: column needs group ids (set data.group_column, "
                             "or store an array 'groups' in the .npz file)")
        values, which = np.unique(g, return_inverse=True)
        col = f"column {dataset.group_column!r} of {dataset.source}" if dataset.group_column else \
            f"the groups of {dataset.source}"
        if values.size == 1 and n_workers > 1:
            raise InputError(f"workers.split: column: {col} holds one value ({values[0]}) on every row, so the "
                             f"split makes one worker, not {n_workers} (the wrong group column?)")
        if values.size != n_workers:
            hint = (f" (every row is its own group: is {col} an id or a measurement?)"
                    if values.size == n and n > 1 else "")
            raise InputError(f"workers.count: the column split makes one worker per group: "
                             f"{dataset.source} has {values.size} groups but workers.count is {n_workers}{hint}")
        parts = [np.flatnonzero(which == k) for k in range(n_workers)]
    parts = [np.sort(np.asarray(p, dtype=np.int64)) for p in parts]
    empty = sum(p.size == 0 for p in parts)
    if empty:
        hint = "lower workers.count"
        if split == "dirichlet":
            hint = "raise workers.dirichlet_alpha or " + hint
        raise InputError(f"workers.split: {split} left {empty} of {n_workers} workers with no samples; {hint}")
    return parts
