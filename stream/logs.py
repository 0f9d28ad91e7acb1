"""Event logs and seeds files: JSON Lines, Parquet and CSV logs read in bounded chunks.

The one place that reads event files: the service's file source follows logs
with it, ``ranktide replay`` replays them, and recordings (``ranktide
record``) are decoded here with the service's own message decoding
(:func:`stream.events.decode_values`).

Whatever the log's size, at most one chunk (a few MiB of text or
``batch_rows`` rows) is held at a time. Each chunk is parsed and validated
into a :class:`~stream.events.Parsed` together with the position of every
record, so that rejects can name their place and a reader can resume.

Positions: for JSON Lines, the 1-based line number and the byte offset of the
line's start; for Parquet and CSV, the 0-based row number (``offset`` is the
row number too).
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pcsv
import pyarrow.parquet as pq

from ranktide.solver import EventBatch, Ranker
from ranktide.stream.events import (
    ARROW_CONTENT_TYPE, FIELDS, Limits, Parsed, decode_values, parse_json_block, parse_json_records, ts_millis,
    validate_table,
)

CHUNK_BYTES = 8 << 20


class LogError(RuntimeError):
    """A log that cannot be read at all; the message names the file and the reason."""


@dataclass
class LogChunk:
    """One parsed chunk of a log.

    Attributes
    ----------
    parsed : Parsed
        Valid events and rejects of the chunk.
    lines : int64 array
        Line number (JSON Lines) or row number of every input record.
    offsets : int64 array
        Byte offset (JSON Lines) or row number of every input record.
    end_offset : int
        Where reading resumes after this chunk (bytes or rows).
    end_line : int
        Lines (or rows) fully read once this chunk is consumed.
    raw : callable
        ``raw(i)`` gives the text of input record ``i`` (for the rejects file).
    """

    parsed: Parsed
    lines: np.ndarray
    offsets: np.ndarray
    end_offset: int
    end_line: int
    raw: callable
    kafka: tuple[list, np.ndarray, np.ndarray] | None = None  # topic, partition, offset per row (recordings)

    def select(self, keep: np.ndarray) -> "LogChunk":
        """The chunk restricted to the input rows where ``keep`` is True (renumbered)."""
        new_index = np.cumsum(keep) - 1
        p = self.parsed
        vkeep = keep[p.valid_rows]
        rkeep = keep[p.rejected_rows] if p.rejected_rows.size else np.zeros(0, bool)
        rows = np.flatnonzero(vkeep)
        parsed = Parsed(
            p.batch.slice(0, len(p.batch)) if vkeep.all() else _take(p.batch, rows),
            new_index[p.valid_rows[vkeep]],
            new_index[p.rejected_rows[rkeep]] if rkeep.size else p.rejected_rows,
            [r for r, k in zip(p.reasons, rkeep) if k],
        )
        old_rows = np.flatnonzero(keep)
        kafka = None
        if self.kafka is not None:
            kafka = ([self.kafka[0][i] for i in old_rows], self.kafka[1][old_rows], self.kafka[2][old_rows])
        raw = self.raw
        return LogChunk(parsed, self.lines[old_rows], self.offsets[old_rows], self.end_offset, self.end_line,
                        lambda i: raw(int(old_rows[i])), kafka)


def _take(batch, rows: np.ndarray):
    idx = pa.array(rows)
    return EventBatch(batch.op[rows], batch.src.take(idx), batch.dst.take(idx), batch.weight[rows], batch.ts[rows])


def log_format(path: Path) -> str:
    """``jsonl``, ``parquet`` or ``csv`` from the file name."""
    name = Path(path).name.lower()
    if name.endswith(".parquet") or name.endswith(".pq"):
        return "parquet"
    if name.endswith(".csv"):
        return "csv"
    return "jsonl"


def row_count_hint(path: Path) -> int | None:
    """Rows a Parquet log holds (from its footer), None for other formats or an unreadable file.

    A replay reserves room for that many edges at once instead of growing
    the graph arrays step by step.
    """
    if log_format(Path(path)) != "parquet":
        return None
    try:
        return int(pq.ParquetFile(path).metadata.num_rows)
    except (OSError, pa.ArrowException):
        return None


def read_log(
    path: Path,
    limits: Limits = Limits(),
    start_offset: int = 0,
    start_line: int = 1,
    batch_rows: int = 65_536,
    follow_partial: bool = False,
    chunk_bytes: int = CHUNK_BYTES,
) -> Iterator[LogChunk]:
    """Iterate over a log in chunks.

    Parameters
    ----------
    path : Path
        A ``.jsonl``/``.json``/``.ndjson`` (anything else is read as JSON
        Lines), ``.parquet`` or ``.csv`` file.
    start_offset, start_line : int
        Resume point (bytes and line number for JSON Lines, rows otherwise).
    follow_partial : bool
        JSON Lines only: leave a last line without its newline unread (it may
        still be being written). A finished log reads it too.
    chunk_bytes : int
        JSON Lines only: bytes read per chunk (a chunk ends on a line end).

    Raises
    ------
    LogError
        When the file is missing, unreadable, or not of its format at all.
    """
    path = Path(path)
    if not path.is_file():
        raise LogError(f"{path}: no such log file")
    fmt = log_format(path)
    try:
        if fmt == "parquet":
            yield from _read_parquet(path, limits, start_offset, batch_rows)
        elif fmt == "csv":
            yield from _read_csv(path, limits, start_offset, batch_rows)
        else:
            yield from _read_jsonl(path, limits, start_offset, start_line, follow_partial, chunk_bytes)
    except OSError as exc:
        raise LogError(f"{path}: cannot read: {exc.strerror or exc}") from exc
    except pa.ArrowException as exc:
        raise LogError(f"{path}: not a readable {fmt} log: {exc}") from exc


def _read_jsonl(
    path: Path, limits: Limits, offset: int, line_no: int, follow_partial: bool, chunk_bytes: int
) -> Iterator[LogChunk]:
    with open(path, "rb") as fh:
        fh.seek(offset)
        carry = b""
        while True:
            block = fh.read(chunk_bytes)
            at_end = not block
            data = carry + block
            if not data:
                return
            cut = data.rfind(b"\n") + 1
            if at_end and not follow_partial:
                cut = len(data)
            if cut == 0:
                if at_end:
                    return
                if len(data) > limits.max_record_bytes + chunk_bytes:
                    cut = len(data)  # an endless line: hand it over, it is rejected as too long
                else:
                    carry = data
                    continue
            body, carry = (data, b"") if cut == len(data) else (data[:cut], data[cut:])
            chunk = _jsonl_chunk(body, offset, line_no, limits)
            yield chunk
            line_no = chunk.end_line + 1
            offset += len(body)
            if at_end:
                return


def _jsonl_chunk(body: bytes, offset: int, line_no: int, limits: Limits) -> LogChunk:
    """The lines of ``body`` (the first is line ``line_no``, at byte ``offset``) parsed and placed."""
    size = len(body) - 1 if body.endswith(b"\n") else len(body)  # without the last newline
    starts = np.concatenate(([0], np.flatnonzero(np.frombuffer(body, np.uint8, count=size) == 10) + 1))
    lengths = np.diff(np.append(starts, size + 1)) - 1  # one per line, a blank one included
    end_line = line_no - 1 + lengths.size
    # the whole chunk through Arrow's JSON reader at once; line by line only when it needs care
    parsed = parse_json_block(body if size < len(body) else body + b"\n", lengths, limits)
    if parsed is not None:
        keep = np.arange(lengths.size)
    else:
        records = body[:size].split(b"\n")
        keep = np.flatnonzero(lengths > 0)  # blank lines are no records
        if keep.size < lengths.size:
            records = [records[i] for i in keep]
        parsed = parse_json_records(records, limits)

    def raw(i: int) -> str:
        row = int(keep[i])
        return body[starts[row]:starts[row] + lengths[row]].decode("utf-8", "replace")

    return LogChunk(parsed, line_no + keep.astype(np.int64), offset + starts[keep].astype(np.int64),
                    offset + len(body), end_line, raw)


def _table_chunk(table: pa.Table, first_row: int, limits: Limits, first_line: int) -> LogChunk:
    """Validate a table of rows; ``first_line`` is the line or row number of its first row."""
    typed, reasons = _decode_text_columns(table)
    parsed = validate_table(typed, limits, reasons)
    rows = np.arange(table.num_rows, dtype=np.int64)

    def raw(i: int) -> str:
        return json.dumps(table.slice(i, 1).to_pylist()[0], default=str)

    end = first_row + table.num_rows
    return LogChunk(parsed, first_line + rows, first_row + rows, end, end, raw)


def _decode_text_columns(table: pa.Table) -> tuple[pa.Table, list | None]:
    """Numbers held as text (CSV) converted, with a reason for each bad cell."""
    reasons: list | None = None
    for name, typ in (("weight", pa.float64()), ("ts", pa.int64())):
        if name not in table.column_names or not pa.types.is_string(table.schema.field(name).type):
            continue
        col = table.column(name).combine_chunks()
        blank = pc.equal(pc.utf8_trim_whitespace(col), "")
        col = pc.if_else(blank, pa.nulls(len(col), pa.string()), col)
        try:
            converted = pc.cast(col, typ)
        except pa.ArrowInvalid:
            values, bad = _convert_cells(col.to_pylist(), float if name == "weight" else _ts_cell)
            converted = pa.array(values, typ)
            reasons = reasons or [None] * table.num_rows
            for i in bad:
                what = "a number" if name == "weight" else "milliseconds or ISO-8601 text"
                reasons[i] = reasons[i] or f"{name} {col[i].as_py()[:40]!r} is not {what}"
        table = table.set_column(table.column_names.index(name), name, converted)
    return table, reasons


def _ts_cell(text: str) -> int:
    """Milliseconds from a CSV cell: an integer, or ISO-8601 text."""
    try:
        return int(text)
    except ValueError:
        millis, reason = ts_millis(text)
        if reason:
            raise ValueError(reason) from None
        return millis


def _convert_cells(cells: list, kind) -> tuple[list, list[int]]:
    values, bad = [], []
    for i, cell in enumerate(cells):
        try:
            values.append(None if cell is None else kind(cell))
        except ValueError:
            values.append(None)
            bad.append(i)
    return values, bad


def _recorded_chunk(table: pa.Table, first_row: int, limits: Limits) -> LogChunk:
    """Rows of a recording (``ranktide record``): message values decoded as the service does."""
    values = table["value"].to_pylist()
    kinds = table["content_type"].to_pylist() if "content_type" in table.column_names else [None] * len(values)
    cols = {name: table[name].to_pylist() for name in ("topic", "partition", "offset") if name in table.column_names}
    decoded = decode_values(values, [k == ARROW_CONTENT_TYPE for k in kinds],
                            lambda i: {name: cols[name][i] for name in cols}, limits)
    rows = first_row + np.arange(table.num_rows, dtype=np.int64)
    end = first_row + table.num_rows
    kafka = None
    if {"topic", "partition", "offset"} <= set(cols):
        kafka = (cols["topic"], np.asarray(cols["partition"], np.int64), np.asarray(cols["offset"], np.int64))
    return LogChunk(decoded.parsed, rows, rows, end, end, lambda i: _text_of(values[i]), kafka)


def _text_of(value: bytes | None) -> str:
    return (value or b"")[:2000].decode("utf-8", "replace")


def _read_parquet(path: Path, limits: Limits, start_row: int, batch_rows: int) -> Iterator[LogChunk]:
    pf = pq.ParquetFile(path)
    recorded = "value" in pf.schema_arrow.names
    columns = pf.schema_arrow.names if recorded else [c for c in FIELDS if c in pf.schema_arrow.names]
    if not recorded and "op" not in columns:
        raise LogError(f"{path}: a Parquet log needs an 'op' column, or the 'value' column of a recording "
                       f"(has {pf.schema_arrow.names})")
    for row, table in _from_row(pf.iter_batches(batch_size=batch_rows, columns=columns), start_row):
        yield _recorded_chunk(table, row, limits) if recorded else _table_chunk(table, row, limits, first_line=row)


def _from_row(batches, start_row: int) -> Iterator[tuple[int, pa.Table]]:
    """(first row number, table) of each record batch, skipping rows before ``start_row``."""
    row = 0
    for rb in batches:
        table = pa.Table.from_batches([rb])
        if row + table.num_rows > start_row:
            skip = max(start_row - row, 0)
            yield row + skip, table.slice(skip)
        row += table.num_rows


def _read_csv(path: Path, limits: Limits, start_row: int, batch_rows: int) -> Iterator[LogChunk]:
    """CSV rows in chunks; a row with the wrong number of cells is rejected with its line, not fatal.

    Row numbers (the positions) count every data row, malformed ones included:
    row ``r`` is line ``r + 2`` (the header is line 1).
    """
    types = {name: pa.string() for name in FIELDS}
    bad: list[tuple[int, str, str]] = []  # (line, reason, text) of malformed rows, in file order

    def malformed(row) -> str:
        bad.append((int(row.number), f"expected {row.expected_columns} columns, got {row.actual_columns}", row.text))
        return "skip"

    reader = pcsv.open_csv(
        path,
        # one thread: the parser then numbers the malformed rows it hands to the handler
        read_options=pcsv.ReadOptions(block_size=1 << 22, use_threads=False),
        parse_options=pcsv.ParseOptions(invalid_row_handler=malformed),
        convert_options=pcsv.ConvertOptions(column_types=types, strings_can_be_null=True),
    )
    if "op" not in reader.schema.names:
        raise LogError(f"{path}: a CSV log needs the header op,src,dst,weight,ts (has {reader.schema.names})")
    next_line = 2
    for rb in reader:
        chunk, next_line = _csv_chunk(pa.Table.from_batches([rb]), bad, next_line, limits)
        if chunk is not None:
            yield from _from_csv_row(chunk, start_row)
    chunk, _ = _csv_chunk(pa.Table.from_batches([], reader.schema), bad, next_line, limits, final=True)
    if chunk is not None:
        yield from _from_csv_row(chunk, start_row)


def _from_csv_row(chunk: LogChunk, start_row: int) -> Iterator[LogChunk]:
    """The chunk without rows before ``start_row`` (a resumed replay), if anything is left."""
    if chunk.offsets.size and chunk.offsets[0] < start_row:
        keep = chunk.offsets >= start_row
        if not keep.any():
            return
        chunk = chunk.select(keep)
    yield chunk


def _csv_chunk(table: pa.Table, bad: list[tuple[int, str, str]], next_line: int, limits: Limits,
               final: bool = False) -> tuple[LogChunk | None, int]:
    """Well-formed rows of ``table`` merged, in line order, with the malformed rows among them.

    ``bad`` holds the malformed rows the parser has met so far; those before
    the table's last row (all of them when ``final``) are taken out of it.
    Returns the chunk (None when empty) and the line after it.
    """
    n = table.num_rows
    bad_lines = np.array([b[0] for b in bad], dtype=np.int64)
    # well-formed rows sit on the lines, from next_line on, that no malformed row holds
    candidates = next_line + np.arange(n + bad_lines.size, dtype=np.int64)
    good_lines = candidates[~np.isin(candidates, bad_lines)][:n]
    last = int(good_lines[-1]) if n else next_line - 1
    taken = bad_lines.size if final else int(np.searchsorted(bad_lines, last))
    if n == 0 and taken == 0:
        return None, next_line
    mine, bad[:taken] = bad[:taken], []
    lines = np.concatenate((good_lines, bad_lines[:taken]))
    order = np.argsort(lines, kind="stable")
    position = np.empty_like(order)
    position[order] = np.arange(order.size)  # merged place of each good row, then of each malformed row
    good = _table_chunk(table, 0, limits, first_line=0).parsed
    rejected = np.concatenate((position[good.rejected_rows], position[n:])).astype(np.int64)
    reasons = good.reasons + [reason for _, reason, _ in mine]
    by_row = np.argsort(rejected, kind="stable")
    parsed = Parsed(good.batch, position[good.valid_rows].astype(np.int64), rejected[by_row],
                    [reasons[i] for i in by_row])
    texts = [text for _, _, text in mine]

    def raw(i: int) -> str:
        k = int(order[i])
        return json.dumps(table.slice(k, 1).to_pylist()[0], default=str) if k < n else texts[k - n]

    sorted_lines = lines[order]
    end = max(int(sorted_lines[-1]) + 1, next_line)
    return LogChunk(parsed, sorted_lines, sorted_lines - 2, end - 2, end - 2, raw), end


# ------------------------------------------------------------------ seeds files


def read_seeds_file(path: Path) -> tuple[list[str], list[float]]:
    """Seeds of a personalization: one node per line, optionally ``node,weight`` or ``node<TAB>weight``.

    Blank lines and lines starting with ``#`` are skipped.
    """
    nodes, weights = [], []
    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        raise LogError(f"{path}: cannot read seeds file: {exc.strerror or exc}") from exc
    for number, line in enumerate(text.splitlines(), 1):
        line = line.strip()
        if not line or line.startswith("#"):
            continue
        parts = [p.strip() for p in line.replace("\t", ",").split(",")]
        try:
            weight = float(parts[1]) if len(parts) > 1 and parts[1] else 1.0
        except ValueError:
            raise LogError(f"{path}:{number}: weight {parts[1]!r} is not a number") from None
        if not weight >= 0 or weight == float("inf"):
            raise LogError(f"{path}:{number}: seed weight must be a finite number >= 0")
        nodes.append(parts[0])
        weights.append(weight)
    return nodes, weights


def seed_personalizations(ranker: Ranker, personalizations: dict[str, Path]) -> None:
    for name, path in personalizations.items():
        nodes, weights = read_seeds_file(path)
        ranker.add_profile(name)
        if nodes:
            ranker.apply(EventBatch.seeds(name, nodes, weights))
