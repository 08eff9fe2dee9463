"""Ingestion and validation of the detections, scans and objects tables (CSV or Parquet).

This is the edge of the program: raw tables in, trusted arrays out. Every user-facing
message about a table is written here, as one line naming the file, the first offending
rows (1-based data rows, the header not counted), the column and what to do. Code behind
this module assumes valid data.
"""

from __future__ import annotations

import dataclasses
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


def _coords(table, name, path, role, what: str = "detections") -> np.ndarray:
    raw = _column(table, name, path, what, role, numeric=True)
    try:
        values = np.asarray(raw, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError(f"{path}: column '{name}' ({role}) must be numeric") from None
    bad = ~np.isfinite(values)
    if bad.any():
        raise InputError(
            f"{path}: column '{name}' has NaN, empty or infinite values at {_rows(bad)}; remove those "
            f"{what} or fix their {'coordinates' if role in _POSITION_ROLES else 'values'}"
        )
    return values


_POSITION_ROLES = ("x", "y", "range", "bearing")


def _key(v) -> str:
    """A scan or object id as the user wrote it (7, 'a'), not numpy's repr."""
    return repr(v.item() if isinstance(v, np.generic) else v)


def _map_scans(keys: np.ndarray, scan_ids: np.ndarray, path: Path, data, what: str) -> np.ndarray:
    """Index into ``scan_ids`` of each row's scan id; one-line error for ids not in the list."""
    if not keys.size:
        return np.zeros(0, np.int64)
    if scan_ids.dtype.kind != keys.dtype.kind:
        scan_ids_cmp, keys_cmp = scan_ids.astype(str), keys.astype(str)
    else:
        scan_ids_cmp, keys_cmp = scan_ids, keys
    order = np.argsort(scan_ids_cmp, kind="stable")
    pos = np.searchsorted(scan_ids_cmp, keys_cmp, sorter=order)
    pos = np.clip(pos, 0, scan_ids.size - 1)
    found = scan_ids_cmp[order[pos]] == keys_cmp
    if not found.all():
        where = (f"the scans table {data.scans}" if data.scans is not None
                 else f"0..{data.n_scans - 1} (data.n_scans = {data.n_scans})")
        raise InputError(
            f"{path}: {what} whose scan id is not in {where}, e.g. "
            f"{_key(keys[~found][0])} at {_rows(~found)}; add those scans to the scan list or "
            f"remove the {what}"
        )
    return order[pos].astype(np.int64)


def _scan_keys(values: np.ndarray, path: Path, name: str, what: str = "scan ids") -> np.ndarray:
    """Scan (or object) ids as int64 when they are whole numbers, else as strings."""
    if values.dtype.kind in "iu":
        return values.astype(np.int64)
    if values.dtype.kind == "f":
        bad = ~np.isfinite(values) | (values != np.round(values))
        if bad.any():
            raise InputError(f"{path}: {what} in column '{name}' must be whole numbers or "
                             f"text; see {_rows(bad)}")
        return values.astype(np.int64)
    if values.dtype.kind == "b":
        raise InputError(f"{path}: {what} in column '{name}' must be whole numbers or text, not true/false")
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
    n_gated: int = 0  # dropped: inside a gate around a known object of their scan (issue 7)

    def drop_gated(self, inside: np.ndarray) -> "Recording":
        """The recording without the detections flagged ``inside`` a gate of their scan
        ((n,) bool over the kept detections), counted in ``n_gated``."""
        inside = np.asarray(inside, bool)
        keep = ~inside
        return dataclasses.replace(self, scan_index=self.scan_index[keep], c0=self.c0[keep],
                                   c1=self.c1[keep], n_gated=self.n_gated + int(inside.sum()))

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
                             f"(e.g. {_key(dup_vals[0])}) at {_rows(dup)}; each scan must appear once")
        for name in st.column_names:
            if name != cols["scan"]:
                meta[name] = st.column(name).to_numpy(zero_copy_only=False)
        scan_ids = ids
    else:
        scan_ids = np.arange(data.n_scans, dtype=np.int64)

    # Map detection scan ids onto the scan list.
    scan_index = _map_scans(det_keys, scan_ids, det_path, data, "detections")

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


