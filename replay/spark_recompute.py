"""The full recompute on Apache Spark DataFrames (``ranktide recompute --engine spark``).

The same iteration as ``solver.recompute``, written on DataFrames: every
profile is a column of one node table, one iteration is a join of the edges
with the current iterate, a group-by on the destination and a join back::

    c_j(v) = sum_{u -> v} P(u, v) x_j(u)        x_j'(v) = a s_j(v) + d c_j(v)
    r_j(v) = (x_j'(v) - x_j(v)) / a

Dangling nodes have no rows in ``P`` (their mass is dropped, then the scores
normalised: NetworkX's convention). The certificate of each iterate is
computed in the job from aggregates (largest and total residual, sums, the
K-th best score) with the scalar rules of ``solver.recompute`` and the
per-node bound as a column expression (``solver.bounds``).

Measured pitfalls this module avoids (issue 12): the lineage is cut every
iteration (a local checkpoint, or a reliable one when a checkpoint folder is
set) and the previous checkpoint is released; node ids from
``monotonically_increasing_id`` are fixed once by a checkpoint; nodes without
edges (node table, seeds) are part of the node table and count in the
normalisation; local mode uses few shuffle partitions.
"""

from __future__ import annotations

import contextlib
import math
import shutil
import time
from dataclasses import dataclass
from pathlib import Path

from ranktide.solver import GLOBAL
from ranktide.solver.bounds import ROUNDING_FLOOR
from ranktide.solver.engine import MAX_WEIGHT, MIN_WEIGHT
from ranktide.solver.recompute import bound_terms, profile_met
from ranktide.replay.recompute_common import (RecomputeError, RecomputeInput, Settings, print_progress,
                                              recompute_manifest, write)

#: Shuffle partitions in local mode: the default 200 made each iteration about 7x slower (issue 12).
LOCAL_SHUFFLE_PARTITIONS = "4"

INSTALL_HINT = "--engine spark needs pyspark: pip install 'ranktide[spark]'"


@contextlib.contextmanager
def spark_session(master: str | None, conf: dict[str, str]):
    """A SparkSession for one recompute (stopped afterwards); local mode needs no configuration.

    ``spark.checkpoint.dir`` (a ``--spark-conf``) makes the iteration use
    reliable checkpoints in that folder instead of local ones. A session
    already active in this process (a notebook, a test) is used as it is and
    left running.
    """
    try:
        from pyspark.sql import SparkSession
    except ImportError:
        raise RecomputeError(INSTALL_HINT) from None
    active = SparkSession.getActiveSession()
    if active is not None:
        yield active
        return
    master = master or "local[*]"
    settings = {"spark.ui.showConsoleProgress": "false",
                "spark.cleaner.referenceTracking.cleanCheckpoints": "true"}
    if master.startswith("local"):
        # tiny stages: few partitions, and no adaptive re-planning of each iteration's three shuffles
        settings["spark.sql.shuffle.partitions"] = LOCAL_SHUFFLE_PARTITIONS
        settings["spark.sql.adaptive.enabled"] = "false"
    settings.update(conf)
    builder = SparkSession.builder.appName("ranktide recompute").master(master)
    for key, value in settings.items():
        builder = builder.config(key, value)
    try:
        spark = builder.getOrCreate()
    except Exception as exc:  # the JVM failed to start: Java missing, a bad setting
        raise RecomputeError(f"cannot start Spark (master {master}): {str(exc).splitlines()[0]}") from None
    spark.sparkContext.setLogLevel("ERROR")
    if "spark.checkpoint.dir" in settings:
        spark.sparkContext.setCheckpointDir(settings["spark.checkpoint.dir"])
    try:
        yield spark
    finally:
        spark.stop()


