"""Every third-party package the program imports is a declared base dependency.

Regression: the ingest layer imported pyarrow, which only the test and parquet extras
installed. CI (which installs the test extra) stayed green while a plain `pip install .`
gave an interface that never applied its inbox.
"""

from __future__ import annotations

import ast
import re
import sys
import tomllib
from importlib.metadata import packages_distributions
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
# imported only behind a configured option, declared as an extra
OPTIONAL = {"dask", "distributed"}


def _imported_top_levels() -> dict[str, str]:
    found: dict[str, str] = {}
    for path in (ROOT / "tracker").rglob("*.py"):
        tree = ast.parse(path.read_text("utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                names = [node.module]
            else:
                continue
            for name in names:
                found.setdefault(name.split(".")[0], str(path.relative_to(ROOT)))
    return found


def _base_requirements() -> set[str]:
    meta = tomllib.loads((ROOT / "pyproject.toml").read_text("utf-8"))
    names = set()
    for req in meta["project"]["dependencies"]:
        names.add(re.split(r"[<>=!~\[; ]", req, maxsplit=1)[0].lower().replace("_", "-"))
    return names


def test_every_imported_package_is_a_base_dependency():
    dists = packages_distributions()
    base = _base_requirements()
    missing = []
    for top, where in sorted(_imported_top_levels().items()):
        if top in sys.stdlib_module_names or top in {"tracker", "__future__"} or top in OPTIONAL:
            continue
        owners = {d.lower().replace("_", "-") for d in dists.get(top, [top])}
        if not owners & base:
            missing.append(f"{top} (first imported in {where}; distribution {sorted(owners)})")
    assert not missing, "imported but not in [project] dependencies: " + "; ".join(missing)
