"""The test lanes: every marker is registered, make test runs every test, make test-fast leaves out each marker."""

from __future__ import annotations

import ast
import re
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
#: Markers pytest itself defines (not lanes).
BUILTIN = {"parametrize", "skipif", "skip", "xfail", "usefixtures", "filterwarnings"}


def _registered() -> set[str]:
    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    return {m.split(":")[0].strip() for m in config["tool"]["pytest"]["ini_options"]["markers"]}


def _used() -> set[str]:
    found = set()
    for path in (ROOT / "tests").glob("*.py"):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            # pytest.mark.<name>
            if (isinstance(node, ast.Attribute) and isinstance(node.value, ast.Attribute)
                    and node.value.attr == "mark" and isinstance(node.value.value, ast.Name)
                    and node.value.value.id == "pytest"):
                found.add(node.attr)
    return found - BUILTIN


def _recipe(target: str) -> str:
    """The command lines of a Makefile target."""
    lines = (ROOT / "Makefile").read_text(encoding="utf-8").splitlines()
    start = next(i for i, line in enumerate(lines) if re.match(rf"{re.escape(target)}:", line))
    body = []
    for line in lines[start + 1:]:
        if not line.startswith("\t"):
            break
        body.append(line.strip())
    return "\n".join(body)


def test_every_marker_used_is_registered_and_every_registered_one_is_used() -> None:
    # --strict-markers refuses an unregistered one; a registered one nobody uses is a dead lane
    assert _used() == _registered() == {"slow", "browser", "dask", "subprocess"}


def test_make_test_runs_everything_and_test_fast_leaves_out_each_marker() -> None:
    full = [line for line in _recipe("test").splitlines() if "pytest" in line]
    options = full[0].split("pytest", 1)[1]   # what follows "python -m pytest"
    assert len(full) == 1 and not re.search(r"\s-(m|k)\s|--deselect|--ignore", options + " "), full
    fast = [line for line in _recipe("test-fast").splitlines() if "pytest" in line]
    assert len(fast) == 1
    expression = re.search(r'-m "([^"]+)"', fast[0]).group(1)
    assert set(re.findall(r"not (\w+)", expression)) == _registered()
    assert "HYPOTHESIS_PROFILE=fast" in fast[0]
