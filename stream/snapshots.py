"""Parquet snapshots: atomic write, checksum-verified load, pruning.

Layout (design notes, section 6)::

    ROOT/snap-00000007/
        scores.parquet    node, profile, score (sums to 1 per profile), error_bound
        edges.parquet     src, dst, weight
        seeds.parquet     profile, node, weight (teleport weights of personalizations)
        manifest.json     format, sequence, damping, rtol, tolerance, certified_bound, ...

``error_bound`` is a certified bound on ``|score - exact score|`` of that node
(the per-node contract, ``solver.bounds``). A personalization lists only the
nodes with a non-zero score; every node it leaves out has an exact score of at
most the profile's ``unlisted_bound`` in the manifest.

A snapshot is written into ``ROOT/.snap-00000007.partial``, every file and the
folder are fsynced, and only then is the folder renamed to its final name (an
atomic step on POSIX file systems) and the root fsynced. A reader therefore
never sees a half snapshot under a ``snap-`` name; a ``.partial`` folder left
by a crash is ignored and removed by the next write.

``seeds.parquet`` and the manifest's ``profiles`` key (the sum of each
profile's unnormalised estimate) go beyond the design notes: they are what a
restart needs to rebuild the personalizations and the estimate ``p`` exactly.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import re
import shutil
import tempfile
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    # NumPy, pyarrow and the solver (numba kernels) are imported by the functions that write or
    # rebuild a snapshot, not at start-up: listing, manifests and checksums need none of them
    import numpy as np
    import pyarrow as pa
    from ranktide.solver import Ranker
    from ranktide.solver.bounds import Certificate
    from ranktide.solver.ids import NodeIds

FORMAT = 2
#: Formats this version reads (1 had no ``error_bound`` column and no per-node facts).
READABLE_FORMATS = (1, 2)
#: The data files of every snapshot (the manifest lists their sha256).
SNAPSHOT_FILES = ("scores.parquet", "edges.parquet", "seeds.parquet")
_NAME = re.compile(r"^snap-(\d{8})$")
log = logging.getLogger("ranktide.snapshots")


class SnapshotError(RuntimeError):
    """A snapshot could not be written or read; the message says where and why."""


class NoValidSnapshot(SnapshotError):
    """Snapshots exist under a root, but every one fails its checks."""


class OutputError(SnapshotError):
    """An output (a snapshot, the rejects file, a picture) cannot be written: exit code 3."""


def check_writable(folder: Path, what: str, target: Path | None = None) -> Path:
    """Create ``folder`` if needed and prove a file can be made in it, before any long work.

    ``what`` and ``target`` (default: the folder) name the output in the error.

    Raises
    ------
    OutputError
        Naming ``what``, the folder and the system's reason.
    """
    folder = Path(folder)
    try:
        folder.mkdir(parents=True, exist_ok=True)
        fd, probe = tempfile.mkstemp(prefix=".ranktide-probe-", dir=folder)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise OutputError(f"cannot write the {what} {target or folder}: {exc.strerror or exc}") from exc
    return folder


@dataclass
class Counters:
    """Event counts carried from snapshot to snapshot."""

    events_applied: int = 0
    events_noop: int = 0
    events_rejected: int = 0

    def as_dict(self) -> dict[str, int]:
        return {
            "events_applied": self.events_applied,
            "events_noop": self.events_noop,
            "events_rejected": self.events_rejected,
        }


@dataclass
class Snapshot:
    """A loaded snapshot: the rebuilt ranker, its manifest and folder."""

    ranker: Ranker
    manifest: dict
    path: Path
    counters: Counters = field(default_factory=Counters)


# ------------------------------------------------------------------ listing


def snapshot_dirs(root: Path) -> list[Path]:
    """Complete snapshot folders under ``root``, oldest first."""
    root = Path(root)
    if not root.is_dir():
        return []
    found = [(int(m.group(1)), p) for p in root.iterdir() if (m := _NAME.match(p.name)) and p.is_dir()]
    return [p for _, p in sorted(found)]


def next_sequence(root: Path) -> int:
    dirs = snapshot_dirs(root)
    return int(_NAME.match(dirs[-1].name).group(1)) + 1 if dirs else 1


# ------------------------------------------------------------------ writing


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _fsync_file(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _name_ranks(names: pa.Array) -> np.ndarray:
    """Position of every node id in byte-wise name order (Arrow's string order)."""
    import numpy as np
    import pyarrow.compute as pc

    order = pc.sort_indices(names).to_numpy()
    ranks = np.empty(order.size, dtype=np.int64)
    ranks[order] = np.arange(order.size)
    return ranks


def _repeated(text: str, count: int) -> pa.Array:
    """``text`` ``count`` times as a string column (decoded from a one-word dictionary, no object per row)."""
    import numpy as np
    import pyarrow as pa

    codes = pa.array(np.zeros(count, dtype=np.int32))
    return pa.DictionaryArray.from_arrays(codes, pa.array([text], pa.string())).dictionary_decode()


def _edge_order(src: np.ndarray, dst: np.ndarray, ranks: np.ndarray) -> np.ndarray:
    """Order of the edges by (source name, target name): one sort of one int64 key per edge.

    Name ranks are below the node count ``n`` (< 2**31), so ``rank(src) * n
    + rank(dst)`` fits in an int64 and orders the pairs as the names do.
    """
    import numpy as np

    n = np.int64(max(ranks.size, 1))
    return np.argsort(ranks[src] * n + ranks[dst], kind="stable")


def _by_rank(ids: np.ndarray, ranks: np.ndarray) -> np.ndarray:
    """``ids`` reordered so that their names ascend."""
    import numpy as np

    return ids[np.argsort(ranks[ids], kind="stable")]


def snapshot_tables(ranker: Ranker, certificates: dict[str, Certificate]) -> dict[str, pa.Table]:
    """The snapshot's tables, each sorted by name so that equal states give equal files.

    Rows are ordered by integer name ranks (one sort of the node ids) instead
    of sorting the string columns: the same order as sorting by the strings,
    at a fraction of the cost on millions of edges.
    """
    names = ranker.node_names()
    ranks = _name_ranks(names)
    return {**profile_tables(ranker, certificates, names, ranks), "edges.parquet": edge_table(ranker, names, ranks)}


def profile_tables(ranker: Ranker, certificates: dict[str, Certificate], names: pa.Array,
                   ranks: np.ndarray) -> dict[str, pa.Table]:
    """``scores.parquet`` and ``seeds.parquet`` of :func:`snapshot_tables` (``ranks``: :func:`_name_ranks`)."""
    import numpy as np
    import pyarrow as pa

    from ranktide.solver import GLOBAL

    eng = ranker.engine
    n = eng.n_nodes
    score_parts, seed_parts = [], []
    for name in sorted(eng.profiles):
        cert = certificates[name]
        sc = cert.scores
        keep = np.arange(n) if name == GLOBAL else np.flatnonzero(sc)
        keep = _by_rank(keep, ranks)
        score_parts.append(pa.table({
            "node": names.take(pa.array(keep)),
            "profile": _repeated(name, keep.size),
            "score": pa.array(sc[keep], pa.float64()),
            "error_bound": pa.array(cert.bounds[keep], pa.float64()),
        }))
        if name != GLOBAL:
            s = eng.teleport_vector(name)
            seeded = _by_rank(np.flatnonzero(s), ranks)
            seed_parts.append(pa.table({
                "profile": _repeated(name, seeded.size),
                "node": names.take(pa.array(seeded)),
                "weight": pa.array(s[seeded], pa.float64()),
            }))
    empty_seeds = pa.table({"profile": pa.array([], pa.string()), "node": pa.array([], pa.string()),
                            "weight": pa.array([], pa.float64())})
    return {
        "scores.parquet": pa.concat_tables(score_parts),
        "seeds.parquet": pa.concat_tables(seed_parts) if seed_parts else empty_seeds,
    }


def edge_table(ranker: Ranker, names: pa.Array, ranks: np.ndarray) -> pa.Table:
    """``edges.parquet`` of :func:`snapshot_tables`: every edge by (source name, target name)."""
    import pyarrow as pa

    src, dst, w = ranker.engine.graph.edge_list()
    order = _edge_order(src, dst, ranks)
    return pa.table({
        "src": names.take(pa.array(src[order])),
        "dst": names.take(pa.array(dst[order])),
        "weight": pa.array(w[order], pa.float64()),
    })


def parquet_filler(tables: dict[str, pa.Table], encoded: dict[str, pa.Buffer] | None = None):
    """A ``fill`` for :func:`write_prepared_snapshot`: each table as a zstd Parquet file of its name.

    ``encoded`` holds files already encoded (:func:`_parquet_bytes`), written as they are.
    """

    def fill(folder: Path) -> None:
        import pyarrow.parquet as pq

        for fname, table in tables.items():
            pq.write_table(table, folder / fname, compression="zstd")
        for fname, data in (encoded or {}).items():
            with open(folder / fname, "wb") as fh:
                fh.write(data)

    return fill


def _parquet_bytes(table: pa.Table) -> pa.Buffer:
    """``table`` as the bytes of a zstd Parquet file (what :func:`parquet_filler` would write)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    sink = pa.BufferOutputStream()
    pq.write_table(table, sink, compression="zstd")
    return sink.getvalue()


def _encoded_edges(ranker: Ranker, names: pa.Array, ranks: np.ndarray) -> pa.Buffer:
    """``edges.parquet`` sorted and encoded (the work :func:`write_snapshot` hands to a second thread)."""
    return _parquet_bytes(edge_table(ranker, names, ranks))


def _finite(x: float) -> float | None:
    """JSON has no infinity: an uncertified figure is written as null."""
    import numpy as np

    return float(x) if np.isfinite(x) else None


def contract_facts(cert: Certificate, is_global: bool) -> dict:
    """The per-node contract a profile's published scores meet (manifest ``profiles``)."""
    unlisted = cert.bounds[cert.scores == 0.0]
    return {
        "rtol_reached": _finite(cert.rtol_reached),
        "absolute_reached": _finite(cert.absolute_reached),
        "l1_bound": _finite(cert.l1_bound),
        "certified_top": None if is_global else cert.certified_top,
        "certified_threshold": cert.threshold,
        "unlisted_bound": 0.0 if is_global else _finite(float(unlisted.max(initial=0.0))),
    }


def write_snapshot(
    root: Path,
    ranker: Ranker,
    counters: Counters,
    positions: dict,
    sequence: int | None = None,
    created_at: datetime | None = None,
) -> Path:
    """Write a complete snapshot of ``ranker`` atomically and return its folder.

    The residual is recomputed exactly first and the engine settled again, so
    the manifest's ``certified_bound`` is the bound of what the files hold.

    Raises
    ------
    OutputError
        When the root cannot be created or written (permissions, full disk);
        no ``snap-`` folder is left behind in that case.
    """
    from concurrent.futures import ThreadPoolExecutor

    root = Path(root)
    seq = None if sequence is None else int(sequence)
    eng = ranker.engine
    names = ranker.node_names()
    ranks = _name_ranks(names)
    # The edges file does not depend on the scores: it is sorted and encoded in a
    # second thread while this one settles (the kernels, sorts and Parquet
    # encoder release the interpreter lock).
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="snapshot-edges") as pool:
        edges = pool.submit(_encoded_edges, ranker, names, ranks)
        eng.recompute_residual()
        certificates = eng.settle_certified()
        tables = profile_tables(ranker, certificates, names, ranks)
        encoded = {"edges.parquet": edges.result()}
    manifest = {
        "damping": eng.damping,
        "rtol": eng.rtol,
        "tolerance": eng.tolerance,
        "certified_top": eng.certified_top,
        "certified_bound": {name: _finite(c.l1_bound) for name, c in certificates.items()},
        **counters.as_dict(),
        "positions": positions,
        "nodes": eng.n_nodes,
        "edges": eng.n_edges,
        "profiles": {
            name: {"estimate_sum": float(eng.P[k, : eng.n_nodes].sum()),
                   **contract_facts(certificates[name], k == 0)}
            for k, name in enumerate(eng.profiles)
        },
    }
    return write_prepared_snapshot(root, parquet_filler(tables, encoded), manifest, seq, created_at)


