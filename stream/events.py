"""The event format: parsing and validation of JSON Lines, Arrow and Parquet events.

One event is a JSON object (design notes, section 5)::

    {"op": "insert", "src": "a", "dst": "b", "weight": 2.5, "ts": 1733050000123}
    {"op": "delete", "src": "a", "dst": "b"}
    {"op": "seed", "profile": "trusted", "node": "a", "weight": 1.0}

Every record becomes either a valid event or a *reject* with its row and a
reason; nothing is dropped silently. Clean blocks of JSON Lines are parsed by
Arrow's C++ JSON reader; a block that it refuses (a bad line, a number where a
string was expected) is parsed line by line so that each bad line gets its own
reason and every good line still counts.

Message values (live Kafka messages and the rows of a recording alike) are
decoded here too (:func:`decode_values`): runs of JSON values, and Arrow IPC
streams marked by the ``content-type`` header :data:`ARROW_CONTENT_TYPE`.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from datetime import datetime, timezone

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.json as pj

from ranktide.solver import GLOBAL, OP_DELETE, OP_INSERT, OP_SEED, EventBatch
from ranktide.solver.engine import MAX_WEIGHT, MIN_WEIGHT

#: Header that marks a Kafka message holding an Arrow IPC stream of events.
ARROW_CONTENT_TYPE = "application/vnd.apache.arrow.stream"
OPS = {"insert": OP_INSERT, "delete": OP_DELETE, "seed": OP_SEED}
FIELDS = ("op", "src", "dst", "weight", "ts", "profile", "node")
_STRING_FIELDS = ("op", "src", "dst", "profile", "node")
_SCHEMA = pa.schema(
    [(name, pa.string()) for name in _STRING_FIELDS] + [("weight", pa.float64()), ("ts", pa.int64())]
)
_PARSE_OPTIONS = pj.ParseOptions(explicit_schema=_SCHEMA, unexpected_field_behavior="ignore")


@dataclass(frozen=True)
class Limits:
    """Caps that protect memory from hostile or broken input.

    Attributes
    ----------
    max_id_length : int
        Longest node id or profile name, in characters.
    max_record_bytes : int
        Longest JSON line or message, in bytes.
    """

    max_id_length: int = 1024
    max_record_bytes: int = 1 << 20


@dataclass
class Parsed:
    """Outcome of parsing one block of records.

    Attributes
    ----------
    batch : EventBatch
        The valid events, in input order.
    valid_rows : int64 array
        Input row of each valid event.
    rejected_rows : int64 array
        Input row of each reject.
    reasons : list of str
        Reason of each reject, aligned with ``rejected_rows``.
    """

    batch: EventBatch
    valid_rows: np.ndarray
    rejected_rows: np.ndarray
    reasons: list[str]


# ------------------------------------------------------------------ JSON Lines


def parse_json_records(records: list[bytes], limits: Limits = Limits()) -> Parsed:
    """Parse JSON records (lines or message values), one event each.

    Parameters
    ----------
    records : list of bytes
        One JSON object per item, without the line terminator.
    limits : Limits
        Id-length and record-size caps.
    """
    if not records:
        return validate_table(pa.table({}), limits)
    table = _fast_parse(records, limits)
    if table is not None:
        return validate_table(table, limits)
    return _slow_parse(records, limits)


def _fast_parse(records: list[bytes], limits: Limits) -> pa.Table | None:
    """Arrow's JSON reader on the whole block, or None when the block needs care."""
    blob = b"\n".join(records)
    # one line per record, none blank: otherwise Arrow's rows would not line up with the records
    if blob.count(b"\n") != len(records) - 1 or b"\n\n" in blob or b"\r" in blob:
        return None
    if max(map(len, records)) > limits.max_record_bytes or not records[0].strip():
        return None
    return _read_block(blob + b"\n", len(records))


def parse_json_block(block: bytes, lengths: np.ndarray, limits: Limits = Limits()) -> Parsed | None:
    """Parse JSON lines held in one buffer, each ending in a newline, without splitting them.

    The fast path of a JSON Lines log (:func:`stream.logs.read_log`): Arrow's
    JSON reader reads the buffer as it is. Returns None when the block needs
    care (a blank or over-long line, a carriage return, a line Arrow refuses);
    the caller then parses the lines one by one (:func:`parse_json_records`),
    which gives each bad line its own reason.

    Parameters
    ----------
    block : bytes
        The lines, each ending in a newline.
    lengths : int array
        Bytes of each line, without its newline.
    limits : Limits
        Id-length and record-size caps.
    """
    if lengths.size == 0 or lengths.min() == 0 or lengths.max() > limits.max_record_bytes or b"\r" in block:
        return None
    if not block[: int(lengths[0])].strip():
        return None
    table = _read_block(block, int(lengths.size), threads=False)
    return None if table is None else validate_table(table, limits)