class Lineage:
    """Cuts a DataFrame's lineage (checkpoint) and releases the previous cut of the same chain."""

    def __init__(self, spark) -> None:
        self.sc = spark.sparkContext
        self.reliable = self.sc.getCheckpointDir() is not None
        self._held: list[int] = []

    def _persisted(self) -> set[int]:
        listed = self.sc._jsc.sc().getPersistentRDDs().keys().mkString(",")  # one call to the JVM
        return {int(x) for x in listed.split(",") if x}

    def fix(self, df, eager: bool = True):
        """Checkpoint ``df`` once for good (kept to the end)."""
        return df.checkpoint(eager) if self.reliable else df.localCheckpoint(eager)

    def cut(self, df):
        """Checkpoint ``df``; it is materialised by its first action, after which call :meth:`release_older`."""
        before = self._persisted()
        out = df.checkpoint(False) if self.reliable else df.localCheckpoint(False)
        self._held.append(sorted(self._persisted() - before))
        return out

    def release_older(self) -> None:
        """Release every cut but the newest (call once the newest has been materialised)."""
        while len(self._held) > 1:
            self._release(self._held.pop(0))

    def _release(self, rdd_ids: list[int]) -> None:
        rdds = self.sc._jsc.sc().getPersistentRDDs()
        for i in rdd_ids:
            found = rdds.get(i)
            if found.isDefined():
                found.get().unpersist(False)

    def close(self) -> None:
        for ids in self._held:
            self._release(ids)
        self._held = []


def _columns(df, where: str, need: list[str], what: str) -> None:
    missing = [c for c in need if c not in df.columns]
    if missing:
        raise RecomputeError(f"{where}: the {what} has no column {missing[0]!r} (columns: {', '.join(df.columns)})")


def read_edges(spark, inp: RecomputeInput):
    """``(src, dst, weight)`` with string ids and double weights, checked: no nulls, weights in range, no pair twice."""
    from pyspark.sql import functions as F
    from pyspark.errors import PySparkException

    try:
        raw = spark.read.parquet(inp.edges)
    except PySparkException as exc:
        raise RecomputeError(f"{inp.edges}: cannot read the edge table: {str(exc).splitlines()[0]}") from None
    _columns(raw, inp.edges, ["src", "dst"], "edge table")
    weight = F.col("weight").cast("double") if "weight" in raw.columns else F.lit(1.0)
    edges = raw.select(F.col("src").cast("string").alias("src"), F.col("dst").cast("string").alias("dst"),
                       weight.alias("weight"))
    pairs = edges.groupBy("src", "dst").agg(
        F.count(F.lit(1)).alias("rows"),
        F.sum(F.when(~((F.col("weight") >= MIN_WEIGHT) & (F.col("weight") <= MAX_WEIGHT))
                     | F.col("weight").isNull(), 1).otherwise(0)).alias("bad"))
    found = pairs.agg(  # one job checks all three: null ids, weights, pairs listed twice
        F.sum(F.when(F.col("src").isNull() | F.col("dst").isNull(), F.col("rows")).otherwise(0)).alias("nulls"),
        F.sum("bad").alias("weights"), F.sum("rows").alias("rows"),
        F.max_by(F.concat_ws(" -> ", "src", "dst"), "rows").alias("pair"), F.max("rows").alias("most"),
    ).collect()[0]
    if found["nulls"]:
        raise RecomputeError(f"{inp.edges}: {found['nulls']} rows have a null src or dst")
    if found["weights"]:
        raise RecomputeError(f"{inp.edges}: {found['weights']} rows have a weight that is null, not finite or "
                             f"outside [{MIN_WEIGHT:g}, {MAX_WEIGHT:g}]")
    if (found["most"] or 0) > 1:
        raise RecomputeError(f"{inp.edges}: the pair {found['pair']} is listed {found['most']} times")
    return edges


def _seeds_frame(spark, inp: RecomputeInput):
    rows = [(name, node, float(w)) for name, (nodes, weights) in inp.seeds.items() for node, w in zip(nodes, weights)]
    return spark.createDataFrame(rows, "profile string, node string, weight double")


def _node_names(spark, inp: RecomputeInput, edges, seeds):
    """Every node: edge endpoints, the node table (nodes without edges) and the seeds."""
    from pyspark.sql import functions as F

    parts = [edges.select(F.col("src").alias("node")), edges.select(F.col("dst").alias("node")),
             seeds.select("node")]
    if inp.nodes is not None:
        try:
            table = spark.read.parquet(inp.nodes)
        except Exception as exc:
            raise RecomputeError(f"{inp.nodes}: cannot read the node table: {str(exc).splitlines()[0]}") from None
        _columns(table, inp.nodes, ["node"], "node table")
        if "profile" in table.columns:  # a snapshot's scores: the global rows list every node
            table = table.filter(F.col("profile") == GLOBAL)
        parts.append(table.select(F.col("node").cast("string").alias("node")))
    names = parts[0]
    for part in parts[1:]:
        names = names.unionByName(part)
    return names.filter(F.col("node").isNotNull()).distinct()