def write_prepared_snapshot(root: Path, fill, manifest: dict, sequence: int | None = None,
                            created_at: datetime | None = None) -> Path:
    """Write a snapshot whose three Parquet files ``fill(folder)`` puts into a fresh folder.

    The atomic part of :func:`write_snapshot`, also used by writers outside the
    engine (a full recompute, on Spark or in memory): this function adds
    ``format``, ``sequence``, ``created_at`` and ``files`` (sha256 of each
    file, read in chunks) to ``manifest``, fsyncs and renames.

    Raises
    ------
    OutputError
        When the root cannot be created or written, or ``fill`` leaves a file
        missing; no ``snap-`` folder is left behind then (nor when ``fill``
        raises).
    """
    root = Path(root)
    try:
        root.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create snapshot root {root}: {exc.strerror or exc}") from exc
    seq = next_sequence(root) if sequence is None else int(sequence)
    final = root / f"snap-{seq:08d}"
    partial = root / f".snap-{seq:08d}.partial"
    try:
        _clear_partials(root)
        partial.mkdir()
        fill(partial)
        files = {}
        for fname in SNAPSHOT_FILES:
            if not (partial / fname).is_file():
                raise OutputError(f"cannot write snapshot {final}: {fname} was not written")
            _fsync_file(partial / fname)
            files[fname] = _sha256(partial / fname)
        manifest = {
            **manifest,
            "format": FORMAT,
            "sequence": seq,
            "created_at": (created_at or datetime.now(timezone.utc)).isoformat(timespec="milliseconds"),
            "files": files,
        }
        with open(partial / "manifest.json", "w", encoding="utf-8") as fh:
            json.dump(manifest, fh, indent=2, sort_keys=True)
            fh.write("\n")
            fh.flush()
            os.fsync(fh.fileno())
        _fsync_dir(partial)
        os.rename(partial, final)
        _fsync_dir(root)
    except OSError as exc:
        shutil.rmtree(partial, ignore_errors=True)
        raise OutputError(f"cannot write snapshot {final}: {exc.strerror or exc}") from exc
    except BaseException:  # fill failed (a Spark job, an interrupt): no half snapshot stays behind
        shutil.rmtree(partial, ignore_errors=True)
        raise
    return final


