"""The shape of the package: no import circles, and the small pieces shared between stages."""

from __future__ import annotations

import ast
from pathlib import Path

import numpy as np
import scipy.signal

from pipeline.dsp import raised_cosine

PACKAGE = Path(__file__).resolve().parents[1] / "pipeline"


def _imports(path: Path) -> set[str]:
    """Modules of the package that ``path`` imports anywhere (module level or inside functions)."""
    found = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and (node.module or "").startswith("pipeline"):
            parts = node.module.split(".")
            found |= {parts[1]} if len(parts) > 1 else {a.name for a in node.names}
        elif isinstance(node, ast.Import):
            found |= {a.name.split(".")[1] for a in node.names if a.name.startswith("pipeline.")}
    return found


def test_no_module_imports_itself_back_through_others():
    graph = {p.stem: _imports(p) - {p.stem} for p in PACKAGE.glob("*.py")}
    done, stack = set(), []

    def visit(mod: str) -> None:
        if mod in stack:
            raise AssertionError(f"import circle: {' -> '.join(stack[stack.index(mod):] + [mod])}")
        if mod in done or mod not in graph:
            return
        stack.append(mod)
        for dep in sorted(graph[mod]):
            visit(dep)
        stack.pop()
        done.add(mod)

    for mod in sorted(graph):
        visit(mod)
    assert "latent" in graph["latent_health"] and "latent_health" not in graph["latent"]


def test_the_fade_is_half_a_periodic_hann_window():
    # scipy.signal.windows.hann(2n, sym=False)[k] = sin^2(pi k / 2n): its first half rises
    for n in (1, 2, 7, 320):
        half = scipy.signal.windows.hann(2 * n, sym=False)[:n]
        np.testing.assert_allclose(raised_cosine(n), half, atol=1e-15)
        np.testing.assert_allclose(raised_cosine(n, rising=False), half[::-1], atol=1e-15)
        assert raised_cosine(n)[0] == 0.0 and raised_cosine(n, rising=False)[-1] == 0.0
    assert raised_cosine(0).shape == (0,)
