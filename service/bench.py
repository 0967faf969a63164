"""``cuebank bench``: how fast the engine is, measured against this machine's own ceiling.

Absolute timings say little across machines, so every figure here is paired with the best this
machine does on the same shapes: a raw float32 GEMM, an exact nearest-neighbour pass, a
Cholesky factorisation. The ratios are what the targets are about.

Sections (letters or names select them):

* ``a`` ``ceiling`` — float32 GEMM GFLOP/s at the recall shapes.
* ``b`` ``recall`` — matrix-rule batched ``sync`` recall, achieved GFLOP/s against (a).
* ``c`` ``dense`` — dense recall against an exact nearest-neighbour pass, time and agreement.
* ``d`` ``http`` — the HTTP stack (see :mod:`service.bench_http`).
* ``e`` ``compile`` — compile time against the dominant product; incremental add against a
  full compile.
* ``f`` ``memory`` — bytes a compiled rule holds against the theoretical weight bytes.
* ``g`` ``growth`` — recall cost as P (dense) and N (matrix rules) double, fitted exponent.

Every timing is the best of several repeats after a warm-up: the minimum is the figure least
disturbed by other processes. Two timings that form a ratio are taken in alternation, so a
burst of load elsewhere hits both rather than one.

Examples
--------
>>> parse_sections("a,dense")
('ceiling', 'dense')
>>> parse_sections("z")
Traceback (most recent call last):
    ...
ValueError: unknown section 'z'; choose from a/ceiling, b/recall, ...
"""

from __future__ import annotations

import copy
import math
import os
import platform
import sys
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import asdict, dataclass, field
from functools import partial
from typing import Any

import numpy as np
from numpy.typing import NDArray

from service.engine import DenseRule, HebbianRule, ProjectionRule, StorkeyRule, judge, settle
from service.engine.rules import MemoryRule

__all__ = [
    "SECTIONS",
    "BenchConfig",
    "format_report",
    "machine_info",
    "parse_sections",
    "run_bench",
]

#: Section names in report order, with the letter each answers to.
SECTIONS: tuple[str, ...] = ("ceiling", "recall", "dense", "http", "compile", "memory", "growth")
_LETTERS = dict(zip("abcdefg", SECTIONS, strict=True))

Row = dict[str, Any]


def parse_sections(text: str | None) -> tuple[str, ...]:
    """Section names from a comma list of letters or names; None or empty means all."""
    if not text:
        return SECTIONS
    chosen: set[str] = set()
    for part in (p.strip().lower() for p in text.split(",")):
        if not part:
            continue
        name = _LETTERS.get(part, part)
        if name not in SECTIONS:
            known = ", ".join(f"{k}/{v}" for k, v in _LETTERS.items())
            raise ValueError(f"unknown section {part!r}; choose from {known}")
        chosen.add(name)
    return tuple(s for s in SECTIONS if s in chosen)


@dataclass(frozen=True)
class BenchConfig:
    """Every size and count the run uses; printed with the results so a run can be repeated."""

    quick: bool
    seed: int = 0
    repeats: int = 5
    batch: int = 256
    recall_units: tuple[int, ...] = (1024, 2048)
    recall_load: float = 0.05
    recall_flip: float = 0.10
    max_steps: int = 100
    dense_units: int = 1024
    dense_memories: tuple[int, ...] = (1_000, 10_000, 100_000)
    dense_batches: tuple[int, ...] = (1, 256)
    dense_unknown: float = 0.25
    compile_units: int = 1024
    compile_memories: int = 1_000
    memory_dense_memories: int = 10_000
    growth_memories: tuple[int, ...] = (1_000, 2_000, 4_000, 8_000, 16_000)
    growth_units: tuple[int, ...] = (256, 512, 1024, 2048)
    http_requests: int = 2_000
    http_seconds: float = 20.0
    http_concurrency: int = 16

    @classmethod
    def for_run(cls, quick: bool) -> BenchConfig:
        if not quick:
            return cls(quick=False)
        return cls(
            quick=True,
            repeats=3,
            recall_units=(1024, 2048),
            dense_memories=(1_000, 10_000),
            growth_memories=(1_000, 2_000, 4_000, 8_000),
            growth_units=(256, 512, 1024),
            memory_dense_memories=5_000,
            http_requests=400,
            http_seconds=8.0,
        )


# ---------------------------------------------------------------------------------------------
# timing