class _Profile:
    """Driver-side facts of one profile's current iterate."""

    def __init__(self, name: str, j: int, certified_top: int | None, empty: bool) -> None:
        self.name, self.j, self.top, self.empty = name, j, certified_top, empty
        self.terms = None
        self.threshold = 0.0
        self.rtol_reached = self.absolute_reached = 0.0
        self.unlisted = 0.0
        self.rho = 0.0
        self.max_scale = 0.0  # max |x| / sum x: the bounds' rounding floor counts it

    def facts(self, n_nodes: int) -> dict:
        def fin(x: float) -> float | None:
            return float(x) if math.isfinite(x) else None

        glob = self.name == GLOBAL
        return {"estimate_sum": self.terms.total if self.terms else 0.0,
                "rtol_reached": fin(self.rtol_reached), "absolute_reached": fin(self.absolute_reached),
                "l1_bound": fin(self.terms.l1 if self.terms else 0.0),
                "certified_top": None if glob else min(self.top, n_nodes), "certified_threshold": self.threshold,
                "unlisted_bound": 0.0 if glob else fin(self.unlisted)}


@dataclass
class _Graph:
    """The input on Spark: node ids, ``P`` by source, the first iterate, and what the output needs."""

    edges: object      # (src, dst, weight) as read
    ids: object        # (name, id), ids fixed by a checkpoint
    P: object          # (sid, did, p), hash-partitioned on sid
    X: object          # (id, s0.., x0..), hash-partitioned on id alike
    seeded: object     # (node, profile, weight, id) of the non-zero seeds
    profiles: list[str]
    n_nodes: int
    n_edges: int


def _load(spark, inp: RecomputeInput, lineage: "Lineage", damping: float) -> _Graph:
    """Read and check the input, fix node ids once, build ``P`` and the first iterate ``a s``."""
    from pyspark.sql import functions as F

    edges = read_edges(spark, inp)
    seeds = _seeds_frame(spark, inp)
    names = lineage.fix(_node_names(spark, inp, edges, seeds).withColumn("id", F.monotonically_increasing_id()))
    ids = names.select(F.col("node").alias("name"), "id")
    weighted = (edges.join(ids.withColumnRenamed("name", "src").withColumnRenamed("id", "sid"), "src")
                .join(ids.withColumnRenamed("name", "dst").withColumnRenamed("id", "did"), "dst"))
    out_w = weighted.groupBy("sid").agg(F.sum("weight").alias("out_w"))
    # P and the iterate are hash-partitioned alike on the source node, so that only the
    # group-by on the destination shuffles in each iteration (checkpoints keep the partitioning)
    parts = int(spark.conf.get("spark.sql.shuffle.partitions"))
    P = lineage.fix(weighted.join(out_w, "sid").select("sid", "did", (F.col("weight") / F.col("out_w")).alias("p"))
                    .repartition(parts, "sid"))
    profiles = [GLOBAL] + sorted(n for n in inp.seeds if n != GLOBAL)
    k = len(profiles)
    s_cols = [F.lit(1.0).alias("s0")]
    seeded = seeds.filter(F.col("weight") != 0.0).join(ids.withColumnRenamed("name", "node"), "node")
    state = names.select("id")
    if k > 1:
        seed_sums = seeded.groupBy("id").agg(*[
            F.sum(F.when(F.col("profile") == name, F.col("weight")).otherwise(0.0)).alias(f"s{j}")
            for j, name in enumerate(profiles) if j > 0])
        state = state.join(seed_sums, "id", "left")
        s_cols += [F.coalesce(F.col(f"s{j}"), F.lit(0.0)).alias(f"s{j}") for j in range(1, k)]
    a = 1.0 - damping
    X = lineage.fix(state.select("id", *s_cols).select(
        "id", *[f"s{j}" for j in range(k)], *[(a * F.col(f"s{j}")).alias(f"x{j}") for j in range(k)])
        .repartition(parts, "id"))
    return _Graph(edges, ids, P, X, seeded, profiles, names.count(), P.count())


