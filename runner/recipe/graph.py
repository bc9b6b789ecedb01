"""The recipe as a graph of named steps.

Nodes are the recipe's inputs and steps; an edge runs from each name in a step's
``to:`` to the step. :func:`resolve_graph` checks references (input globs must
stay inside the lot folder), cycles and the data kind along every edge, prunes
the steps no result needs, and fixes one run order: topological generations,
each sorted by name.
"""

from __future__ import annotations

import dataclasses
import difflib

import networkx as nx

from lotproof.runner.recipe.model import Recipe
from lotproof.runner.recipe.patterns import check_pattern
from lotproof.runner.recipe.problems import ProblemCollector
from lotproof.steps import REGISTRY

__all__ = ["INPUT_KIND", "RESULT_KINDS", "build_graph", "resolve_graph", "run_order"]

#: the data kind of every recipe input
INPUT_KIND = "image"
#: steps giving these kinds are measurements: they always run
RESULT_KINDS = ("table", "values")


def build_graph(recipe: Recipe) -> nx.DiGraph:
    """The graph of inputs and steps (edges only between names that exist)."""
    graph = nx.DiGraph()
    for name in recipe.inputs:
        graph.add_node(name, role="input")
    for name, step in recipe.steps.items():
        graph.add_node(name, role="step", kind=step.kind)
    for name, step in recipe.steps.items():
        for source in step.to:
            if source in graph:
                graph.add_edge(source, name)
    return graph


def run_order(graph: nx.DiGraph, names: set[str]) -> tuple[str, ...]:
    """Topological generations of ``names``, each generation sorted by name."""
    sub = graph.subgraph(names)
    return tuple(n for generation in nx.topological_generations(sub) for n in sorted(generation))


def resolve_graph(
    recipe: Recipe,
    collector: ProblemCollector,
    *,
    strict: bool,
    declared: frozenset[str] = frozenset(),
) -> Recipe:
    """Check the graph of ``recipe``, adding problems to ``collector``.

    Returns the recipe with ``order``, ``unused`` and ``kinds`` filled in. With
    ``strict=False`` (the recipe already has other problems) only references and
    cycles are checked; names in ``declared`` (steps that exist but did not pass
    their own checks) are not reported as missing.
    """
    known = list(recipe.inputs) + list(recipe.steps)
    # An input is the graph's link to the lot: a glob that would leave the lot folder
    # is refused here, before anything runs, not when the lot is searched.
    for name, pattern in recipe.inputs.items():
        refused = check_pattern(pattern) if isinstance(pattern, str) else None
        if refused:
            collector.add(("inputs", name), f"{refused} (got {pattern!r})")
    for name in recipe.steps:
        if name in recipe.inputs:
            collector.add(("steps", name), f"{name!r} names both an input and a step", key=True)
    graph = build_graph(recipe)
    for name, step in recipe.steps.items():
        for i, source in enumerate(step.to):
            where = ("steps", name, "to") if len(step.to) == 1 else ("steps", name, "to", i)
            if source not in graph and source not in declared:
                close = difflib.get_close_matches(source, known, n=1, cutoff=0.6)
                hint = f" (did you mean {close[0]!r}?)" if close else ""
                collector.add(where, f"no input or step named {source!r}{hint}")
        kind = REGISTRY[step.kind]
        if not kind.input_count_ok(len(step.to)):
            need = f"at least {len(kind.takes)}" if kind.variadic else str(len(kind.takes))
            collector.add(
                ("steps", name, "to"), f"{step.kind} takes {need} input(s), got {len(step.to)}"
            )

    cyclic = _report_cycles(graph, collector)
    if cyclic or not strict:
        return recipe

    kinds: dict[str, str] = dict.fromkeys(recipe.inputs, INPUT_KIND)
    for name in run_order(graph, set(graph.nodes)):
        if name in recipe.inputs:
            continue
        step = recipe.steps[name]
        kind = REGISTRY[step.kind]
        given = [kinds.get(source) for source in step.to]
        ok = True
        for i, (source, got) in enumerate(zip(step.to, given, strict=True)):
            if got is None:
                ok = False
                continue
            accepted = kind.accepted(i)
            if got not in accepted:
                where = ("steps", name, "to") if len(step.to) == 1 else ("steps", name, "to", i)
                takes = " or ".join(sorted(accepted))
                collector.add(where, f"{step.kind} takes {takes}, but {source!r} gives {got}")
                ok = False
        if ok:
            kinds[name] = kind.output_kind([g for g in given if g is not None])

    targets = {
        name
        for name, step in recipe.steps.items()
        if step.keep or REGISTRY[step.kind].gives in RESULT_KINDS
    }
    targets |= {limit.step for limit in recipe.limits.values()}
    needed = set(targets)
    for target in targets:
        needed |= nx.ancestors(graph, target)
    needed -= set(recipe.inputs)
    if not needed:
        collector.add(
            ("steps",),
            "nothing to run: no step measures, none is kept (keep: true) and no limit needs one",
        )
    unused = tuple(sorted(set(recipe.steps) - needed))
    return dataclasses.replace(recipe, order=run_order(graph, needed), unused=unused, kinds=kinds)


def _report_cycles(graph: nx.DiGraph, collector: ProblemCollector) -> bool:
    work = graph.copy()
    found = False
    for _ in range(len(work.edges) + 1):
        try:
            cycle = nx.find_cycle(work)
        except nx.NetworkXNoCycle:
            break
        found = True
        names = [edge[0] for edge in cycle] + [cycle[0][0]]
        first = min(names[:-1])
        collector.add(("steps", first, "to"), "steps form a cycle: " + " -> ".join(names))
        work.remove_edge(*cycle[0][:2])
    return found