def _read_block(blob: bytes, rows: int, threads: bool = True) -> pa.Table | None:
    """The table Arrow's JSON reader makes of ``blob``, or None unless it reads exactly ``rows`` rows."""
    try:
        table = pj.read_json(pa.BufferReader(blob), read_options=pj.ReadOptions(use_threads=threads),
                             parse_options=_PARSE_OPTIONS)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return None
    return table if table.num_rows == rows else None


def _slow_parse(records: list[bytes], limits: Limits) -> Parsed:
    """Line-by-line parse: each bad record gets its own reason."""
    columns: dict[str, list] = {name: [] for name in FIELDS}
    pre_reasons: list[str | None] = []
    for raw in records:
        fields, reason = _parse_one(raw, limits)
        pre_reasons.append(reason)
        for name in FIELDS:
            columns[name].append(fields.get(name) if fields else None)
    table = pa.table(
        {
            **{name: pa.array(columns[name], pa.string()) for name in _STRING_FIELDS},
            "weight": pa.array(columns["weight"], pa.float64()),
            "ts": pa.array(columns["ts"], pa.int64()),
        }
    )
    return validate_table(table, limits, pre_reasons)


def _parse_one(raw: bytes, limits: Limits) -> tuple[dict | None, str | None]:
    """Decode one record into typed fields, or give the reason it is bad."""
    if len(raw) > limits.max_record_bytes:
        return None, f"record of {len(raw)} bytes exceeds the {limits.max_record_bytes}-byte limit"
    try:
        obj = json.loads(raw)
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        return None, f"not JSON: {exc}"
    if not isinstance(obj, dict):
        return None, f"not a JSON object but a {type(obj).__name__}"
    fields: dict = {}
    for name in _STRING_FIELDS:
        if name in obj and obj[name] is not None:
            text = _id_text(obj[name])
            if text is None:
                return None, f"field '{name}' must be a string or a number, got {type(obj[name]).__name__}"
            fields[name] = text
    if obj.get("weight") is not None:
        w = obj["weight"]
        if isinstance(w, bool) or not isinstance(w, (int, float)):
            return None, f"weight must be a number, got {type(w).__name__}"
        fields["weight"] = float(w) if abs(w) < 1e308 or isinstance(w, float) else math.inf
    if obj.get("ts") is not None:
        ts, reason = ts_millis(obj["ts"])
        if reason:
            return None, reason
        fields["ts"] = ts
    return fields, None


def _id_text(value) -> str | None:
    """A node id as text: strings as they are, JSON numbers as their decimal text."""
    if isinstance(value, str):
        return value
    if isinstance(value, bool):
        return None
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float) and math.isfinite(value):
        return repr(value)
    return None


def ts_millis(value) -> tuple[int | None, str | None]:
    """Milliseconds since the epoch from a number or ISO-8601 text."""
    if isinstance(value, bool):
        return None, "ts must be milliseconds since the epoch or ISO-8601 text"
    if isinstance(value, (int, float)):
        if not math.isfinite(value) or abs(value) > 1e16:
            return None, f"ts {value!r} is out of range"
        return int(value), None
    if isinstance(value, str):
        try:
            stamp = datetime.fromisoformat(value.replace("Z", "+00:00"))
        except ValueError:
            return None, f"ts {value[:40]!r} is not ISO-8601 text"
        if stamp.tzinfo is None:
            stamp = stamp.replace(tzinfo=timezone.utc)
        return int(stamp.timestamp() * 1000), None
    return None, "ts must be milliseconds since the epoch or ISO-8601 text"


# ------------------------------------------------------------------ validation


def _column(table: pa.Table, name: str, typ: pa.DataType) -> pa.Array:
    if name not in table.column_names:
        return pa.nulls(table.num_rows, typ)
    col = table.column(name)
    col = col.combine_chunks() if isinstance(col, pa.ChunkedArray) else col
    if pa.types.is_timestamp(col.type) and typ == pa.int64():
        col = pc.cast(pc.cast(col, pa.timestamp("ms")), pa.int64())
    elif pa.types.is_floating(col.type) and typ == pa.string():
        col = pa.array([None if x is None else _id_text(x) for x in col.to_pylist()], pa.string())
    return col if col.type == typ else pc.cast(col, typ)