def _clear_partials(root: Path) -> None:
    for p in root.glob(".snap-*.partial"):
        shutil.rmtree(p, ignore_errors=True)


def prune(root: Path, keep: int) -> list[Path]:
    """Delete all but the newest ``keep`` snapshots; return what was removed."""
    dirs = snapshot_dirs(root)
    doomed = dirs[: max(len(dirs) - max(int(keep), 1), 0)]
    for p in doomed:
        shutil.rmtree(p, ignore_errors=True)
    return doomed


# ------------------------------------------------------------------ reading


def read_manifest(path: Path) -> dict:
    """The manifest of snapshot folder ``path``."""
    try:
        with open(Path(path) / "manifest.json", encoding="utf-8") as fh:
            return json.load(fh)
    except (OSError, json.JSONDecodeError) as exc:
        raise SnapshotError(f"{path}: unreadable manifest.json: {exc}") from exc


#: Manifest keys every reader relies on.
REQUIRED_KEYS = ("sequence", "created_at", "damping", "tolerance", "certified_bound", "events_applied",
                 "events_noop", "events_rejected", "profiles", "files")
#: Files every snapshot must hold, each with its checksum in the manifest.
REQUIRED_FILES = ("scores.parquet", "edges.parquet", "seeds.parquet")


def problem(path: Path, manifest: dict) -> str | None:
    """Why snapshot folder ``path`` must not be read (a missing key, file or checksum), or None.

    Every file the manifest lists is hashed again and compared with its
    sha256, so a truncated or bit-flipped file is caught before any reader
    parses it.
    """
    if manifest.get("format") not in READABLE_FORMATS:
        return (f"snapshot format {manifest.get('format')!r}, "
                f"this version reads {', '.join(map(str, READABLE_FORMATS))}")
    missing = [key for key in REQUIRED_KEYS if key not in manifest]
    if missing:
        return f"manifest.json lacks {', '.join(missing)}"
    files = manifest["files"]
    if not isinstance(files, dict) or not isinstance(manifest["certified_bound"], dict):
        return "manifest.json is malformed (files and certified_bound must be objects)"
    unlisted = [name for name in REQUIRED_FILES if name not in files]
    if unlisted:
        return f"manifest.json has no checksum for {', '.join(unlisted)}"
    for fname, digest in files.items():
        f = Path(path) / fname
        if not f.is_file():
            return f"{fname} is missing"
        try:
            if _sha256(f) != digest:
                return f"{fname} fails its sha256 checksum"
        except OSError as exc:
            return f"cannot read {fname}: {exc.strerror or exc}"
    return None