def _step(g: _Graph, X, damping: float):
    """One iteration: ``(id, s, x, n, r)`` with ``n = a s + d P^T x`` and ``r = (n - x) / a``."""
    from pyspark.sql import functions as F

    a, d, k = 1.0 - damping, damping, len(g.profiles)
    contrib = (g.P.join(X.select(F.col("id").alias("sid"), *[f"x{j}" for j in range(k)]), "sid")
               .groupBy("did").agg(*[F.sum(F.col("p") * F.col(f"x{j}")).alias(f"c{j}") for j in range(k)]))
    nxt = X.join(contrib, X.id == contrib.did, "left").select(
        "id", *[f"s{j}" for j in range(k)], *[f"x{j}" for j in range(k)],
        *[(a * F.col(f"s{j}") + d * F.coalesce(F.col(f"c{j}"), F.lit(0.0))).alias(f"n{j}") for j in range(k)])
    return nxt.select("*", *[((F.col(f"n{j}") - F.col(f"x{j}")) / a).alias(f"r{j}") for j in range(k)])


def recompute_spark(spark, inp: RecomputeInput, out: Path, settings: Settings, staging: str | None = None,
                    progress: bool = True, max_iter: int = 10_000) -> Path:
    """Recompute every profile on Spark and write the snapshot into ``out``; returns its folder."""
    from pyspark.sql import functions as F

    started = time.perf_counter()
    lineage = Lineage(spark)
    g = _load(spark, inp, lineage, settings.damping)
    k = len(g.profiles)
    state_of = [_Profile(name, j, None if j == 0 else settings.targets.certified_top,
                         j > 0 and not any(inp.seeds[name][1])) for j, name in enumerate(g.profiles)]
    X, last = g.X, time.perf_counter()
    for iteration in range(1, max_iter + 1):
        nxt = lineage.cut(_step(g, X, settings.damping))
        figures = _certify(nxt, state_of, k, settings)  # its first aggregate materialises the cut
        lineage.release_older()
        if progress:
            now = time.perf_counter()
            print_progress(iteration, figures, now - last)
            last = now
        if all(profile_met(settings.targets, p.rtol_reached, p.absolute_reached, p.terms.l1) for p in state_of):
            break
        X = nxt.select("id", *[f"s{j}" for j in range(k)], *[F.col(f"n{j}").alias(f"x{j}") for j in range(k)])
    else:
        raise RecomputeError(f"{inp.edges}: no certified result after {max_iter} iterations", code=1)
    seeds_out = g.seeded.groupBy("profile", "node").agg(F.sum("weight").alias("weight"))
    tables = {"scores.parquet": (_scores(nxt, g.ids, state_of), ["profile", "node"]),
              "edges.parquet": (g.edges, ["src", "dst"]),
              "seeds.parquet": (seeds_out.select("profile", "node", "weight"), ["profile", "node"])}
    manifest = recompute_manifest(settings, "spark", iteration, g.n_nodes, g.n_edges,
                                  {p.name: p.facts(g.n_nodes) for p in state_of}, inp,
                                  time.perf_counter() - started, {"master": spark.sparkContext.master})

    def fill(folder: Path) -> None:
        for fname, (df, order) in tables.items():
            write_single_parquet(spark, df, order, folder / fname, staging)

    path = write(out, fill, manifest)
    lineage.close()
    return path


def _bound_expr(p: _Profile, xbar_g):
    """Column of every node's certified bound (``solver.bounds.normalised_bounds``, plain lemma)."""
    from pyspark.sql import functions as F

    t = p.terms
    x = F.col(f"x{p.j}")
    if p.empty:
        return F.lit(0.0)
    if not t.usable:
        return F.lit(t.l1)
    err = F.lit(0.0) if t.rho == 0.0 else F.lit(t.rho) * xbar_g
    raw = (err + F.abs(x) / F.lit(t.total) * F.lit(t.drift)) / F.lit(t.total - t.drift)
    scale = F.abs(x) / F.lit(t.total)
    return F.greatest(F.least(raw, F.lit(t.l1)), F.lit(ROUNDING_FLOOR) * (scale + F.lit(p.max_scale)))


def _score_expr(p: _Profile):
    from pyspark.sql import functions as F

    if p.empty or p.terms.total <= 0.0:
        return F.lit(0.0)
    return F.col(f"x{p.j}") / F.lit(p.terms.total)


