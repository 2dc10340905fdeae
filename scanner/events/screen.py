"""A registry-wide screen: every measurement kind × every event code, in two stages.

``[screen]`` replaces the lists of running variables and uptakes: each measurement kind (a value
of ``screen.test``, or an OMOP measurement concept) measured in at least ``min_persons``
persons becomes a running variable, and each event code (OMOP: drug or procedure concept) seen
in at least ``min_event_persons`` persons becomes an uptake with the screen's window.

Stage 1 (cheap, every pair): the jump and its p-value at each declared and round-number cutoff
— bandwidth, local polynomial fit and robust interval, no design diagnostics.  Stage 2 (full):
the candidates whose stage-1 Benjamini–Hochberg q-value, over every stage-1 test of every pair,
is below ``search.alpha``, and every declared rule, get the full evaluation (density, balance,
placebo, heaping, sensitivity).  The stage-1 p-values of the candidates left behind stay in the
q-value family of the final ranking, so the family covers every pair tested.
"""
from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np

from .layout import Score, Uptake


def _name(v, prefix: str) -> str:
    return f"{prefix}{v}" if isinstance(v, (int, np.integer)) else str(v)


def expand(spec, data=None):
    """The spec with the screen's running variables and uptakes filled in from the data."""
    from ..spec import RunningSpec
    from .duck import Registry
    lay = spec.layout
    if lay is None or lay.screen is None:
        return spec, None
    sc = lay.screen
    base = Path(spec.path).parent if spec.path else Path.cwd()
    reg = Registry(lay, base, data, build=False)
    try:
        q = reg._q
        kinds = reg.con.execute(
            f"SELECT {q(sc.test)}, count(DISTINCT {q(lay.person)}) AS n FROM meas "
            f"WHERE {q(sc.value)} IS NOT NULL GROUP BY 1 HAVING count(DISTINCT {q(lay.person)}) >= "
            f"{int(sc.min_persons)} ORDER BY 1").fetchall()
        codes = reg.con.execute(
            f"SELECT code, count(DISTINCT person) FROM ev GROUP BY 1 "
            f"HAVING count(DISTINCT person) >= {int(sc.min_event_persons)} ORDER BY 1").fetchall()
    finally:
        reg.close()
    omop = lay.omop is not None
    taken = {s.name for s in lay.scores}
    scores = list(lay.scores) + [
        Score(_name(k, "m"), sc.value, ((sc.test, k),), sc.index, int(k) if omop else None)
        for k, _ in kinds if _name(k, "m") not in taken]
    names = {s.name for s in scores} | {u.name for u in lay.uptakes}
    ups = list(lay.uptakes)
    for c, _ in codes:
        name = f"c{c}" if omop else str(c)
        name = f"event_{name}" if name in names else name
        ups.append(Uptake(name, () if omop else (str(c),), (int(c),) if omop else (), sc.days,
                          sc.prior_days))
    lay2 = replace(lay, scores=tuple(scores), uptakes=tuple(ups))
    running = tuple(spec.running) + tuple(RunningSpec(s.name) for s in scores[len(lay.scores):])
    treatments = tuple(u.name for u in ups) + tuple(t for t in spec.treatments
                                                    if t not in lay.treatments)
    info = {"measurement_kinds": [{"kind": _name(k, "m"), "n_persons": int(n)} for k, n in kinds],
            "event_codes": [{"code": str(c), "n_persons": int(n)} for c, n in codes]}
    return replace(spec, layout=lay2, running=running, treatments=treatments), info


def stage_one_p(stats, cand, spec) -> float:
    """The robust bias-corrected p-value of the jump at the candidate's MSE-optimal bandwidth
    (Calonico, Cattaneo & Titiunik 2014) — the full evaluation's interval without its
    diagnostics; NaN where the fit is not estimable."""
    from ..estimate import side_data
    from ..estimate.robust import robust_jump
    from ..estimate.select import select_bandwidth
    from ..score import MIN_DISTINCT
    try:
        d = side_data(stats, cand.treatment, cand.cutoff, cand.right_closed)
        sel = select_bandwidth(d, spec.bandwidth, spec.kernel, spec.degree, spec.per_side, MIN_DISTINCT)
        return float(robust_jump(d, sel.h, sel.b, spec.kernel, spec.degree).p_value)
    except (ValueError, FloatingPointError, np.linalg.LinAlgError, ZeroDivisionError):
        return float("nan")


def stage_one_ps(cands, pooled: dict, spec, workers: int | None = None) -> np.ndarray:
    """:func:`stage_one_p` of every candidate, shared among ``workers`` forked processes.

    Each p-value depends only on its own candidate and the (read-only) bins, so the values are
    the same whatever the split; the forked processes read the bins without copying them and
    send their p-values back through a pipe.  One worker, few candidates or no ``fork``: here.
    """
    import multiprocessing as mp
    from ..scan import MIN_PARALLEL, workers_default
    k = workers_default() if workers is None else workers
    n = len(cands)
    if k < 2 or n < MIN_PARALLEL or "fork" not in mp.get_all_start_methods():
        return np.array([stage_one_p(pooled[c.running], c, spec) for c in cands], dtype=float)
    ctx = mp.get_context("fork")
    groups = [list(range(i, n, k)) for i in range(k)]       # interleaved: balanced work
    pipes, procs = [], []
    for g in groups[1:]:
        recv, send = ctx.Pipe(duplex=False)
        proc = ctx.Process(target=_stage_one_child, args=(send, [cands[i] for i in g], pooled, spec),
                           daemon=True)
        proc.start()
        send.close()
        pipes.append(recv)
        procs.append(proc)
    ps = np.full(n, np.nan)
    ps[groups[0]] = [stage_one_p(pooled[cands[i].running], cands[i], spec) for i in groups[0]]
    for g, recv, proc in zip(groups[1:], pipes, procs):
        ok, got = recv.recv()
        proc.join()
        if not ok:
            raise got
        ps[g] = got
    return ps


def _stage_one_child(send, cands, pooled, spec) -> None:
    try:
        send.send((True, [stage_one_p(pooled[c.running], c, spec) for c in cands]))
    except BaseException as exc:  # noqa: BLE001 - handed to the parent, which raises it
        send.send((False, exc))
    finally:
        send.close()


def first_stage(cands, pooled: dict, spec):
    """Stage 1 of a screen: which candidates get the full evaluation.

    Returns (kept candidates, stage-1 p-values of the others, summary per pair).
    """
    from ..score import bh_qvalues
    ps = stage_one_ps(cands, pooled, spec)
    q = bh_qvalues(list(ps))
    keep = [(c.origin == "declared") or (np.isfinite(qv) and qv < spec.alpha)
            for c, qv in zip(cands, q)]
    pairs: dict = {}
    for c, p, k in zip(cands, ps, keep):
        e = pairs.setdefault((c.running, c.treatment), {"running": c.running, "treatment": c.treatment,
                                                        "tested": 0, "kept": 0, "min_p": None})
        e["tested"] += 1
        e["kept"] += int(k)
        if np.isfinite(p) and (e["min_p"] is None or p < e["min_p"]):
            e["min_p"] = float(p)
    kept = [c for c, k in zip(cands, keep) if k]
    rest = [float(p) for p, k in zip(ps, keep) if not k and np.isfinite(p)]
    return kept, rest, list(pairs.values())
