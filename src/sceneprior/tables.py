"""Ingestion and validation of the detections and scans tables (CSV or Parquet).

This is the edge of the program: raw tables in, trusted arrays out. Every user-facing
message about a table is written here, as one line naming the file, the first offending
rows (1-based data rows, the header not counted), the column and what to do. Code behind
this module assumes valid data.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from .errors import InputError

_SHOW = 5  # how many offending rows a message lists


def sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _rows(mask: np.ndarray) -> str:
    idx = np.flatnonzero(mask)
    shown = ", ".join(str(i + 1) for i in idx[:_SHOW])
    more = f" and {idx.size - _SHOW} more" if idx.size > _SHOW else ""
    return f"row{'s' if idx.size > 1 else ''} {shown}{more}"


def read_table(path: Path, what: str) -> pa.Table:
    """Read a CSV (.csv, .txt) or Parquet (.parquet, .pq) file into an Arrow table."""
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: {what} file not found")
    if path.stat().st_size == 0:
        raise InputError(f"{path}: {what} file is empty (expected a header row at least)")
    suffix = path.suffix.lower()
    try:
        if suffix in (".parquet", ".pq"):
            table = pq.read_table(path)
        elif suffix in (".csv", ".txt"):
            table = pacsv.read_csv(path)
        else:
            raise InputError(f"{path}: unknown table format '{suffix}'; use .csv or .parquet")
    except InputError:
        raise
    except (pa.ArrowInvalid, OSError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputError(f"{path}: cannot read {what} table: {first}") from None
    if table.num_columns == 0:
        raise InputError(f"{path}: {what} file has no columns")
    return table


def _column(table: pa.Table, name: str, path: Path, what: str, role: str,
            numeric: bool = False) -> np.ndarray:
    if name not in table.column_names:
        have = ", ".join(table.column_names)
        raise InputError(
            f"{path}: {what} table has no column '{name}' ({role}); columns found: {have}; "
            f"rename the column or set data.columns.{role} in the spec"
        )
    col = table.column(name)
    if pa.types.is_null(col.type):
        return np.full(len(col), np.nan)
    if col.null_count and numeric:  # empty/"nan" cells: reported with the non-finite ones
        try:
            return col.cast(pa.float64()).fill_null(float("nan")).to_numpy(zero_copy_only=False)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            raise InputError(f"{path}: column '{name}' ({role}) must be numeric") from None
    if col.null_count:
        nulls = np.asarray(col.is_null().to_numpy(zero_copy_only=False))
        raise InputError(f"{path}: column '{name}' has empty values at {_rows(nulls)}; fill or remove them")
    return col.to_numpy(zero_copy_only=False)


def _coords(table, name, path, role) -> np.ndarray:
    raw = _column(table, name, path, "detections", role, numeric=True)
    try:
        values = np.asarray(raw, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError(f"{path}: column '{name}' ({role}) must be numeric") from None
    bad = ~np.isfinite(values)
    if bad.any():
        raise InputError(
            f"{path}: column '{name}' has NaN, empty or infinite values at {_rows(bad)}; remove those "
            "detections or fix their coordinates"
        )
    return values


def _scan_keys(values: np.ndarray, path: Path, name: str) -> np.ndarray:
    """Scan ids as int64 when they are whole numbers, else as strings."""
    if values.dtype.kind in "iu":
        return values.astype(np.int64)
    if values.dtype.kind == "f":
        bad = ~np.isfinite(values) | (values != np.round(values))
        if bad.any():
            raise InputError(f"{path}: scan ids in column '{name}' must be whole numbers or "
                             f"text; see {_rows(bad)}")
        return values.astype(np.int64)
    if values.dtype.kind == "b":
        raise InputError(f"{path}: scan ids in column '{name}' must be whole numbers or text, not true/false")
    return values.astype(str)


@dataclass
class Recording:
    """Trusted detections of one recording, with its full list of scans."""

    frame: str
    scan_ids: np.ndarray  # (K,) every scan of the recording, empty ones included
    scan_index: np.ndarray  # (n,) int64, index into scan_ids of each kept detection
    c0: np.ndarray  # (n,) x [m] or range [m]
    c1: np.ndarray  # (n,) y [m] or bearing [deg]
    scans_meta: dict[str, np.ndarray] = field(default_factory=dict)
    n_read: int = 0  # detection rows read
    n_masked: int = 0  # dropped: inside a permanent mask (expected)
    n_outside: int = 0  # dropped: outside the region's bounds (only with outside = "drop")
    inputs: dict[str, str] = field(default_factory=dict)  # path -> sha256

    @property
    def n_scans(self) -> int:
        return int(self.scan_ids.size)

    @property
    def n_detections(self) -> int:
        return int(self.scan_index.size)


def read_recording(data, region) -> Recording:
    """Read and validate the tables named by a :class:`~sceneprior.spec.DataSpec`.

    ``region`` (a :class:`~sceneprior.geometry.Region`) decides which detections are
    outside the bounds (an error unless ``data.outside == "drop"``) and which fall in a
    permanent mask (dropped and counted).
    """
    cols = data.columns
    det_path = Path(data.detections)
    det = read_table(det_path, "detections")
    inputs = {str(det_path): sha256_file(det_path)}
    role0, role1 = ("x", "y") if region.frame == "cartesian" else ("range", "bearing")
    scan_col = _column(det, cols["scan"], det_path, "detections", "scan")
    c0 = _coords(det, cols[role0], det_path, role0)
    c1 = _coords(det, cols[role1], det_path, role1)
    det_keys = _scan_keys(np.asarray(scan_col), det_path, cols["scan"]) if len(scan_col) else np.zeros(0, np.int64)

    meta: dict[str, np.ndarray] = {}
    if data.scans is not None:
        scans_path = Path(data.scans)
        st = read_table(scans_path, "scans")
        inputs[str(scans_path)] = sha256_file(scans_path)
        if st.num_rows == 0:
            raise InputError(f"{scans_path}: scans table has no rows; it must list every scan of the recording")
        ids = _scan_keys(np.asarray(_column(st, cols["scan"], scans_path, "scans", "scan")), scans_path, cols["scan"])
        uniq, first, counts = np.unique(ids, return_index=True, return_counts=True)
        if (counts > 1).any():
            dup = np.zeros(ids.size, bool)
            dup_vals = uniq[counts > 1]
            dup[np.isin(ids, dup_vals)] = True
            dup[first[counts > 1]] = False
            raise InputError(f"{scans_path}: duplicate scan ids in column '{cols['scan']}' "
                             f"(e.g. {dup_vals[0]!r}) at {_rows(dup)}; each scan must appear once")
        for name in st.column_names:
            if name != cols["scan"]:
                meta[name] = st.column(name).to_numpy(zero_copy_only=False)
        scan_ids = ids
    else:
        scan_ids = np.arange(data.n_scans, dtype=np.int64)

    # Map detection scan ids onto the scan list.
    if det_keys.size:
        if scan_ids.dtype.kind != det_keys.dtype.kind:
            scan_ids_cmp, det_cmp = scan_ids.astype(str), det_keys.astype(str)
        else:
            scan_ids_cmp, det_cmp = scan_ids, det_keys
        order = np.argsort(scan_ids_cmp, kind="stable")
        pos = np.searchsorted(scan_ids_cmp, det_cmp, sorter=order)
        pos = np.clip(pos, 0, scan_ids.size - 1)
        found = scan_ids_cmp[order[pos]] == det_cmp
        if not found.all():
            where = (f"the scans table {data.scans}" if data.scans is not None
                     else f"0..{data.n_scans - 1} (data.n_scans = {data.n_scans})")
            raise InputError(
                f"{det_path}: detections whose scan id is not in {where}, e.g. "
                f"{det_keys[~found][0]!r} at {_rows(~found)}; add those scans to the scan list or "
                "remove the detections"
            )
        scan_index = order[pos].astype(np.int64)
    else:
        scan_index = np.zeros(0, np.int64)

    n_read = int(c0.size)
    inside = region.inside_bounds(c0, c1)
    n_outside = int((~inside).sum())
    if n_outside and data.outside == "error":
        raise InputError(
            f"{det_path}: {n_outside} detection(s) outside the region's bounds "
            f"({role0} {region.bounds0[0]:g}..{region.bounds0[1]:g} m, {role1} "
            f"{region.bounds1[0]:g}..{region.bounds1[1]:g} {'m' if role1 == 'y' else 'deg'}) at "
            f"{_rows(~inside)}; widen space bounds or set data.outside = \"drop\" to drop and count them"
        )
    masked = np.zeros(n_read, bool)
    if region.masks:
        masked[inside] = region.in_mask(c0[inside], c1[inside])
    keep = inside & ~masked
    return Recording(
        frame=region.frame,
        scan_ids=scan_ids,
        scan_index=scan_index[keep],
        c0=c0[keep],
        c1=c1[keep],
        scans_meta=meta,
        n_read=n_read,
        n_masked=int(masked.sum()),
        n_outside=n_outside,
        inputs=inputs,
    )