def best_time(fn: Callable[[], object], repeats: int) -> float:
    """Fastest of ``repeats`` calls after one untimed warm-up call, in seconds."""
    fn()
    best = math.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


#: Rounds of :func:`best_times` continue past ``repeats`` until this many seconds have been
#: spent (at most :data:`MAX_ROUNDS`): a best of 3 over millisecond calls on a shared
#: machine is mostly noise, a best of 100 is not.
MIN_TIMING_SECONDS = 0.25
MAX_ROUNDS = 200


def best_times(fns: Sequence[Callable[[], object]], repeats: int) -> list[float]:
    """Best time of each function, the functions run in turn within every round.

    At least ``repeats`` rounds, and more while the rounds so far took under
    :data:`MIN_TIMING_SECONDS`; every function gets the same rounds.
    """
    for fn in fns:
        fn()
    best = [math.inf] * len(fns)
    start = time.perf_counter()
    rounds = 0
    while rounds < repeats or (
        rounds < MAX_ROUNDS and time.perf_counter() - start < MIN_TIMING_SECONDS
    ):
        for i, fn in enumerate(fns):
            t0 = time.perf_counter()
            fn()
            best[i] = min(best[i], time.perf_counter() - t0)
        rounds += 1
    return best


def best_prepared(prepare: Callable[[], Any], run: Callable[[Any], object], repeats: int) -> float:
    """Best time of ``run(prepare())``, with the preparation left out of the timing."""
    run(prepare())
    best = math.inf
    for _ in range(repeats):
        arg = prepare()
        t0 = time.perf_counter()
        run(arg)
        best = min(best, time.perf_counter() - t0)
    return best


def _patterns(rng: np.random.Generator, n_memories: int, n_units: int) -> NDArray[np.int8]:
    # drawn as int8 directly: a float64 draw of 100,000 × 1,024 would need 800 MB
    bits = rng.integers(0, 2, size=(n_memories, n_units), dtype=np.int8)
    bits *= 2
    bits -= 1
    return bits


def _gemm_seconds(m: int, k: int, n: int, repeats: int, rng: np.random.Generator) -> float:
    a = rng.standard_normal((m, k), dtype=np.float32)
    b = rng.standard_normal((k, n), dtype=np.float32)
    out = np.empty((m, n), dtype=np.float32)
    return best_time(lambda: np.matmul(a, b, out=out), repeats)


def _fit_exponent(xs: Sequence[float], ys: Sequence[float]) -> float:
    slope, _ = np.polyfit(np.log(np.asarray(xs)), np.log(np.asarray(ys)), 1)
    return float(slope)


def _g(flops: float, seconds: float) -> float:
    return flops / seconds / 1e9


# ---------------------------------------------------------------------------------------------
# machine


def blas_threads() -> dict[str, Any]:
    """The BLAS thread count in effect and where the figure comes from."""
    try:
        from threadpoolctl import (  # type: ignore[import-untyped]  # optional, no stubs
            threadpool_info,
        )
    except ImportError:
        pools: list[dict[str, Any]] = []
    else:
        pools = [p for p in threadpool_info() if p.get("user_api") == "blas"]
    if pools:
        return {
            "threads": int(pools[0]["num_threads"]),
            "source": "threadpoolctl",
            "library": f"{pools[0].get('internal_api')} {pools[0].get('version')}",
            "architecture": pools[0].get("architecture"),
        }
    for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        if os.environ.get(var, "").isdigit():
            return {"threads": int(os.environ[var]), "source": var}
    return {"threads": None, "source": "unknown: BLAS default, threadpoolctl not installed"}


def _blas_config() -> dict[str, Any]:
    try:
        cfg: Any = np.show_config(mode="dicts")
    except Exception as exc:  # the config format is numpy's business; report, never fail
        return {"error": str(exc)}
    deps: dict[str, Any] = cfg.get("Build Dependencies", {}) if isinstance(cfg, dict) else {}
    out: dict[str, Any] = {}
    for name in ("blas", "lapack"):
        info = deps.get(name, {})
        out[name] = {k: info.get(k) for k in ("name", "version", "openblas configuration")}
    simd: dict[str, Any] = cfg.get("SIMD Extensions", {}) if isinstance(cfg, dict) else {}
    out["simd_found"] = simd.get("found")
    return out