def _certify(nxt, state_of: list[_Profile], k: int, settings: Settings) -> dict[str, tuple[float, float, float]]:
    """Aggregates of the iterate, then each profile's certificate (``solver.bounds.certify``) in the job.

    Returns, per profile, ``(max |r|, certified relative error, L1 bound)``;
    while a lower bound on the relative error still fails the target, the
    exact certificate (a second pass and a top-K) is skipped and the lower
    bound is returned.
    """
    from pyspark.sql import functions as F

    aggs = [F.sum(F.greatest(F.col("x0"), F.lit(0.0))).alias("gpos")]
    for j in range(k):
        x, r = F.col(f"x{j}"), F.col(f"r{j}")
        aggs += [F.max(F.abs(r)).alias(f"rho{j}"), F.sum(F.abs(r)).alias(f"r1{j}"), F.sum(x).alias(f"tot{j}"),
                 F.sum(F.abs(x)).alias(f"abs{j}"), F.sum(F.when(x > 0, 1).otherwise(0)).alias(f"pos{j}"),
                 F.min(F.when(x > 0, x)).alias(f"minpos{j}"), F.max(x).alias(f"max{j}"),
                 F.max(F.abs(x)).alias(f"amax{j}"),
                 F.max_by(F.col("x0"), x).alias(f"gat{j}")]
    row = nxt.agg(*aggs).collect()[0]
    rho_g = float(row["rho0"] or 0.0)
    xbar_g = F.greatest(F.col("x0"), F.lit(0.0)) / F.lit(1.0 - rho_g) if rho_g < 1.0 else F.lit(math.inf)
    sum_xbar = float(row["gpos"]) / (1.0 - rho_g) if rho_g < 1.0 else math.inf
    for p in state_of:
        j = p.j
        p.rho = float(row[f"rho{j}"] or 0.0)
        sum_err = 0.0 if p.rho == 0.0 else p.rho * sum_xbar
        p.terms = bound_terms(p.rho, float(row[f"r1{j}"] or 0.0), float(row[f"tot{j}"] or 0.0),
                              float(row[f"abs{j}"] or 0.0), sum_err)
        p.max_scale = float(row[f"amax{j}"] or 0.0) / p.terms.total if p.terms.total > 0.0 else 0.0
        p.rtol_reached = p.absolute_reached = 0.0 if p.empty else _lower_rtol(p, row, rho_g)
    if not all(profile_met(settings.targets, p.rtol_reached, 0.0, p.terms.l1) for p in state_of):
        return {p.name: (p.rho, p.rtol_reached, p.terms.l1) for p in state_of}
    second = []
    for p in state_of:
        j = p.j
        if p.empty:
            p.threshold = p.rtol_reached = p.absolute_reached = p.unlisted = 0.0
            continue
        score, bound = _score_expr(p), _bound_expr(p, xbar_g)
        p.threshold = _kth_score(nxt, p, row, score)
        in_top = score >= F.lit(p.threshold) if p.threshold > 0.0 else score > 0.0
        lower = score - bound
        second += [
            F.max(F.when(in_top, F.when(lower > 0, bound / lower).otherwise(F.lit(math.inf)))).alias(f"rel{j}"),
            F.max(F.when(~in_top, bound)).alias(f"rest{j}"),
            F.min(F.when(in_top & (score == F.lit(p.threshold)), F.lit(p.threshold) - bound)).alias(f"atk{j}"),
            F.max(F.when(score == 0.0, bound)).alias(f"unl{j}"),
        ]
    if second:
        row2 = nxt.agg(*second).collect()[0]
        for p in state_of:
            if not p.empty:
                _take_certificate(p, row2)
    return {p.name: (p.rho, max(p.rtol_reached, p.absolute_reached), p.terms.l1) for p in state_of}


def _kth_score(nxt, p: _Profile, row, score) -> float:
    """The K-th best significant score (``solver.bounds.certify``): scores within the rounding floor of zero never set it."""
    from pyspark.sql import functions as F

    j, total = p.j, p.terms.total
    positives = int(row[f"pos{j}"])
    if positives == 0 or total <= 0.0:
        return 0.0
    floor = ROUNDING_FLOOR * (float(row[f"max{j}"]) / total)
    top = positives if p.top is None else min(p.top, positives)
    if top >= positives:
        kth = float(row[f"minpos{j}"]) / total
    else:
        best = nxt.select(score.alias("score")).orderBy(F.col("score").desc()).limit(top)
        kth = float(best.agg(F.min("score")).collect()[0][0])
    if kth > floor:
        return kth
    # fewer than K significant scores: the smallest significant one
    smallest = nxt.select(score.alias("score")).filter(F.col("score") > floor).agg(F.min("score")).collect()[0][0]
    return 0.0 if smallest is None else float(smallest)