def verify(path: Path, manifest: dict) -> None:
    """Check the manifest and every file against its sha256; raise SnapshotError on a problem."""
    reason = problem(path, manifest)
    if reason is not None:
        raise SnapshotError(f"{path}: {reason}")


def inspect_snapshot(path: Path) -> tuple[dict | None, str | None]:
    """The manifest of snapshot folder ``path`` and why it must not be read (None when valid)."""
    try:
        manifest = read_manifest(path)
    except SnapshotError as exc:
        return None, str(exc).removeprefix(f"{path}: ")
    if not isinstance(manifest, dict):
        return None, "manifest.json is not a JSON object"
    return manifest, problem(path, manifest)


def is_snapshot_folder(path: Path) -> bool:
    """Whether ``path`` is one snapshot's folder (it holds a manifest) rather than a root."""
    return (Path(path) / "manifest.json").is_file()


@dataclass
class Selected:
    """The snapshot a reading command serves, and the newer ones it passed over.

    Attributes
    ----------
    path : Path
        The snapshot folder.
    manifest : dict
        Its manifest (checked).
    skipped : list of (str, str)
        Name and reason of every newer snapshot that failed its checks.
    """

    path: Path
    manifest: dict
    skipped: list[tuple[str, str]] = field(default_factory=list)