class _Rejects:
    """Rows rejected so far and why; the first reason found for a row is the one kept.

    Only rejected rows cost Python work: a block of good rows is checked with
    vectorised masks alone.
    """

    def __init__(self, n: int, pre_reasons: list | None) -> None:
        self.bad = np.zeros(n, dtype=bool)
        self.reasons: dict[int, str] = {}
        if pre_reasons is not None:
            self.reasons = {i: str(r) for i, r in enumerate(pre_reasons) if r is not None}
            self.bad[list(self.reasons)] = True

    def add(self, mask: np.ndarray, reason) -> None:
        """Reject the rows of ``mask`` not rejected yet; ``reason`` is text or ``reason(row)``."""
        rows = np.flatnonzero(mask & ~self.bad)
        if rows.size:
            self.bad[rows] = True
            for i in rows.tolist():
                self.reasons[i] = reason(i) if callable(reason) else reason

    def rows_and_reasons(self) -> tuple[np.ndarray, list[str]]:
        rows = np.flatnonzero(self.bad).astype(np.int64)
        return rows, [self.reasons[i] for i in rows.tolist()]


def _op_codes(op_text: pa.Array) -> np.ndarray:
    """The op code of each row, -1 for a missing or unknown op."""
    op = np.full(len(op_text), -1, dtype=np.int8)
    for name, code in OPS.items():
        op[pc.fill_null(pc.equal(op_text, name), False).to_numpy(zero_copy_only=False)] = code
    return op


def validate_table(table: pa.Table, limits: Limits = Limits(), pre_reasons: list | None = None) -> Parsed:
    """Validate event rows held in an Arrow table (vectorised).

    Columns ``op, src, dst, weight, ts`` (and ``profile, node`` for seeds);
    missing columns count as missing fields. ``pre_reasons`` carries reasons
    already found while decoding (one per row, None for a row that decoded).
    """
    n = table.num_rows
    rejects = _Rejects(n, pre_reasons)
    op_text = _column(table, "op", pa.string())
    cols = {name: _column(table, name, pa.string()) for name in ("src", "dst", "profile", "node")}
    # an absent or null weight means the default 1.0; an explicit NaN stays and is rejected
    weight = pc.fill_null(_column(table, "weight", pa.float64()), 1.0).to_numpy(zero_copy_only=False)
    ts = _column(table, "ts", pa.int64()).fill_null(-1).to_numpy(zero_copy_only=False)
    op = _op_codes(op_text)
    _check_ops(op, op_text, rejects)
    _check_ids(op, cols, limits, rejects)
    _check_weights(op, weight, cols["profile"], rejects)
    return Parsed(_valid_batch(op, cols, weight, ts, rejects.bad), *_valid_and_rejected(rejects))


def _valid_and_rejected(rejects: _Rejects) -> tuple[np.ndarray, np.ndarray, list[str]]:
    bad_rows, reasons = rejects.rows_and_reasons()
    return np.flatnonzero(~rejects.bad).astype(np.int64), bad_rows, reasons


def _check_ops(op: np.ndarray, op_text: pa.Array, rejects: _Rejects) -> None:
    rejects.add(pc.is_null(op_text).to_numpy(zero_copy_only=False), "missing field 'op'")
    unknown = op < 0
    if unknown.any():
        values = op_text.to_pylist()
        rejects.add(unknown, lambda i: f"unknown op {str(values[i])[:40]!r} (expected insert, delete or seed)")


def _check_ids(op: np.ndarray, cols: dict[str, pa.Array], limits: Limits, rejects: _Rejects) -> None:
    """Edges need src and dst, seeds profile and node: present, not empty, not too long."""
    is_seed = op == OP_SEED
    is_edge = (op == OP_INSERT) | (op == OP_DELETE)
    for name, mask in (("src", is_edge), ("dst", is_edge), ("profile", is_seed), ("node", is_seed)):
        if not mask.any():
            continue
        col = cols[name]
        null = pc.is_null(col).to_numpy(zero_copy_only=False)
        rejects.add(mask & null, f"missing field '{name}'")
        length = pc.fill_null(pc.utf8_length(col), 0).to_numpy(zero_copy_only=False)
        rejects.add(mask & (length > limits.max_id_length), f"{name} longer than {limits.max_id_length} characters")
        rejects.add(mask & (length == 0) & ~null, f"{name} is empty")


def _check_weights(op: np.ndarray, weight: np.ndarray, profile: pa.Array, rejects: _Rejects) -> None:
    is_seed = op == OP_SEED
    with np.errstate(invalid="ignore"):
        bad_edge_w = (op == OP_INSERT) & ~(np.isfinite(weight) & (weight > 0))
        bad_seed_w = is_seed & ~(np.isfinite(weight) & (weight >= 0))
        in_range = (weight >= MIN_WEIGHT) & (weight <= MAX_WEIGHT)
    rejects.add(bad_edge_w, lambda i: f"weight must be a finite number > 0, got {float(weight[i])!r}")
    rejects.add(bad_seed_w, lambda i: f"seed weight must be a finite number >= 0, got {float(weight[i])!r}")
    rejects.add(((op == OP_INSERT) | (is_seed & (weight != 0))) & ~in_range,
                lambda i: f"weight {float(weight[i])!r} is outside [{MIN_WEIGHT:g}, {MAX_WEIGHT:g}]")
    if is_seed.any():
        is_global = pc.fill_null(pc.equal(profile, GLOBAL), False).to_numpy(zero_copy_only=False)
        rejects.add(is_seed & is_global, "the global profile teleports uniformly; seed a named profile")