def _cpu_model() -> str:
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as fh:
            for line in fh:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def machine_info(thread_note: str = "") -> dict[str, Any]:
    """CPU, Python, numpy and BLAS of this run."""
    try:
        usable = len(os.sched_getaffinity(0))
    except AttributeError:  # not on every platform
        usable = os.cpu_count() or 1
    return {
        "cpu_model": _cpu_model(),
        "cpu_count": os.cpu_count(),
        "cpus_usable": usable,
        "load_average": list(os.getloadavg()) if hasattr(os, "getloadavg") else None,
        "python": sys.version.split()[0],
        "platform": platform.platform(),
        "numpy": np.__version__,
        "blas": _blas_config(),
        "blas_threads": {**blas_threads(), "note": thread_note},
    }


# ---------------------------------------------------------------------------------------------
# sections


@dataclass
class Section:
    """One section's figures: rows for the table, a summary, and the targets it checks."""

    name: str
    title: str
    rows: list[Row] = field(default_factory=list)
    summary: dict[str, Any] = field(default_factory=dict)
    targets: list[Row] = field(default_factory=list)
    skipped: str | None = None
    seconds: float = 0.0

    def target(self, what: str, value: float, limit: float, *, at_least: bool) -> None:
        met = value >= limit if at_least else value <= limit
        self.targets.append(
            {
                "target": what,
                "value": value,
                "limit": limit,
                "kind": "at least" if at_least else "at most",
                "met": bool(met),
            }
        )


class _Ceiling:
    """GEMM rates by shape, measured once and shared by every section that compares."""

    def __init__(self, cfg: BenchConfig) -> None:
        self.cfg = cfg
        self.rng = np.random.default_rng(cfg.seed + 1)
        self.rates: dict[tuple[int, int, int], float] = {}

    def gflops(self, m: int, k: int, n: int) -> float:
        key = (m, k, n)
        if key not in self.rates:
            seconds = _gemm_seconds(m, k, n, self.cfg.repeats, self.rng)
            self.rates[key] = _g(2.0 * m * k * n, seconds)
        return self.rates[key]


def section_ceiling(cfg: BenchConfig, ceiling: _Ceiling) -> Section:
    sec = Section("ceiling", "a. ceiling: float32 GEMM at the recall shapes (best of repeats)")
    shapes = [(cfg.batch, n, n, "recall B×N @ N×N") for n in cfg.recall_units]
    shapes += [
        (b, cfg.dense_units, p, "dense B×N @ N×P")
        for p in cfg.dense_memories
        for b in cfg.dense_batches
    ]
    n, p = cfg.compile_units, cfg.compile_memories
    shapes.append((n, p, n, "compile XᵀX N×P @ P×N"))
    for m, k, nn, what in shapes:
        sec.rows.append(
            {"shape": what, "m": m, "k": k, "n": nn, "gflops": ceiling.gflops(m, k, nn)}
        )
    return sec


def _noisy_cues(
    rng: np.random.Generator, X: NDArray[np.int8], count: int, flip: float
) -> tuple[NDArray[np.int8], NDArray[np.int64]]:
    idx = rng.integers(0, X.shape[0], size=count)
    cues = X[idx].copy()
    cues[rng.random(cues.shape) < flip] *= -1
    return cues, idx


def section_recall(cfg: BenchConfig, ceiling: _Ceiling) -> Section:
    sec = Section(
        "recall",
        f"b. matrix-rule batched recall (sync, B = {cfg.batch}, {cfg.recall_flip:.0%} of bits "
        f"flipped, P = {cfg.recall_load} N)",
    )
    rng = np.random.default_rng(cfg.seed + 2)
    rules: list[tuple[str, Callable[[], MemoryRule]]] = [
        ("hebbian", HebbianRule),
        ("projection", ProjectionRule),
    ]
    for n in cfg.recall_units:
        X = _patterns(rng, max(2, int(cfg.recall_load * n)), n)
        cues, _ = _noisy_cues(rng, X, cfg.batch, cfg.recall_flip)
        for name, make in rules:
            rule = make().fit(X)
            result = settle(rule, cues, max_steps=cfg.max_steps)
            # Each step multiplies the still-active states by W, so the work is the sum of
            # the active rows over the steps: that is exactly the per-cue step count summed.
            row_steps = int(result.steps.sum())
            seconds = best_time(partial(settle, rule, cues, max_steps=cfg.max_steps), cfg.repeats)
            achieved = _g(2.0 * n * n * row_steps, seconds)
            top = ceiling.gflops(cfg.batch, n, n)
            sec.rows.append(
                {
                    "rule": name,
                    "n_units": n,
                    "n_memories": X.shape[0],
                    "batch": cfg.batch,
                    "max_steps_run": int(result.steps.max()),
                    "cue_steps": row_steps,
                    "seconds": seconds,
                    "gflops": achieved,
                    "ceiling_gflops": top,
                    "ratio": achieved / top,
                }
            )
    at_top = [r for r in sec.rows if r["n_units"] == max(cfg.recall_units)]
    for r in at_top:
        sec.target(
            f"{r['rule']} recall at N = {r['n_units']}: GFLOP/s ratio to GEMM",
            r["ratio"],
            0.7,
            at_least=True,
        )
    return sec


