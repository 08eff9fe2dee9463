"""``sceneprior births``: the track log's tables in, the birth model's input tables out.

The I/O around :mod:`sceneprior.tracklog` (which works on plain arrays): :func:`births_from_spec`
reads the recording named by a fit spec (its scans table and ``data.objects``, validated by
:mod:`sceneprior.tables`), derives the births (``tracklog.derive_births``) and writes them with
:func:`write_births` — ``births.{csv,parquet}``, ``steps.{csv,parquet}`` and ``births.json``,
the birth model's input contract (``models/lowmarsh-birth.toml``: ``data.columns.scan = "step"``).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .errors import InputError
from .tracklog import Births, births_summary, derive_births


def births_from_spec(spec_path, out_dir, *, time_column: str | None = None, fmt: str = "csv", log=print,
                     **options) -> tuple[Births, dict]:
    """What ``sceneprior births SPEC.toml`` calls: read the recording named by a fit spec
    (its scans table and ``data.objects``, validated by :mod:`sceneprior.tables`), derive
    the births (``options`` go to ``tracklog.derive_births``) and write them to ``out_dir``
    (:func:`write_births`). Returns (births, summary).

    ``time_column``: the scans-table column with scan times (seconds or ISO-8601); a named
    column that the table lacks is refused (one line). None: ``time`` when the table has
    it, else the scans are ordered by id."""
    import dataclasses

    from .fitting import region_from_spec
    from .models.scanterms import time_seconds
    from .spec import load_spec
    from .tables import read_objects, read_recording

    spec = load_spec(spec_path)
    data = spec.data
    if data.objects is None:
        raise InputError(f"{spec.source}: no objects table; set data.objects (the track log: scan, object id, "
                         "position) to derive births")
    if data.gate_radius is None and data.gate_probability is None:
        # births use no gates; the objects reader asks for a size only to build them
        data = dataclasses.replace(data, gate_radius=1.0)
    region = region_from_spec(spec.space)
    rec = read_recording(data, region)
    obj = read_objects(data, region, rec)
    if time_column is not None and time_column not in rec.scans_meta:
        where = (f"the scans table {data.scans} has no column '{time_column}' (columns: "
                 f"{', '.join(sorted(rec.scans_meta)) or 'none besides the scan id'})" if data.scans is not None
                 else "the recording has no scans table (data.n_scans), so no scan times")
        raise InputError(f"--time-column {time_column}: {where}; name the column that holds the scan times, or "
                         "leave the option out to order the scans by id")
    column = time_column or "time"
    times = None
    if column in rec.scans_meta:
        times = time_seconds(rec.scans_meta[column], column, str(data.scans))
    b = derive_births(rec.scan_ids, times, obj.scan_index, obj.object_id, obj.c0, obj.c1,
                      frame=region.frame, **options)
    summary = births_summary(b)
    summary["inputs_sha256"] = dict(rec.inputs)
    summary["spec"] = spec.source
    paths = write_births(b, out_dir, summary, fmt=fmt)
    c = summary["counts"]
    log(f"{c['births']} births over {c['exposed_steps']} exposed steps (of {c['scans']}); censored: "
        f"{c['censored_at_start']} at the start, {c['censored_after_gaps']} after {c['data_gaps']} data gap(s); "
        f"reappearances: {c['reappearances']}; written to {', '.join(str(p) for p in paths)}")
    return b, summary


def write_births(b: Births, out_dir, summary: dict, fmt: str = "csv") -> list[Path]:
    """births.{csv,parquet} (one row per birth: step, x, y [m], vx, vy [m/s], object,
    x_first, y_first [m], reappearance, and x_sd, y_sd [m] with the lag correction),
    steps.{csv,parquet} (the exposed steps: step, duration [s], time [s]) and births.json
    (counts, rules, conjugate birth rate, caution). The births table's ``step`` and the
    steps table are the birth model's input contract (models/lowmarsh-birth.toml:
    data.columns.scan = "step")."""
    import pyarrow as pa
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    from .jsonio import write_json_atomic
    from .results import CAUTION

    if fmt not in ("csv", "parquet"):
        raise InputError(f"table format must be 'csv' or 'parquet', got {fmt!r}")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)

    def col(v):  # NaN -> null (an empty cell), so readers see "no value"
        v = np.asarray(v, float)
        return pa.array(v, mask=~np.isfinite(v))

    oid = b.object_id
    births = {"step": pa.array(b.step), "x": pa.array(b.x), "y": pa.array(b.y), "vx": col(b.vx), "vy": col(b.vy),
              "object": pa.array(oid.tolist() if oid.dtype.kind not in "iu" else oid),
              "x_first": pa.array(b.x_raw), "y_first": pa.array(b.y_raw), "reappearance": pa.array(b.reappearance)}
    if b.x_sd is not None:
        births["x_sd"], births["y_sd"] = col(b.x_sd), col(b.y_sd)
    ex = b.steps.exposed
    steps = {"step": pa.array(b.scan_ids[ex])}
    if np.isfinite(b.steps.duration[ex]).all() and ex.any():
        steps["duration"] = pa.array(b.steps.duration[ex])
    if b.steps.times is not None:
        steps["time"] = pa.array(b.steps.times[ex])
    ext = "csv" if fmt == "csv" else "parquet"
    write = pacsv.write_csv if fmt == "csv" else pq.write_table
    p_b, p_s = out / f"births.{ext}", out / f"steps.{ext}"
    write(pa.table(births), p_b)
    write(pa.table(steps), p_s)
    doc = {**summary, "caution": CAUTION,
           "files": {"births": p_b.name, "steps": p_s.name},
           "columns": {"births": "step (scan id of the first listing), x, y [m] (Cartesian; lag-corrected when "
                                 "asked), vx, vy [m/s] (empty: not available), object, x_first, y_first [m] "
                                 "(first listed position), reappearance, x_sd, y_sd [m] (lag correction)",
                       "steps": "every exposed step: step (scan id), duration [s] since the previous scan, time [s]"}}
    write_json_atomic(out / "births.json", doc, indent=2)
    return [p_b, p_s, out / "births.json"]