def _valid_batch(op: np.ndarray, cols: dict[str, pa.Array], weight: np.ndarray, ts: np.ndarray,
                 bad: np.ndarray) -> EventBatch:
    """The valid rows as events: a seed's node goes in ``src`` and its profile in ``dst``."""
    rows = np.flatnonzero(~bad)
    seed_ok = op[rows] == OP_SEED
    take = pa.array(rows)
    if seed_ok.any():
        mask = pa.array(seed_ok)
        src = pc.if_else(mask, cols["node"].take(take), cols["src"].take(take))
        dst = pc.if_else(mask, cols["profile"].take(take), cols["dst"].take(take))
    elif rows.size == op.size:  # every row a valid edge event: the columns as they are
        src, dst = cols["src"], cols["dst"]
    else:
        src, dst = cols["src"].take(take), cols["dst"].take(take)
    return EventBatch(op[rows], src, dst, weight[rows].astype(np.float64), ts[rows].astype(np.int64))


# ------------------------------------------------------------------ message values


@dataclass
class SourceChunk:
    """Events taken from a source in one poll.

    Attributes
    ----------
    parsed : Parsed
        Valid events and rejects.
    reject_places : list of dict
        For each reject (aligned with ``parsed.reasons``): where it came from
        (file and line, or topic, partition and offset) and its raw text.
    records : int
        Records (lines or messages) consumed, valid or not.
    """

    parsed: Parsed
    reject_places: list[dict] = field(default_factory=list)
    records: int = 0


def decode_values(values: list, is_arrow: list[bool], place, limits: Limits) -> SourceChunk:
    """Parse message values in order: runs of JSON values, and Arrow IPC streams.

    Used for live messages and for recorded logs alike, so that a replay of a
    recording decides every record exactly as the service did. ``place(i)``
    gives the origin of value ``i`` (asked for rejects only).
    """
    parts: list[Parsed] = []
    reject_places: list[dict] = []
    reject_index: list[int] = []
    valid_index: list[np.ndarray] = []
    records = 0
    i = 0
    any_arrow = any(is_arrow)
    while i < len(values):
        if any_arrow and is_arrow[i]:
            parsed, n = decode_arrow(values[i], limits)
            reject_places += [{**place(i), "row": int(r), "record": ""} for r in parsed.rejected_rows]
            reject_index += [i] * len(parsed.rejected_rows)
            valid_index.append(np.full(len(parsed.batch), i, dtype=np.int64))
            i += 1
        else:
            j = i + 1
            while j < len(values) and not (any_arrow and is_arrow[j]):
                j += 1
            run = values[i:j]
            if None in run:
                run = [v if v is not None else b"" for v in run]
            parsed, n = parse_json_records(run, limits), j - i
            reject_places += [{**place(i + int(r)), "record": _text(run[r])} for r in parsed.rejected_rows]
            reject_index += [i + int(r) for r in parsed.rejected_rows]
            valid_index.append(i + parsed.valid_rows)
            i = j
        parts.append(parsed)
        records += n
    batch = parts[0].batch if len(parts) == 1 else EventBatch.concat([p.batch for p in parts])
    reasons = [r for p in parts for r in p.reasons]
    # rows are message indices (an Arrow message holds many events)
    valid = np.concatenate(valid_index) if valid_index else np.zeros(0, np.int64)
    merged = Parsed(batch, valid.astype(np.int64), np.array(reject_index, dtype=np.int64), reasons)
    return SourceChunk(merged, reject_places, records)


def is_arrow_message(msg) -> bool:
    """True when a Kafka message's content-type header marks an Arrow IPC stream."""
    for key, value in msg.headers() or []:
        if key.lower() == "content-type" and value is not None and value.decode("latin-1").strip() == ARROW_CONTENT_TYPE:
            return True
    return False


def decode_arrow(value: bytes | None, limits: Limits) -> tuple[Parsed, int]:
    """Validate one Arrow IPC stream of events; return it parsed and its row count."""
    try:
        table = pa.ipc.open_stream(value or b"").read_all()
    except pa.ArrowException as exc:
        empty = validate_table(pa.table({}), limits)
        empty.reasons.append(f"not an Arrow IPC stream: {exc}")
        empty.rejected_rows = np.zeros(1, np.int64)
        return empty, 1
    return validate_table(table, limits), table.num_rows


def _text(value: bytes) -> str:
    return value[:2000].decode("utf-8", "replace")