# ----------------------------------------------------------------------------- known objects
@dataclass
class Objects:
    """Trusted known objects of one recording (issue 7): one row per (scan, object), in the
    order of the objects table's rows (index i is data row i + 1 of ``path``).

    Positions are in the recording's measurement frame: x, y [m] (cartesian) or range [m],
    bearing [deg, clockwise from north] (polar); they may lie outside the region (gates are
    cut at the region's edge). Each object has a gate around its position in Cartesian metres:
    a disc of ``radius`` [m], or, when ``p_gate`` is set, the ellipse {d : dᵀ P⁻¹ d ≤ γ(P_G)}
    of its Cartesian position covariance ``cov`` [m²] (x east, y north; for polar frames too).
    """

    frame: str
    path: Path
    n_scans: int  # scans of the recording
    scan_index: np.ndarray  # (m,) int64: index into Recording.scan_ids of each object's scan
    object_id: np.ndarray  # (m,) int64 or str: object ids as in the table
    c0: np.ndarray  # (m,) x [m] or range [m]
    c1: np.ndarray  # (m,) y [m] or bearing [deg]
    radius: np.ndarray | None = None  # (m,) disc gate radii [m] (None for ellipse gates)
    cov: np.ndarray | None = None  # (m, 2, 2) Cartesian position covariances [m²]
    p_gate: float | None = None  # gate probability P_G of the ellipse gates
    sha256: str = ""

    @property
    def n_objects(self) -> int:
        """Number of (scan, object) rows."""
        return int(self.scan_index.size)

    def gates(self):
        """The per-scan gates (:class:`sceneprior.gates.Gates`); ``source_index`` maps each
        gate back to its row here."""
        from .gates import disc_gates, ellipse_gates

        if self.cov is not None:
            return ellipse_gates(self.scan_index, self.c0, self.c1, self.cov, self.p_gate,
                                 n_scans=self.n_scans, frame=self.frame)
        return disc_gates(self.scan_index, self.c0, self.c1, self.radius, n_scans=self.n_scans,
                          frame=self.frame)


def read_objects(data, region, recording: Recording) -> Objects | None:
    """Read and validate the objects table named by ``data.objects`` (None when unset).

    Contract: ``data`` is a :class:`~sceneprior.spec.DataSpec`; ``region`` (a
    :class:`~sceneprior.geometry.Region`) gives the frame; ``recording`` (from
    :func:`read_recording`) gives the scan list the objects' scans are mapped onto. Columns
    (names from ``data.columns``): ``scan``, ``object`` (id, whole numbers or text), the
    position columns of the frame (``x``, ``y`` in m, or ``range`` in m and ``bearing`` in
    degrees) and the gate size: a ``gate_radius`` column [m] (empty cells take
    ``data.gate_radius``), or ``data.gate_radius`` alone, or, with ``data.gate_probability``,
    the Cartesian covariance columns ``cov_xx``, ``cov_xy``, ``cov_yy`` [m²]. Refused with
    one line (file, rows, column, what to do; InputError, exit 2): missing columns,
    non-finite positions or sizes, a negative range, objects whose scan is not in the scan
    list, gates with non-positive size (radius ≤ 0, covariance not positive definite), an
    object id twice in one scan. Positions outside the region are allowed. The file's
    SHA-256 is added to ``recording.inputs``.
    """
    if getattr(data, "objects", None) is None:
        return None
    cols = data.columns
    path = Path(data.objects)
    table = read_table(path, "objects")
    sha = sha256_file(path)
    recording.inputs[str(path)] = sha
    what = "objects"
    role0, role1 = ("x", "y") if region.frame == "cartesian" else ("range", "bearing")
    raw_scan = np.asarray(_column(table, cols["scan"], path, what, "scan"))
    raw_id = np.asarray(_column(table, cols["object"], path, what, "object"))
    c0 = _coords(table, cols[role0], path, role0, what)
    c1 = _coords(table, cols[role1], path, role1, what)
    m = c0.size
    keys = _scan_keys(raw_scan, path, cols["scan"]) if m else np.zeros(0, np.int64)
    ids = _scan_keys(raw_id, path, cols["object"], "object ids") if m else np.zeros(0, np.int64)
    if region.frame == "polar" and (bad := c0 < 0).any():
        raise InputError(f"{path}: column '{cols['range']}' has negative ranges at {_rows(bad)}; "
                         "ranges are distances from the sensor in metres (≥ 0)")
    scan_index = _map_scans(keys, recording.scan_ids, path, data, what)
    _refuse_repeated_ids(scan_index, ids, keys, path, cols["object"])
    radius = cov = None
    if data.gate_probability is not None:
        cov = _covariances(table, cols, path)
    else:
        radius = _radii(table, cols["gate_radius"], path, data.gate_radius, m)
    return Objects(frame=region.frame, path=path, n_scans=recording.n_scans, scan_index=scan_index,
                   object_id=ids, c0=c0, c1=c1, radius=radius, cov=cov, p_gate=data.gate_probability,
                   sha256=sha)