def _take_certificate(p: _Profile, row) -> None:
    """The figures of ``solver.bounds.certify`` from the second pass's aggregates."""
    j = p.j
    p.rtol_reached = float(row[f"rel{j}"]) if row[f"rel{j}"] is not None else 0.0
    worst = row[f"rest{j}"]
    p.absolute_reached = 0.0
    if worst is not None:
        floor = p.threshold if p.threshold > 0.0 else 0.0
        if p.threshold > 0.0 and row[f"atk{j}"] is not None:
            floor = min(float(row[f"atk{j}"]), p.threshold)
        worst = float(worst)
        p.absolute_reached = worst / floor if floor > 0.0 else (0.0 if worst == 0.0 else math.inf)
    p.unlisted = float(row[f"unl{j}"]) if row[f"unl{j}"] is not None else 0.0


def _lower_rtol(p: _Profile, row, rho_g: float) -> float:
    """A lower bound on the certified relative error: the one of the best node (always certified).

    Its bound is at least ``min(raw, l1)`` with ``raw`` of :func:`_bound_expr`,
    from the aggregates alone; when this already exceeds ``rtol`` the exact
    certificate is not computed.
    """
    t = p.terms
    best = float(row[f"max{p.j}"] or 0.0)
    if not t.usable or best <= 0.0:
        return math.inf
    xbar = max(float(row[f"gat{p.j}"] or 0.0), 0.0) / (1.0 - rho_g) if rho_g < 1.0 else math.inf
    raw = (t.rho * xbar + best / t.total * t.drift) / (t.total - t.drift) if t.rho > 0.0 else \
        best / t.total * t.drift / (t.total - t.drift)
    return min(raw, t.l1) / (best / t.total)


def _scores(nxt, ids, state_of: list[_Profile]):
    """``(node, profile, score, error_bound)``: every node of the global profile, the non-zero scores of the others."""
    from pyspark.sql import functions as F

    glob = state_of[0]
    rho_g = glob.rho
    xbar_g = F.greatest(F.col("x0"), F.lit(0.0)) / F.lit(1.0 - rho_g) if rho_g < 1.0 else F.lit(math.inf)
    parts = []
    for p in state_of:
        part = nxt.select("id", F.lit(p.name).alias("profile"), _score_expr(p).alias("score"),
                          _bound_expr(p, xbar_g).alias("error_bound"))
        if p.name != GLOBAL:
            part = part.filter(F.col("score") != 0.0)
        parts.append(part)
    table = parts[0]
    for part in parts[1:]:
        table = table.unionByName(part)
    return table.join(ids, "id").select(F.col("name").alias("node"), "profile", "score", "error_bound")


def write_single_parquet(spark, df, order: list[str], dest: Path, staging: str | None) -> None:
    """Write ``df`` sorted by ``order`` as the single Parquet file ``dest``.

    Spark writes one part file (one partition) into a staging folder; the part
    file is then moved (local) or copied with Hadoop's FileSystem (``hdfs://``,
    ``s3a://``) to ``dest`` and the staging folder removed.
    """
    dest = dest.resolve()
    where = f"{staging.rstrip('/')}/{dest.stem}" if staging else (dest.parent / f".spark-{dest.stem}").as_uri()
    try:
        df.repartition(1).sortWithinPartitions(*order).write.mode("overwrite").parquet(where)
    except Exception as exc:
        raise RecomputeError(f"{where}: Spark cannot write {dest.name}: {str(exc).splitlines()[0]}", code=3) from None
    jvm = spark.sparkContext._jvm
    conf = spark.sparkContext._jsc.hadoopConfiguration()
    folder = jvm.org.apache.hadoop.fs.Path(where)
    fs = folder.getFileSystem(conf)
    parts = [st.getPath() for st in fs.listStatus(folder)
             if st.getPath().getName().startswith("part-") and st.getPath().getName().endswith(".parquet")]
    if len(parts) != 1:
        raise RecomputeError(f"{where}: expected one part file, Spark wrote {len(parts)}", code=3)
    fs.copyToLocalFile(False, parts[0], jvm.org.apache.hadoop.fs.Path(dest.as_uri()), True)
    fs.delete(folder, True)
    shutil.rmtree(dest.parent / f".spark-{dest.stem}", ignore_errors=True)