def select_snapshot(root: Path, name: str | None = None, on_skip=None) -> Selected:
    """The newest valid snapshot under ``root``, or the one asked for.

    Parameters
    ----------
    root : Path
        A snapshot root, or one snapshot folder itself.
    name : str, optional
        A snapshot folder name under ``root`` (``--snapshot NAME``): that
        one or an error, never another.
    on_skip : callable, optional
        Called with ``(name, reason)`` for each newer snapshot passed over.

    Raises
    ------
    SnapshotError
        When the asked-for snapshot is missing or invalid, or no snapshot
        under ``root`` is valid; the message names the place and the reason.
    """
    root = Path(root)
    if is_snapshot_folder(root):
        if name is not None and name != root.name:
            raise SnapshotError(f"{root} is itself a snapshot folder; --snapshot {name} names another")
        candidates, explicit = [root], True
    elif name is not None:
        if not (root / name).is_dir():
            raise SnapshotError(f"{root}: no snapshot named {name}")
        candidates, explicit = [root / name], True
    else:
        if not root.is_dir():
            raise SnapshotError(f"{root}: {'not a folder' if root.exists() else 'no such folder'}")
        try:
            candidates, explicit = list(reversed(snapshot_dirs(root))), False
        except OSError as exc:
            raise SnapshotError(f"{root}: cannot list snapshots: {exc.strerror or exc}") from exc
        if not candidates:
            raise SnapshotError(f"{root}: no snapshot here (expected folders named snap-NNNNNNNN)")
    skipped = []
    for path in candidates:
        manifest, reason = inspect_snapshot(path)
        if reason is None:
            return Selected(path, manifest, skipped)
        if explicit:
            raise SnapshotError(f"{path}: {reason}")
        skipped.append((path.name, reason))
        if on_skip is not None:
            on_skip(path.name, reason)
    raise NoValidSnapshot(f"{root}: no valid snapshot ({len(skipped)} skipped, each failing its checks)")


