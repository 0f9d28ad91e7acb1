"""The report of ``ranktide bench``: text tables and the log-log plot."""

from __future__ import annotations

import math
from pathlib import Path

from ranktide.replay.bench_common import SIZES
from ranktide.replay.bench_contenders import LABELS


# ====================================================================== plot


def write_plot(report: dict, path: Path) -> None:
    """Log-log plot of seconds per event against batch size (ranktide and the warm start)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(8, 5.5), dpi=120)
    colours = {"tiny": "tab:gray", "small": "tab:green", "medium": "tab:blue", "large": "tab:purple"}
    for size, rows in report["scaling"].items():
        g = SIZES[size]
        b = [r["batch"] for r in rows]
        tag = f"{size}: {g[0]:,} nodes / {g[1]:,} edges"
        ax.loglog(b, [r["ranktide_seconds_per_event"] for r in rows], "o-", color=colours[size],
                  label=f"ranktide incremental ({tag})")
        ax.loglog(b, [r["warm_start_seconds_per_event"] for r in rows], "s--", color=colours[size],
                  alpha=0.7, label=f"SciPy power iteration, warm ({tag})")
    ax.set_xlabel("events per batch")
    ax.set_ylabel("seconds per event (certified normalised L1 1e-6)")
    m = report["machine"]
    ax.set_title(f"Cost per event of keeping PageRank fresh\n{m['nproc']} CPUs, {m['date'][:10]}")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)


# ====================================================================== tables


def _fmt_time(seconds: float | None) -> str:
    """Seconds with a readable unit."""
    if seconds is None or not math.isfinite(seconds):
        return "-"
    for unit, scale in (("s", 1.0), ("ms", 1e-3), ("us", 1e-6)):
        if seconds >= scale or unit == "us":
            return f"{seconds / scale:.3g} {unit}"
    return f"{seconds:.3g} s"


def _fmt_bytes(count: int) -> str:
    for unit, scale in (("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if count >= scale:
            return f"{count / scale:.1f} {unit}"
    return f"{count} B"


def _fmt_num(value: float | None, spec: str = ".3g") -> str:
    return "-" if value is None or not math.isfinite(value) else format(value, spec)


def _table(headers: list[str], rows: list[list[str]]) -> str:
    """Plain text table, first column left-aligned, the others right-aligned."""
    widths = [max(len(str(x)) for x in col) for col in zip(headers, *rows)]

    def line(cells: list[str]) -> str:
        return "  ".join(str(c).ljust(w) if i == 0 else str(c).rjust(w) for i, (c, w) in enumerate(zip(cells, widths)))

    return "\n".join([line(headers), line(["-" * w for w in widths])] + [line(r) for r in rows])


def _present(rows: list[dict]) -> list[str]:
    return [name for name in ("warm_start", "warm_start_own", "cold_start", "igraph_prpack", "networkx")
            if name in rows[0]]


def _batch_tables(rows: list[dict]) -> list[str]:
    """Time per batch, per event, speedups, accuracy and work of every batch size."""
    names = _present(rows)
    heads = ["events/batch", LABELS["ranktide"]] + [LABELS[n] for n in names]
    per_batch = [[f"{r['batch']:,}"] + [_fmt_time(r[n]["seconds_per_batch"]) for n in ["ranktide"] + names] for r in rows]
    per_event = [[f"{r['batch']:,}"] + [_fmt_time(r[n]["seconds_per_event"]) for n in ["ranktide"] + names] for r in rows]
    speed = [[f"{r['batch']:,}"] + [f"{r['speedup'][n]:,.1f}x" for n in names] for r in rows]
    acc_heads = ["events/batch", "ranktide measured", "ranktide certified"] + [f"{LABELS[n]} measured" for n in names]
    acc = [[f"{r['batch']:,}", _fmt_num(r["ranktide"]["max_error"]), _fmt_num(r["ranktide"]["max_certified_bound"])]
           + [_fmt_num(r[n]["max_error"]) for n in names] for r in rows]
    work_heads = ["events/batch", "ranktide edge touches/event", "ranktide pushes", "ranktide sweeps",
                  "warm iterations", "warm edge touches/event",
                  "cold iterations", "P^T build (untimed)"] + [f"{LABELS[n]} graph build (untimed)"
                                                                for n in names if n in ("igraph_prpack", "networkx")]
    work = [[f"{r['batch']:,}", _fmt_num(r["ranktide"]["edge_touches_per_event"], ",.1f"),
             _fmt_num(r["ranktide"]["pushes_per_batch"], ",.0f"), _fmt_num(r["ranktide"]["sweeps_per_batch"], ".0f"),
             _fmt_num(r["warm_start"].get("iterations"), ".0f"),
             _fmt_num(r["warm_start"].get("edge_touches_per_event"), ",.0f"),
             _fmt_num(r["cold_start"].get("iterations"), ".0f"),
             _fmt_time(r["warm_start"].get("untimed_build_seconds"))]
            + [_fmt_time(r[n].get("untimed_build_seconds")) for n in names if n in ("igraph_prpack", "networkx")]
            for r in rows]
    return [
        "Time per batch (median of the repeats)", _table(heads, per_batch), "",
        "Time per event (time per batch / events per batch)", _table(heads, per_event), "",
        "Speedup of ranktide (contender time / ranktide time; SciPy rows count solve time only)",
        _table(["events/batch"] + [LABELS[n] for n in names], speed), "",
        "Accuracy: worst normalised L1 error against the exact solve (certified 1e-11) over the repeats",
        _table(acc_heads, acc), "",
        "Work", _table(work_heads, work),
    ]


def _graph_lines(report: dict) -> list[str]:
    g, ld = report["graph"], report["load"]
    mem = ld["memory_bytes"]
    return [
        f"Graph     {g['model']} ('{g['size']}'): {g['nodes']:,} nodes, {g['edges']:,} edges, "
        f"tail exponents out {g['out_exponent']} / in {g['in_exponent']}, {100 * g['dangling_share']:.1f} % dangling, "
        f"generated in {_fmt_time(g['generate_seconds'])} (seed {g['seed']})",
        f"Load      Engine.ensure_nodes + one Engine.apply of {ld['edges']:,} inserts: {_fmt_time(ld['load_seconds'])} "
        f"({ld['load_edges_per_second'] / 1e6:.2f} M edges/s)",
        f"Solve     Engine.resolve({ld['resolve_tolerance']:g}, warm=False): {ld['resolve_iterations']} iterations, "
        f"{_fmt_time(ld['resolve_seconds'])}; certified bound {ld['certified_bound_after_load']:.2g}",
        f"Memory    {ld['bytes_per_edge']:.1f} bytes per edge (Engine.memory_bytes()['edges'] / edges); graph "
        f"{mem['graph'] / 2**20:.0f} MiB, profiles {mem['profiles'] / 2**20:.0f} MiB; peak RSS after load "
        f"{ld['peak_rss_bytes_after_load'] / 2**20:.0f} MiB, at the end of the engine parts "
        f"{report['peak_rss_bytes'] / 2**20:.0f} MiB",
    ]


def _scaling_lines(report: dict) -> list[str]:
    sizes = list(report["scaling"])
    batches = [r["batch"] for r in report["scaling"][sizes[0]]]
    rows = []
    for size in sizes:
        by_b = {r["batch"]: r for r in report["scaling"][size]}
        n, m = SIZES[size]
        for key, label in (("ranktide_seconds_per_event", "ranktide"), ("warm_start_seconds_per_event", "warm start")):
            rows.append([f"{size} ({m:,} edges) {label}"] + [_fmt_time(by_b[b][key]) if b in by_b else "-" for b in batches])
    return ["Cost per event by graph size and batch size", _table(["graph / contender"] + [f"B={b:,}" for b in batches], rows)]


def _profile_lines(p: dict) -> list[str]:
    names = ["warm_start", "cold_start"]
    row = [f"{p['batch']:,}", _fmt_time(p["ranktide"]["seconds_per_batch"])] + \
          [_fmt_time(p[n]["seconds_per_batch"]) for n in names] + [f"{p['speedup'][n]:,.1f}x" for n in names] + \
          [_fmt_num(p["ranktide"]["max_error"]), _fmt_num(p["ranktide"]["max_certified_bound"])]
    heads = ["events/batch", "ranktide", "warm start", "cold start", "speedup vs warm", "speedup vs cold",
             "measured error", "certified bound"]
    return [f"Personalized stream: global + {len(p['profiles'])} profiles ({p['seeds_per_profile']} seed nodes each, "
            f"set by seed events; first settle of the seeds {_fmt_time(p['first_settle_seconds'])}); contenders "
            f"solve every profile (times summed), errors are the worst profile", _table(heads, [row])]


def _throughput_lines(t: dict) -> list[str]:
    return [
        f"Engine throughput over {t['events']:,} mixed events in micro-batches of {t['micro_batch']:,} "
        f"(the service's default; growth of the edge arrays included)",
        f"  apply alone          {t['apply_only_events_per_second']:,.0f} events/s "
        f"({t['apply_only_events_per_cpu_second']:,.0f} per CPU second of the applying thread)",
        f"  apply + settle       {t['apply_and_settle_events_per_second']:,.0f} events/s "
        f"(settle {100 * t['settle_seconds'] / (t['apply_seconds'] + t['settle_seconds']):.0f} % of the time, "
        f"{t['edge_touches_per_event']:,.1f} edge touches per event, {t['sweeps']} sweeps, bound after {t['certified_bound_after']:.2g})",
    ]


def _backlog_lines(b: dict) -> list[str]:
    return [f"  backlog schedule     {b['events_per_second']:,.0f} events/s over {b['events']:,} events "
            f"(settle after every {b['settle_interval']:g} s of engine work and at the end, as the service "
            f"does in a backlog: {b['settles']} settles, bound after {b['certified_bound_after']:.2g})"]


def _snapshot_lines(s: dict) -> list[str]:
    return [f"Snapshot of {s['nodes']:,} nodes / {s['edges']:,} edges ({_fmt_bytes(s['bytes_on_disk'])} on disk): "
            f"write {_fmt_time(s['write_seconds'])} (exact residual, settle, zstd Parquet, sha256, fsync), "
            f"load {_fmt_time(s['load_seconds'])} (checksums, Parquet, id interning, exact residual)"]


def _replay_lines(r: dict) -> list[str]:
    rows = [[fmt, _fmt_bytes(r[fmt]["file_bytes"]), _fmt_time(r[fmt]["read_parse_seconds"]),
             _fmt_time(r[fmt]["replay_seconds"]), f"{r[fmt]['ratio']:.2f}x",
             f"<= {r[fmt]['target_ratio']:g}x " + ("met" if r[fmt]["meets_target"] else "MISSED")]
            for fmt in ("jsonl", "parquet")]
    out = [f"Replay floor: the generated graph's {r['events']:,} edges as insert events, replayed from an empty graph",
           _table(["log", "size", "read + parse only", "replay_log", "ratio", "target"], rows)]
    return out + (_replay_command_lines(r["command"]) if "command" in r else [])


def _replay_command_lines(c: dict) -> list[str]:
    b = c["breakdown"]
    verdict = "met" if c["meets_target"] else "MISSED"
    ratio = "n/a (orjson not installed)" if c["ratio"] is None else f"{c['ratio']:.2f}x"
    parts = [("interpreter", "interpreter_seconds"), ("imports", "imports_seconds"),
             ("kernel loading", "kernel_loading_seconds"), ("read + parse (reader thread)", "read_parse_seconds"),
             ("waiting for it", "waiting_for_parse_seconds"),
             ("apply (ids interned included)", "apply_seconds"), ("snapshot", "snapshot_seconds")]
    shown = ", ".join(f"{label} {_fmt_time(b[key])}" for label, key in parts if b.get(key) is not None)
    return [
        "",
        f"Replay command: {c['command']} on {c['inserts']:,} inserts then {c['mixed']:,} mixed events "
        f"({_fmt_bytes(c['file_bytes'])} of JSON Lines), fresh process, kernels cached: "
        f"{_fmt_time(c['replay_seconds'])} wall against the orjson floor {_fmt_num(c['orjson_floor_seconds'], '.3f')} s "
        f"(read + orjson.loads per line): {ratio}, target <= {c['target_ratio']:g}x {verdict}",
        f"  where the time goes: {shown}; start-up before replay_log {_fmt_num(b['start_up_seconds'], '.3f')} s; "
        f"interning alone (in-process) {_fmt_time(b['interning_seconds_in_process'])}",
    ]


def _e2e_lines(e: dict) -> list[str]:
    if "skipped" in e:
        return [f"End to end: skipped: {e['skipped']}"]
    rows = [[kind, f"{e[kind]['messages']:,}", f"{e[kind]['events']:,}", _fmt_time(e[kind]["seconds"]),
             f"{e[kind]['events_per_second']:,.0f}",
             _fmt_num(e[kind]["events_per_second_excluding_restore_and_snapshots"], ",.0f"),
             _fmt_time(e[kind]["owner_wait_seconds"]), _fmt_time(e[kind]["restore_seconds"]),
             _fmt_time(e[kind]["snapshot_seconds"]), f"{e[kind]['events_applied']:,}"] for kind in ("json", "arrow")]
    return [f"End to end: ranktide run on a local Kafka broker, 3 partitions, resuming from a snapshot of the graph, "
            f"to the end of the topic (producing not timed; Arrow messages hold {e['arrow_rows_per_message']:,} rows)",
            _table(["messages", "count", "events", "run time", "events/s",
                    "events/s without start-up (owner wait, restore) and final snapshot",
                    "owner wait", "restore", "final snapshot", "applied"], rows)]


def _real_lines(r: dict) -> list[str]:
    if "skipped" in r:
        return [f"Real graph: skipped, {r['skipped']}."]
    names = _present(r["batches"])
    heads = ["events/batch"] + [LABELS[n] for n in ["ranktide"] + names] + ["ranktide error", "ranktide bound"]
    rows = [[f"{b['batch']:,}"] + [_fmt_time(b[n]["seconds_per_batch"]) for n in ["ranktide"] + names]
            + [_fmt_num(b["ranktide"]["max_error"]), _fmt_num(b["ranktide"]["max_certified_bound"])] for b in r["batches"]]
    worst = max(max(b[n]["max_error"] for n in names) for b in r["batches"])
    return [f"Real graph: {r['description']}; {r['note']}.",
            _table(heads, rows), f"  worst contender error {worst:.2g}"]


def _per_node_lines(p: dict) -> list[str]:
    """The per-node contract: every contender promising each score within relative rtol."""
    names = [n for n in ("warm_start", "oracle_warm_start", "cold_start", "igraph_prpack", "networkx")
             if n in p["batches"][0]]
    headers = ["batch", "ranktide", *[f"{n} (x)" for n in names], "publish", "max rel. error"]
    rows = []
    for row in p["batches"]:
        ours = row["ranktide"]
        rows.append([f"{row['batch']:,}", _fmt_time(ours["seconds_per_batch"]),
                     *[f"{_fmt_time(row[n]['seconds_per_batch'])} ({row['speedup'][n]:.1f}x)" for n in names],
                     _fmt_time(ours.get("certificate_seconds")), f"{ours['max_relative_error']:.2e}"])
    lat, pers = p["latency_ms"], p["personalized"]
    return [
        f"Per-node contract: every published score within relative {p['rtol']:g} of the exact PageRank. The warm "
        "start is stopped when its own residual certifies the same per-node bound; the oracle warm start at the "
        "first iterate (after one step at least) whose measured error meets it, which no user can know; "
        "'publish' is the certificate (one pass over the nodes) a snapshot or read adds.",
        _table(headers, rows),
        f"single events: apply + settle p50 {lat['p50']:.3f} ms, p99 {lat['p99']:.3f} ms over {lat['events']} events; "
        f"backlog schedule {p['events_per_second']:,.0f} events/s; push cost "
        f"{_fmt_num(p.get('push_ns_per_edge'), '.1f')} ns per touched edge in the push kernels, "
        f"{_fmt_num(p.get('settle_ns_per_edge'), '.1f')} ns with the settle's fixed cost; "
        + (f"{p['stream']['batch']}-event batches back to back: p50 {p['stream']['p50_ms']:.3f} ms, "
           f"p99 {p['stream']['p99_ms']:.3f} ms; " if "stream" in p else "")
        + "every node within its bound: "
        f"{p['within_bounds']}",
        f"personalized stream ({pers['profiles']} profiles + global, {pers['batch']}-event batches): "
        f"{pers['speedup']['warm_start']:.1f}x over the certified warm start, "
        f"{pers['speedup']['oracle_warm_start']:.1f}x over the oracle",
    ]


def render(report: dict) -> str:
    """The human-readable report."""
    m = report["machine"]
    s = report["settings"]
    out = [
        f"ranktide bench: size {s['size']}, batches {','.join(map(str, s['batches']))}, {s['repeats']} repeats, "
        f"seed {s['seed']}",
        f"Machine   {m['nproc']} CPUs ({m['cpu']}), {m['ram_bytes'] / 2**30:.1f} GiB RAM, load average "
        f"{m['load_average'][0]:.2f} at start, {m['date']}; Python {m['python']}, numpy {m['numpy']}, "
        f"SciPy {m['scipy']}, numba {m['numba']}, pyarrow {m['pyarrow']}",
        "Accuracy  every contender to a certified normalised L1 error of 1e-6 (the per-node contract has its own "
        "table), damping 0.85; "
        f"NetworkX with tol = (1-d)*1e-6/N; kernels compiled beforehand ({_fmt_time(s['kernel_warm_up_seconds'])})",
        "",
    ]
    out += [f"Not measured: {LABELS[name]} ({why})" for name, why in report.get("missing_contenders", {}).items()]
    out += _graph_lines(report) + [""]
    out += [f"Update batches of mixed events (80 % inserts of new edges drawn like the graph's, 20 % deletes of "
            f"present edges, shuffled) on the {s['size']} graph", ""]
    out += _batch_tables(report["batches"]) + [""]
    if "per_node" in report:
        out += _per_node_lines(report["per_node"]) + [""]
    out += _scaling_lines(report) + [""]
    if "personalized" in report:
        out += _profile_lines(report["personalized"]) + [""]
    out += _throughput_lines(report["throughput"])
    out += (_backlog_lines(report["backlog"]) if "backlog" in report else []) + [""]
    out += _snapshot_lines(report["snapshot"]) + [""]
    out += _replay_lines(report["replay"]) + [""]
    out += _e2e_lines(report["end_to_end"]) + [""]
    out += _real_lines(report["real_graph"]) + [""]
    out += [
        f"Headline: speedup over the warm start at {report['speedup_vs_warm_start_batch']:,}-event batches "
        f"{report['speedup_vs_warm_start']:,.1f}x; engine {report['events_per_second']:,.0f} events/s "
        f"(apply + settle, 50k micro-batches); end to end "
        + (f"{report['end_to_end_events_per_second']:,.0f} events/s (JSON messages)"
           if report["end_to_end_events_per_second"] else "skipped"),
        "Notes: times are medians of the repeats measured in this run on a shared machine; quote ratios, not "
        "absolute figures. The SciPy contenders are timed without building P^T (shown apart under Work); "
        "NetworkX and igraph are timed without building their graph objects. NetworkX runs on tiny and small "
        "graphs only. The warm start begins each batch from the exact solution of the graph before it (certified "
        "1e-11), while ranktide carries its own estimate from batch to batch (certified <= 1e-6).",
    ]
    return "\n".join(out)