def _refuse_repeated_ids(scan_index, ids, keys, path, id_col) -> None:
    if not ids.size:
        return
    order = np.lexsort((np.arange(ids.size), ids.astype(str), scan_index))
    same = (scan_index[order][1:] == scan_index[order][:-1]) & (ids[order][1:] == ids[order][:-1])
    if same.any():
        dup = np.zeros(ids.size, bool)
        dup[order[1:][same]] = True
        first = order[1:][same][0]
        raise InputError(f"{path}: object id {_key(ids[first])} appears more than once in scan {_key(keys[first])} "
                         f"(column '{id_col}'; repeats at {_rows(dup)}); give each object one position per "
                         "scan or give the repeats their own ids")


def _radii(table, name, path, default, m) -> np.ndarray:
    if name in table.column_names:
        r = _column(table, name, path, "objects", "gate_radius", numeric=True)
        try:
            r = np.asarray(r, dtype=np.float64)
        except (TypeError, ValueError):
            raise InputError(f"{path}: column '{name}' (gate_radius) must be numeric, in metres") from None
        empty = np.isnan(r)
        if empty.any():
            if default is None:
                raise InputError(f"{path}: column '{name}' has empty gate radii at {_rows(empty)}; fill them "
                                 "(m) or set data.gates.radius as the default")
            r = np.where(empty, default, r)
    elif default is not None:
        r = np.full(m, float(default))
    else:
        raise InputError(f"{path}: objects table has no column '{name}' (gate radius, m) and the spec sets no "
                         "gate size; set data.gates.radius (m), add the column (or name it in "
                         "data.columns.gate_radius), or set data.gates.probability with covariance columns")
    bad = ~(np.isfinite(r) & (r > 0))
    if bad.any():
        raise InputError(f"{path}: column '{name}' has non-positive or infinite gate radii at {_rows(bad)}; "
                         "a gate radius must be a positive number of metres")
    return r


def _covariances(table, cols, path) -> np.ndarray:
    vals = [_coords(table, cols[k], path, k, "objects") for k in ("cov_xx", "cov_xy", "cov_yy")]
    pxx, pxy, pyy = vals
    det = pxx * pyy - pxy * pxy
    scale = np.maximum(np.abs(pxx), np.abs(pyy))
    bad = ~((pxx > 0) & (pyy > 0) & (det > 1e-12 * scale * scale))
    if bad.any():
        raise InputError(f"{path}: columns '{cols['cov_xx']}', '{cols['cov_xy']}', '{cols['cov_yy']}' give a "
                         f"covariance that is not positive definite (zero or negative gate size) at "
                         f"{_rows(bad)}; variances must be > 0 m² and |cov_xy| < sqrt(cov_xx·cov_yy)")
    cov = np.empty((pxx.size, 2, 2))
    cov[:, 0, 0], cov[:, 1, 1] = pxx, pyy
    cov[:, 0, 1] = cov[:, 1, 0] = pxy
    return cov