def _intern_column(ids: NodeIds, column: pa.ChunkedArray) -> np.ndarray:
    """Ids of a dictionary-encoded string column: each distinct dictionary is interned once.

    The chunks of one Parquet row group share its dictionary.
    """
    import numpy as np

    parts = []
    dictionary, mapping = None, None
    for chunk in column.chunks:
        if chunk.null_count:
            raise SnapshotError("node ids must not be null")
        if dictionary is None or not chunk.dictionary.equals(dictionary):
            dictionary, mapping = chunk.dictionary, ids.intern(chunk.dictionary)
        parts.append(mapping[chunk.indices.to_numpy()])
    return np.concatenate(parts) if parts else np.zeros(0, np.int32)


def _targets(manifest: dict) -> dict:
    """The settle targets a snapshot was written under (format 1 had the L1 tolerance only)."""
    if manifest.get("format") == 1:
        return {"rtol": None, "tolerance": manifest["tolerance"]}
    from ranktide.solver.bounds import CERTIFIED_TOP

    return {"rtol": manifest.get("rtol"), "tolerance": manifest.get("tolerance"),
            "certified_top": manifest.get("certified_top") or CERTIFIED_TOP}


def load_snapshot(path: Path, check: bool = True) -> Snapshot:
    """Rebuild a ranker from snapshot folder ``path`` (residual recomputed exactly)."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    from ranktide.solver import GLOBAL, Ranker
    from ranktide.solver.ids import NodeIds

    path = Path(path)
    manifest = read_manifest(path)
    if manifest.get("format") not in READABLE_FORMATS:
        raise SnapshotError(f"{path}: snapshot format {manifest.get('format')!r}, "
                            f"this version reads {', '.join(map(str, READABLE_FORMATS))}")
    if check:
        verify(path, manifest)
    try:
        scores = pq.read_table(path / "scores.parquet")
        edges = pq.read_table(path / "edges.parquet", read_dictionary=["src", "dst"])
        seeds = pq.read_table(path / "seeds.parquet")
    except (OSError, pa.ArrowException) as exc:
        raise SnapshotError(f"{path}: unreadable Parquet file: {exc}") from exc
    ranker = Ranker(damping=manifest["damping"], **_targets(manifest))
    glob = scores.filter(pa.compute.equal(scores["profile"], GLOBAL))
    ranker.ids = NodeIds(glob["node"])
    n = len(ranker.ids)
    if n != glob.num_rows:
        raise SnapshotError(f"{path}: scores.parquet names a node twice in the global profile")
    estimates, teleports = {}, {}
    for name, info in manifest["profiles"].items():
        part = scores.filter(pa.compute.equal(scores["profile"], name))
        p = np.zeros(n)
        p[ranker.ids.intern(part["node"].combine_chunks())] = part["score"].to_numpy() * info["estimate_sum"]
        estimates[name] = p
        sd = seeds.filter(pa.compute.equal(seeds["profile"], name))
        s = np.zeros(n)
        s[ranker.ids.intern(sd["node"].combine_chunks())] = sd["weight"].to_numpy()
        teleports[name] = s
    if len(ranker.ids) != n:
        raise SnapshotError(f"{path}: scores or seeds name nodes missing from the global profile")
    src = _intern_column(ranker.ids, edges["src"])
    dst = _intern_column(ranker.ids, edges["dst"])
    if len(ranker.ids) != n:
        raise SnapshotError(f"{path}: edges.parquet names nodes missing from scores.parquet")
    try:
        ranker.engine.restore(n, (src, dst, edges["weight"].to_numpy()), estimates, teleports)
    except ValueError as exc:
        raise SnapshotError(f"{path}: edges.parquet: {exc}") from exc
    counters = Counters(manifest["events_applied"], manifest["events_noop"], manifest["events_rejected"])
    return Snapshot(ranker, manifest, path, counters)


def load_latest(root: Path) -> Snapshot | None:
    """The newest snapshot that passes its checks, or None when there is none.

    A snapshot that fails its checksum or cannot be read is skipped with a
    warning in favour of the one before it.
    """
    for path in reversed(snapshot_dirs(root)):
        try:
            return load_snapshot(path)
        except SnapshotError as exc:
            log.warning("skipping snapshot: %s", exc)
    return None