def _nearest(xf: NDArray[np.float32], cues: NDArray[np.float32]) -> NDArray[np.intp]:
    return np.asarray(np.argmax(cues @ xf.T, axis=1))


def section_dense(cfg: BenchConfig) -> Section:
    sec = Section(
        "dense",
        f"c. dense recall against exact nearest neighbour (argmax X·q), N = {cfg.dense_units}",
    )
    rng = np.random.default_rng(cfg.seed + 3)
    n = cfg.dense_units
    for p in cfg.dense_memories:
        X = _patterns(rng, p, n)
        rule = DenseRule().fit(X)
        xf = X.astype(np.float32)
        for b in cfg.dense_batches:
            idx = rng.integers(0, p, size=b)
            clean = X[idx]
            holed = clean.copy()
            holed[rng.random(holed.shape) < cfg.dense_unknown] = 0
            for cue_kind, cues in (("clean", clean), (f"{cfg.dense_unknown:.0%} unknown", holed)):
                cf = cues.astype(np.float32)
                # the dense recall validates its int8 cues; the exact pass gets float32 ready
                t_dense, t_nn = best_times(
                    [
                        partial(settle, rule, cues),
                        partial(_nearest, xf, cf),
                    ],
                    cfg.repeats,
                )
                result = settle(rule, cues)
                answer = _nearest(xf, result.states.astype(np.float32))
                agree = float(np.mean(answer == _nearest(xf, cf)))
                sec.rows.append(
                    {
                        "n_memories": p,
                        "batch": b,
                        "cues": cue_kind,
                        "mean_steps": float(result.steps.mean()),
                        "dense_seconds": t_dense,
                        "nn_seconds": t_nn,
                        "ratio": t_dense / t_nn,
                        "agreement": agree,
                        "agreement_with_truth": float(np.mean(answer == idx)),
                    }
                )
        del X, rule, xf
    for r in sec.rows:
        if r["cues"] != "clean":
            continue
        limit = 1.3 if r["batch"] > 1 else 1.6
        sec.target(
            f"dense/NN time at P = {r['n_memories']}, B = {r['batch']}",
            r["ratio"],
            limit,
            at_least=False,
        )
    return sec


def _fit(make: Callable[[], MemoryRule], X: NDArray[np.int8]) -> MemoryRule:
    return make().fit(X)


def _add(rule: MemoryRule, pattern: NDArray[np.int8]) -> MemoryRule:
    return rule.add(pattern)


def _compile_row(rule: str, what: str, seconds: float, floor_what: str, floor: float) -> Row:
    return {
        "rule": rule,
        "operation": what,
        "seconds": seconds,
        "reference": floor_what,
        "reference_seconds": floor,
        "ratio": seconds / floor,
    }


