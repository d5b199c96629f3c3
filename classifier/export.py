"""`callsieve export`: the detection table of docs/formats.md, as CSV or Parquet, streamed."""

from __future__ import annotations

from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

from .errors import InputError
from .outputs import check_output, csv_header_is, write_csv
from .store import latest_run_id, open_store, parse_utc

__all__ = ["DETECTION_COLUMNS", "export_detections", "CAUTION"]

DETECTION_COLUMNS = [
    "detection_id",
    "run_id",
    "deployment",
    "file",
    "start_s",
    "end_s",
    "start_utc",
    "end_utc",
    "low_hz",
    "high_hz",
    "label",
    "confidence",
    "received_level_db",
    "snr_db",
    "clipped",
]
CAUTION = (
    "Detections are candidates for trained analysts to verify; where results feed mitigation or "
    "permit decisions, local regulations and qualified practice decide."
)
_CHUNK = 10000


def _iso(start: datetime, seconds: float) -> str:
    t = start + timedelta(seconds=seconds)
    return t.strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3] + "Z"


def _rows(con, run_id: int, label: str | None, min_confidence: float | None):
    sql = (
        "SELECT d.detection_id, d.run_id, dep.name, f.name, d.start_s, d.end_s, f.start_utc, d.low_hz, d.high_hz, "
        "d.label, d.confidence, d.received_level_db, d.snr_db, d.clipped FROM detections d "
        "JOIN files f ON f.file_id=d.file_id JOIN deployments dep ON dep.deployment_id=f.deployment_id "
        "WHERE d.run_id=? AND d.superseded=0"
    )
    args: list[Any] = [run_id]
    if label is not None:
        sql += " AND d.label=?"
        args.append(label)
    if min_confidence is not None:
        sql += " AND d.confidence>=?"
        args.append(min_confidence)
    sql += " ORDER BY f.start_utc, d.start_s, d.label"
    cur = con.execute(sql, args)
    starts: dict[str, datetime] = {}  # each file's start parsed once, not per detection
    while True:
        chunk = cur.fetchmany(_CHUNK)
        if not chunk:
            return
        for r in chunk:
            (det, run, dep, name, s0, s1, fstart, lo, hi, lab, conf, rl, snr, clip) = tuple(r)
            t0 = starts.get(fstart)
            if t0 is None:
                t0 = starts[fstart] = parse_utc(fstart)
            yield [det, run, dep, name, s0, s1, _iso(t0, s0), _iso(t0, s1), lo, hi, lab, conf, rl, snr, clip]


def _earlier_export(path: Path) -> bool:
    """An earlier output of export: a CSV with the detection table's header, or our Parquet."""
    if path.suffix.lower() == ".parquet":
        try:
            import pyarrow.parquet as pq

            meta = pq.read_schema(path).metadata or {}
        except Exception:
            return False
        return meta.get(b"caution") == CAUTION.encode()
    return csv_header_is(path, DETECTION_COLUMNS)


def export_detections(
    db: str | Path,
    out: str | Path,
    run_id: int | None = None,
    label: str | None = None,
    min_confidence: float | None = None,
    force: bool = False,
) -> dict[str, Any]:
    """Write the detections of a run as CSV, or Parquet when ``out`` ends in ``.parquet``.

    ``out`` may replace an earlier detection table, never another file (a store, a model,
    a label table), unless ``force``; the table is written under a temporary name and
    renamed, so a reader never sees half of it.

    Returns
    -------
    dict
        ``run_id``, ``rows`` written, ``out``.
    """
    if min_confidence is not None and not 0.0 <= min_confidence <= 1.0:
        raise InputError(f"--min-confidence must be in 0..1, got {min_confidence:g}")
    Path(out).parent.mkdir(parents=True, exist_ok=True)
    out = check_output(
        out,
        option="--out",
        suffixes=(".csv", ".parquet"),
        inputs=(db,),
        ours=_earlier_export,
        what="a detection table",
        force=force,
    )
    con = open_store(db, create=False)
    run_id = latest_run_id(con, run_id)
    if label is not None:
        known = {r[0] for r in con.execute("SELECT DISTINCT label FROM detections WHERE run_id = ?", (run_id,))}
        if label not in known:
            con.close()
            raise InputError(
                f"--label {label!r}: run {run_id} has no detection of that class "
                f"(its classes: {', '.join(sorted(known)) or 'none'})"
            )
    n = 0
    rows = _rows(con, run_id, label, min_confidence)
    if out.suffix.lower() == ".parquet":
        tmp = out.with_name(out.name + ".partial")
        try:
            import pyarrow as pa
            import pyarrow.parquet as pq
        except ImportError:
            raise InputError("Parquet output needs pyarrow: pip install pyarrow (or write .csv)") from None
        schema = pa.schema(
            [
                ("detection_id", pa.int64()),
                ("run_id", pa.int64()),
                ("deployment", pa.string()),
                ("file", pa.string()),
                ("start_s", pa.float64()),
                ("end_s", pa.float64()),
                ("start_utc", pa.string()),
                ("end_utc", pa.string()),
                ("low_hz", pa.float64()),
                ("high_hz", pa.float64()),
                ("label", pa.string()),
                ("confidence", pa.float64()),
                ("received_level_db", pa.float64()),
                ("snr_db", pa.float64()),
                ("clipped", pa.int8()),
            ],
            metadata={"caution": CAUTION},
        )
        with pq.ParquetWriter(tmp, schema) as writer:
            batch: list[list] = []
            for r in rows:
                batch.append(r)
                if len(batch) == _CHUNK:
                    writer.write_table(
                        pa.Table.from_pylist([dict(zip(DETECTION_COLUMNS, b, strict=True)) for b in batch], schema)
                    )
                    n += len(batch)
                    batch = []
            if batch or n == 0:
                writer.write_table(
                    pa.Table.from_pylist([dict(zip(DETECTION_COLUMNS, b, strict=True)) for b in batch], schema)
                )
                n += len(batch)
        tmp.replace(out)
    else:
        n = write_csv(out, DETECTION_COLUMNS, rows)
    con.close()
    return {"run_id": run_id, "rows": n, "out": str(out)}
