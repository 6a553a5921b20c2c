"""What every estimator's API promises alike (DESIGN.md: "merge" means the same in all)."""

from __future__ import annotations

import msgpack
import numpy as np
import pytest
from sigmad.estimators import Mixture, Moments, Regression


@pytest.mark.parametrize("make", [lambda: Moments(1), lambda: Regression(1), lambda: Mixture(2)],
                         ids=["Moments", "Regression", "Mixture"])
def test_merge_means_the_same_in_every_estimator(make):
    # every merge folds `other` into self, returns self, and leaves `other` as it was
    rng = np.random.default_rng(5)
    a, b = make(), make()
    if isinstance(a, Regression):
        a.update(rng.normal(size=(300, 1)), rng.normal(size=300))
        b.update(rng.normal(size=(300, 1)), rng.normal(size=300))
    else:
        a.update(rng.normal(0, 1, 300))
        b.update(rng.normal(3, 1, 300))
    before = b.to_dict()
    w_a, w_b = a.weight_sum, b.weight_sum
    assert a.merge(b) is a
    assert a.weight_sum == pytest.approx(w_a + w_b, rel=1e-15)
    assert msgpack.packb(b.to_dict()) == msgpack.packb(before)


def test_the_daemon_uses_only_what_the_estimators_export():
    # STYLE.md: the public API is __all__ and nothing else; the shell reaches only into it
    import ast
    from pathlib import Path

    import sigmad.estimators

    root = Path(__file__).resolve().parent.parent / "daemon"
    seen = 0
    for path in root.rglob("*.py"):
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.ImportFrom) and (node.module or "").startswith(
                    "sigmad.estimators"):
                assert node.module == "sigmad.estimators", (path.name, node.module)
                for alias in node.names:
                    assert alias.name in sigmad.estimators.__all__, (path.name, alias.name)
                    seen += 1
    assert seen > 10   # the daemon does use the estimators
