"""Choosing kill points from a traced run (importable as ``_faults``).

A run with ``CLIQUEWISE_FAULT_TRACE=PATH`` writes the name of every fault point it
passes (see ``cliquewise.store.fault_point``). :func:`read_trace` splits that list
by stage, and :func:`resolve` turns a *selector* -- a stage, a kind of point and an
index among the points of that kind in that stage -- into a ``CLIQUEWISE_FAULT``
spec (``name@n``) that fires exactly there. The tests therefore name kill points by
what they are ("the third unit checkpoint of fit") rather than by unit names,
which change as the stages evolve.
"""

from __future__ import annotations

from pathlib import Path

STAGES = ["ingest", "split", "enumerate", "fit", "results"]
KINDS = ("task", "pre-unit", "unit", "substep", "before-manifest", "stage")


def read_trace(path) -> list[tuple[str, str]]:
    """``[(stage, name)]`` in the order passed; a point belongs to the stage whose
    ``stage:<name>`` marker follows it."""
    names = [ln for ln in Path(path).read_text(encoding="utf-8").splitlines() if ln]
    out, pending = [], []
    for name in names:
        pending.append(name)
        if name.startswith("stage:"):
            stage = name.split(":", 1)[1]
            out += [(stage, n) for n in pending]
            pending = []
    out += [("?", n) for n in pending]
    return out


def resolve(trace: list[tuple[str, str]], stage: str, kind: str, index) -> str:
    """The spec that kills at the ``index``-th point of ``kind`` in ``stage``.

    ``index`` is an int (negative counts from the end) or ``"mid"``. The count in
    ``name@n`` follows ``fault_point``: passes of names starting with ``name``, in
    one process, from its start.
    """
    picks = [(pos, n) for pos, (st, n) in enumerate(trace) if st == stage and n.split(":", 1)[0] == kind]
    if not picks:
        raise LookupError(f"no {kind} point in stage {stage}")
    if index == "mid":
        index = len(picks) // 2
    pos, name = picks[index]
    n = sum(1 for _, other in trace[:pos + 1] if other.startswith(name))
    return f"{name}@{n}"


def most_frequent_task(trace: list[tuple[str, str]], stage: str) -> str:
    """The task run most often in ``stage`` (its work units or EM parts)."""
    counts: dict[str, int] = {}
    for st, name in trace:
        if st == stage and name.startswith("task:"):
            counts[name] = counts.get(name, 0) + 1
    return max(counts, key=counts.get)