def section_compile(cfg: BenchConfig) -> Section:
    n, p = cfg.compile_units, cfg.compile_memories
    sec = Section("compile", f"e. compile (N = {n}, P = {p})")
    rng = np.random.default_rng(cfg.seed + 5)
    X = _patterns(rng, p, n)
    while np.linalg.matrix_rank(X.astype(np.float64)) < p:  # projection needs independence
        X = _patterns(rng, p, n)
    xf = X.astype(np.float32)
    xd = X.astype(np.float64)
    r = cfg.repeats

    t_xtx = best_time(lambda: xf.T @ xf, r)
    sec.rows.append(
        _compile_row(
            "hebbian",
            "full fit",
            best_time(lambda: HebbianRule().fit(X), r),
            "GEMM XᵀX (float32)",
            t_xtx,
        )
    )
    sec.rows.append(
        _compile_row(
            "storkey",
            "full fit",
            best_time(lambda: StorkeyRule().fit(X), max(1, r // 2)),
            "GEMM XᵀX (float32)",
            t_xtx,
        )
    )
    gram = xd @ xd.T
    chol = np.linalg.cholesky(gram)
    y32 = np.linalg.solve(chol, xd).astype(np.float32)
    t_floor = best_time(lambda: np.linalg.cholesky(xd @ xd.T), r) + best_time(
        lambda: y32.T @ y32, r
    )
    sec.rows.append(
        _compile_row(
            "projection",
            "full fit",
            best_time(lambda: ProjectionRule().fit(X), r),
            "Gram + Cholesky + GEMM YᵀY",
            t_floor,
        )
    )
    t_copy = best_time(lambda: X.astype(np.float32), r)
    sec.rows.append(
        _compile_row(
            "dense",
            "full fit",
            best_time(lambda: DenseRule().fit(X), r),
            "int8 → float32 copy of X",
            t_copy,
        )
    )

    rules: list[tuple[str, Callable[[], MemoryRule]]] = [
        ("hebbian", HebbianRule),
        ("storkey", StorkeyRule),
        ("projection", ProjectionRule),
        ("dense", DenseRule),
    ]
    for name, make in rules:
        base = make().fit(X[:-1])
        full = best_time(partial(_fit, make, X), max(1, r // 2))
        add = best_prepared(partial(copy.deepcopy, base), partial(_add, pattern=X[-1]), r)
        row = _compile_row(name, "add one memory", add, "full fit of all P", full)
        row["speedup"] = full / add
        sec.rows.append(row)

    speedups = {row["rule"]: row for row in sec.rows if row["operation"] == "add one memory"}
    sec.target(
        "hebbian add vs full compile: speed-up", speedups["hebbian"]["speedup"], 20.0, at_least=True
    )
    proj = next(x for x in sec.rows if x["rule"] == "projection" and x["operation"] == "full fit")
    sec.target("projection compile vs Cholesky + GEMM floor", proj["ratio"], 3.0, at_least=False)
    return sec


def _after_recall(rule: MemoryRule, rng: np.random.Generator) -> MemoryRule:
    """The rule as a serving worker holds it: after verdicts on a few and on many cues
    (anything cached on the way is counted)."""
    patterns = rule.patterns_
    for b in (4, 64):
        cues = patterns[rng.integers(0, patterns.shape[0], size=b)].copy()
        cues[:, : patterns.shape[1] // 4] = 0
        judge(rule, cues, settle(rule, cues, max_steps=5))
    return rule


def _collection_rows(cfg: BenchConfig) -> list[tuple[str, int, int, int, int]]:
    """(rule, P, N, bytes held by the compiled collection, theoretical weight bytes) of real
    collections: the HTTP section's 1,024-unit records, compiled by the service and recalled
    from, as a worker's cache holds them (rule, decoding codes, verdict state)."""
    import tempfile
    from pathlib import Path

    from service.bench_http import SCHEMA, _memories
    from service.recall.models import CollectionSpec, RecallOptions
    from service.recall.service import DEFAULT_TEAM, RecallService
    from service.settings import Settings
    from service.storage.db import make_engine, make_session_factory
    from service.storage.migrate import upgrade_to_head

    n = sum(int(f["units"]) for f in SCHEMA["fields"])
    out = []
    with tempfile.TemporaryDirectory(prefix="cuebank-bench-") as tmp:
        settings = Settings(data_dir=Path(tmp), database_url=None, key_pepper=None)
        upgrade_to_head(settings.resolved_database_url)
        engine = make_engine(settings.resolved_database_url)
        try:
            service = RecallService(settings, make_session_factory(engine))
            team = DEFAULT_TEAM
            # dense far past N; Hebbian below its capacity of about 0.138 N
            for rule, p in (("dense", 1_000), ("hebbian", n // 10)):
                records = _memories(cfg.seed + 21, count=p)
                service.create_collection(
                    team, CollectionSpec(name=rule, schema=SCHEMA, rule=rule, seed=cfg.seed)
                )
                service.import_memories(
                    team, rule, ((i, k, f) for i, (k, f) in enumerate(records, start=1))
                )
                cues = [{"title": f["title"], "code": f["code"]} for _, f in records[:64]]
                service.recall(team, rule, cues[:4], RecallOptions())
                service.recall(team, rule, cues, RecallOptions())
                [compiled] = [c for c in service.cache.entries() if c.rule.name == rule]
                theory = n * p * 4 if rule == "dense" else n * n * 4
                out.append((rule, p, n, compiled.nbytes, theory))
        finally:
            engine.dispose()
    return out


def section_memory(cfg: BenchConfig) -> Section:
    n, p = cfg.compile_units, cfg.compile_memories
    pd = cfg.memory_dense_memories
    sec = Section(
        "memory",
        "f. memory: nbytes of every array held (not tracemalloc), after recalls, against the "
        "theoretical weights (N x N float32; P x N float32 for dense), at loads each rule is "
        "used at; rules alone, then whole compiled collections with their decoding codes",
    )
    rng = np.random.default_rng(cfg.seed + 6)
    X = _patterns(rng, p, n)
    # Hebbian and Storkey below their capacities (0.138 N and N / √(2 ln N)); projection at
    # the compile section's P; dense far past N, which is what it is for.
    small = max(2, n // 10)
    cases: list[tuple[str, MemoryRule, int, int]] = [
        ("hebbian", HebbianRule().fit(X[:small].copy()), small, n * n * 4),
        ("storkey", StorkeyRule().fit(X[:small].copy()), small, n * n * 4),
        ("projection", ProjectionRule().fit(X), p, n * n * 4),
        ("dense", DenseRule().fit(_patterns(rng, pd, n)), pd, n * pd * 4),
    ]
    for name, rule, pm, theory in cases:
        held = _after_recall(rule, rng).held_bytes_
        arrays = {k: int(v.nbytes) for k, v in vars(rule).items() if isinstance(v, np.ndarray)}
        sec.rows.append(
            {
                "what": f"{name} rule",
                "n_units": n,
                "n_memories": pm,
                "held_bytes": held,
                "theoretical_bytes": theory,
                "ratio": held / theory,
                "arrays": arrays,
            }
        )
        sec.target(f"{name} rule held / theoretical bytes", held / theory, 1.2, at_least=False)
    for name, pm, nc, held, theory in _collection_rows(cfg):
        sec.rows.append(
            {
                "what": f"{name} collection",
                "n_units": nc,
                "n_memories": pm,
                "held_bytes": held,
                "theoretical_bytes": theory,
                "ratio": held / theory,
                "arrays": {},
            }
        )
        sec.target(
            f"{name} collection held / theoretical bytes", held / theory, 1.2, at_least=False
        )
    return sec


def section_growth(cfg: BenchConfig) -> Section:
    sec = Section("growth", f"g. growth of recall cost (B = {cfg.batch}, sync, best of repeats)")
    rng = np.random.default_rng(cfg.seed + 7)
    n = cfg.dense_units
    dense_t: list[float] = []
    for p in cfg.growth_memories:
        X = _patterns(rng, p, n)
        rule = DenseRule().fit(X)
        cues = X[rng.integers(0, p, size=cfg.batch)]
        t = best_time(partial(settle, rule, cues), cfg.repeats)
        dense_t.append(t)
        sec.rows.append(
            {
                "rule": "dense",
                "size": "P",
                "n_units": n,
                "n_memories": p,
                "seconds": t,
                "seconds_per_step": t,
            }
        )
    matrix_t: list[float] = []
    for nu in cfg.growth_units:
        X = _patterns(rng, max(2, int(cfg.recall_load * nu)), nu)
        rule_h = HebbianRule().fit(X)
        cues, _ = _noisy_cues(rng, X, cfg.batch, cfg.recall_flip)
        res = settle(rule_h, cues, max_steps=cfg.max_steps)
        t = best_time(partial(settle, rule_h, cues, max_steps=cfg.max_steps), cfg.repeats)
        # steps differ with N, so the per-step cost is what should grow as N²
        per_step = t / float(res.steps.mean())
        matrix_t.append(per_step)
        sec.rows.append(
            {
                "rule": "hebbian",
                "size": "N",
                "n_units": nu,
                "n_memories": X.shape[0],
                "seconds": t,
                "seconds_per_step": per_step,
            }
        )
    sec.summary = {
        "dense_exponent_in_P": _fit_exponent(cfg.growth_memories, dense_t),
        "dense_expected": 1.0,
        "hebbian_exponent_in_N_per_step": _fit_exponent(cfg.growth_units, matrix_t),
        "hebbian_expected": 2.0,
    }
    return sec


def section_http(cfg: BenchConfig) -> Section:
    sec = Section("http", "d. HTTP: recall over a real server against its trivial endpoint")
    try:
        from service import bench_http
    except ImportError as exc:
        sec.skipped = f"not measured: the HTTP bench cannot be loaded ({exc})"
        return sec
    return bench_http.measure(cfg, sec)


# ---------------------------------------------------------------------------------------------
# the run


def run_bench(
    sections: Iterable[str] = SECTIONS,
    *,
    quick: bool = False,
    thread_note: str = "",
    progress: Callable[[str], None] | None = None,
) -> dict[str, Any]:
    """Run the chosen sections; return one JSON-ready document with every figure."""
    cfg = BenchConfig.for_run(quick)
    ceiling = _Ceiling(cfg)
    runners: dict[str, Callable[[], Section]] = {
        "ceiling": lambda: section_ceiling(cfg, ceiling),
        "recall": lambda: section_recall(cfg, ceiling),
        "dense": lambda: section_dense(cfg),
        "http": lambda: section_http(cfg),
        "compile": lambda: section_compile(cfg),
        "memory": lambda: section_memory(cfg),
        "growth": lambda: section_growth(cfg),
    }
    started = time.perf_counter()
    out: dict[str, Any] = {}
    for name in sections:
        if progress is not None:
            progress(f"bench: {name} ...")
        t0 = time.perf_counter()
        sec = runners[name]()
        sec.seconds = time.perf_counter() - t0
        out[name] = asdict(sec)
    targets = [t for s in out.values() for t in s["targets"]]
    return {
        "machine": machine_info(thread_note),
        "parameters": asdict(cfg),
        "sections": out,
        "targets": targets,
        "seconds": time.perf_counter() - started,
    }


# ---------------------------------------------------------------------------------------------
# human output


def _cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "yes" if value else "NO"
    if isinstance(value, float):
        if value == 0 or math.isnan(value):
            return f"{value:g}"
        if abs(value) >= 1000:
            return f"{value:,.0f}"
        if abs(value) >= 1:
            return f"{value:.3g}" if abs(value) < 100 else f"{value:.0f}"
        return f"{value:.3g}"
    if isinstance(value, int):
        return f"{value:,}"
    return str(value)


def _table(rows: Sequence[Row]) -> list[str]:
    if not rows:
        return []
    cols: list[str] = []
    for r in rows:
        cols += [k for k, v in r.items() if k not in cols and not isinstance(v, dict | list)]
    cells = [[_cell(r.get(c, "")) for c in cols] for r in rows]
    widths = [max(len(c), *(len(row[i]) for row in cells)) for i, c in enumerate(cols)]
    line = "  ".join(c.rjust(w) for c, w in zip(cols, widths, strict=True))
    out = [line, "  ".join("-" * w for w in widths)]
    out += ["  ".join(v.rjust(w) for v, w in zip(row, widths, strict=True)) for row in cells]
    return out


def format_report(doc: dict[str, Any]) -> str:
    """The document as plain-text tables, one per section, then the targets."""
    m = doc["machine"]
    threads = m["blas_threads"]
    blas = m["blas"].get("blas") or {}
    note = f"; {threads['note']}" if threads.get("note") else ""
    lines = [
        f"machine: {m['cpu_model']}, {m['cpus_usable']} usable of {m['cpu_count']} CPUs, "
        f"load {', '.join(f'{x:.2f}' for x in m['load_average'] or [])}",
        f"python {m['python']}, numpy {m['numpy']}, BLAS {blas.get('name')} "
        f"{blas.get('version')}, {threads['threads']} threads ({threads['source']}{note})",
        f"mode: {'quick' if doc['parameters']['quick'] else 'full'}; "
        "times are the best of repeats after a warm-up",
        "",
    ]
    for sec in doc["sections"].values():
        lines.append(f"{sec['title']}  [{sec['seconds']:.1f} s]")
        if sec["skipped"]:
            lines.append(f"  {sec['skipped']}")
        lines += ["  " + x for x in _table(sec["rows"])]
        for k, v in sec["summary"].items():
            lines.append(f"  {k}: {_cell(v)}")
        lines.append("")
    if doc["targets"]:
        lines.append("targets")
        lines += ["  " + x for x in _table(doc["targets"])]
    lines.append(f"total {doc['seconds']:.1f} s")
    return "\n".join(lines)
