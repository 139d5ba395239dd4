"""The places where two results dicts differ, for the tests that compare two paths to the same numbers."""
from __future__ import annotations

import math
from collections.abc import Collection
from typing import Any


def differences(a: Any, b: Any, skip: Collection[str] = (), path: str = "", rel: float = 1e-9) -> list[str]:
    """Every place where two results differ: keys only in one, lists of other lengths, numbers beyond
    ``rel`` relative (1e-13 absolute near 0), other values unequal; keys in ``skip`` are left out."""
    out: list[str] = []
    if isinstance(a, dict) and isinstance(b, dict):
        for k in set(a) | set(b):
            if k in skip:
                continue
            if k not in a or k not in b:
                out.append(f"{path}/{k} only in one")
            else:
                out += differences(a[k], b[k], skip, f"{path}/{k}", rel)
    elif isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            return [f"{path}: {len(a)} against {len(b)} items"]
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            out += differences(x, y, skip, f"{path}[{i}]", rel)
    elif isinstance(a, (int, float)) and isinstance(b, (int, float)) and not isinstance(a, bool):
        if not math.isclose(a, b, rel_tol=rel, abs_tol=1e-13):
            out.append(f"{path}: {a!r} against {b!r}")
    elif a != b:
        out.append(f"{path}: {a!r} against {b!r}")
    return out


def contract(res: Any) -> dict[str, Any]:
    """A comparison's results dict without its rendered tables (they come from the same numbers)."""
    d = res.to_dict()
    d.pop("tables")
    return d
