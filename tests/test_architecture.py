"""The structure drawn from the imports flows one way, and the library changes no process-wide state.

The import graph is read from the source (``ast``: every ``import`` and ``from ... import``,
module level or inside a function), so a lazy import counts as much as a top-level one.
"""

from __future__ import annotations

import ast
import csv
import functools
import re
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
LIBRARY = ROOT / "harmonize"


def _modules() -> dict[str, Path]:
    found = {}
    for path in LIBRARY.rglob("*.py"):
        name = ".".join(path.relative_to(ROOT).with_suffix("").parts)
        found[name.removesuffix(".__init__")] = path
    return found


MODULES = _modules()


@functools.cache
def _tree(path: Path) -> ast.Module:
    """The parsed source of a file (parsed once per test process; the tests only read it)."""
    return ast.parse(path.read_text(encoding="utf-8"))


def _imports(path: Path) -> Iterator[tuple[str, str | None, int]]:
    """(module imported, name imported from it or None, line) for every import in a file."""
    for node in ast.walk(_tree(path)):
        if isinstance(node, ast.Import):
            for alias in node.names:
                yield alias.name, None, node.lineno
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            for alias in node.names:
                # "from harmonize import twins" imports the module harmonize.twins
                full = f"{node.module}.{alias.name}"
                yield (full, None, node.lineno) if full in MODULES else (node.module, alias.name, node.lineno)


def _edges(prefix: str) -> list[tuple[str, str, str | None, int]]:
    """(importer, imported module, name, line) for the library modules under ``prefix``."""
    return [(mod, target, name, line) for mod, path in sorted(MODULES.items())
            if mod == prefix or mod.startswith(prefix + ".")
            for target, name, line in _imports(path) if target.startswith("harmonize")]


def _under(module: str, prefix: str) -> bool:
    return module == prefix or module.startswith(prefix + ".")


def test_the_graph_reader_sees_lazy_imports(tmp_path: Path) -> None:
    # the reader must see an import inside a function (the kind a leak hides in)
    path = tmp_path / "lazy.py"
    path.write_text("def f():\n    if True:\n        from harmonize.adapters import registry\n"
                    "        import harmonize.twins\n", encoding="utf-8")
    assert sorted(_imports(path)) == [("harmonize.adapters.registry", None, 3), ("harmonize.twins", None, 4)]
    # ... as in the library: the audit imports its Dask implementation only when it is chosen
    lazy = [e for e in _edges("harmonize.audit") if e[1] == "harmonize.engines.dask_engine"]
    assert lazy, "the import inside the audit's Dask engine lookup was not seen"


@pytest.mark.parametrize(("importer", "forbidden"), [
    # the store knows nothing of the volunteer twins or of profiles (twins is a commit hook)
    ("harmonize.store", "harmonize.twins"),
    ("harmonize.store", "harmonize.twin_windows"),
    ("harmonize.store", "harmonize.profile"),
    ("harmonize.store", "harmonize.ingest"),
    ("harmonize.store", "harmonize.audit"),
    ("harmonize.store", "harmonize.export"),
    ("harmonize.store", "harmonize.api"),
    # ... nor of adapters: what it checks per ingest (row tracing) is recorded at commit
    ("harmonize.store", "harmonize.adapters"),
    # ... nor does the merging of parts it defines its views with (the rules are recorded at commit)
    ("harmonize.parts", "harmonize.adapters"),
    # engines implement steps; the audit chooses them by name, never the other way
    ("harmonize.engines", "harmonize.audit"),
    # adapters read files: they know no store, no twins, no audit or export
    ("harmonize.adapters", "harmonize.store"),
    ("harmonize.adapters", "harmonize.twins"),
    ("harmonize.adapters", "harmonize.audit"),
    ("harmonize.adapters", "harmonize.export"),
    # reading provider files (text, fields, quarantine, taxa) serves the adapters, never the other way
    ("harmonize.reading", "harmonize.adapters"),
    ("harmonize.reading", "harmonize.store"),
    ("harmonize.reading", "harmonize.ingest"),
    ("harmonize.twins", "harmonize.profile"),
    ("harmonize.twins", "harmonize.adapters"),
    # audit and exports read the store; they never run the pipeline
    ("harmonize.audit", "harmonize.ingest"),
    ("harmonize.export", "harmonize.ingest"),
    # the library knows no command line
    ("harmonize", "harmonize.cli"),
])
def test_no_import_against_the_flow(importer: str, forbidden: str) -> None:
    bad = [f"{mod} line {line} imports {target}" for mod, target, _name, line in _edges(importer)
           if _under(target, forbidden) and mod != "harmonize.__main__"]   # the entry point runs the CLI
    assert bad == []


def test_exports_use_only_the_public_api_of_the_store() -> None:
    public = {"Store", "has_table"}
    bad = [f"{mod} line {line}: {name or target}" for mod, target, name, line in _edges("harmonize.export")
           if target == "harmonize.store" and name not in public]
    assert bad == []
    # ... and call no private method of it (store._x) nor the staging folders
    for mod, path in MODULES.items():
        if _under(mod, "harmonize.export"):
            text = path.read_text(encoding="utf-8")
            assert "staging_dir(" not in text and "store._" not in text and "Store._" not in text, mod


def _attribute_uses(attr_of: str, attr: str) -> list[str]:
    found = []
    for mod, path in sorted(MODULES.items()):
        for node in ast.walk(_tree(path)):
            if (isinstance(node, ast.Attribute) and node.attr == attr and isinstance(node.value, ast.Name)
                    and node.value.id == attr_of):
                found.append(f"{mod} line {node.lineno}")
            elif isinstance(node, ast.ImportFrom) and node.module == attr_of and any(
                    a.name == attr for a in node.names):
                found.append(f"{mod} line {node.lineno}")
    return found


@pytest.mark.parametrize(("owner", "attr"), [("os", "environ"), ("os", "getenv"), ("os", "putenv")])
def test_the_library_reads_no_environment_variable(owner: str, attr: str) -> None:
    # HARMONIZE_* variables are read by the command line (cli/app.py) into harmonize.settings
    assert _attribute_uses(owner, attr) == []


@pytest.mark.parametrize(("owner", "attr", "allowed"), [
    ("netCDF4", "set_chunk_cache", set()),
    ("csv", "field_size_limit", {"harmonize.reading.text"}),   # csv_field_limit: raised while parsing, under a lock
    ("np", "seterr", set()),
    ("pd", "set_option", set()),
    ("warnings", "simplefilter", set()),
    ("warnings", "filterwarnings", set()),
    ("os", "chdir", set()),
    ("os", "umask", set()),
])
def test_no_process_wide_setting_changed_by_the_library(owner: str, attr: str, allowed: set[str]) -> None:
    found = {use.split(" line ")[0] for use in _attribute_uses(owner, attr)}
    assert found <= allowed, sorted(found - allowed)


# ---------------------------------------------------------------------------- behaviour


def test_csv_field_limit_is_put_back_after_reading(tmp_path: Path) -> None:
    from harmonize.profile import Profile
    from harmonize.reading.text import MAX_FIELD_CHARS, LineReader, csv_field_limit

    before = csv.field_size_limit()
    assert before != MAX_FIELD_CHARS
    path = tmp_path / "rows.csv"
    long_cell = "x" * (before + 10)    # a field the csv module's own default refuses
    path.write_text("a,b\n" + "".join(f"{i},{long_cell if i == 3 else 'y'}\n" for i in range(1, 8)), encoding="utf-8")
    profile = Profile(path=tmp_path / "p.toml", source_id="s", kind="trawl", provider_type="agency",
                      protocol=None, delimiter=",")
    with LineReader(path, profile) as reader:
        assert csv.field_size_limit() == before
        blocks = reader.blocks(size=2)
        first = next(blocks)
        # between blocks the caller's limit holds: its own parsing still refuses long fields
        assert csv.field_size_limit() == before
        with pytest.raises(csv.Error, match="field larger than field limit"):
            list(csv.reader([long_cell]))
        rest = list(blocks)
    assert [len(b.rows) for b in [first, *rest]] == [2, 2, 2, 1]
    assert rest[0].rows[0][1] == long_cell
    assert csv.field_size_limit() == before
    with csv_field_limit(123):
        assert csv.field_size_limit() == 123
    assert csv.field_size_limit() == before


def test_readers_in_threads_leave_the_csv_field_limit_as_they_found_it(tmp_path: Path) -> None:
    # Each reader saves the limit, raises it and puts the saved value back. Unserialised, two
    # threads interleave (A saves 128 KiB, B saves A's raised value, A restores, B restores
    # the raised value) and the process keeps the raised limit; or one thread's restore lowers
    # the limit under another thread's parse, which then fails on its long cell.
    import threading

    from harmonize.profile import Profile
    from harmonize.reading.text import LineReader

    before = csv.field_size_limit()
    long_cell = "x" * (before + 10)
    paths = []
    for k in range(4):
        path = tmp_path / f"rows{k}.csv"
        path.write_text("a,b\n" + "".join(f"{i},{long_cell if i % 3 == 0 else 'y'}\n" for i in range(1, 40)),
                        encoding="utf-8")
        paths.append(path)
    profile = Profile(path=tmp_path / "p.toml", source_id="s", kind="trawl", provider_type="agency",
                      protocol=None, delimiter=",")
    failures: list[BaseException] = []
    counts: list[int] = []

    def read(path: Path) -> None:
        try:
            for _ in range(20):
                with LineReader(path, profile) as reader:
                    counts.append(sum(len(b.rows) for b in reader.blocks(size=2)))
        except BaseException as exc:  # noqa: BLE001 (reported by the main thread)
            failures.append(exc)

    threads = [threading.Thread(target=read, args=(p,)) for p in paths]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert failures == []
    assert counts == [39] * 80
    assert csv.field_size_limit() == before


def test_gridded_reading_leaves_the_netcdf_chunk_cache_alone(study_dir: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import netCDF4
    import numpy as np
    from gridded_files import regular_file, write_profile

    from harmonize import load_study, run

    before = netCDF4.get_chunk_cache()

    def refuse(*args: object) -> None:
        raise AssertionError("the library changed the process-wide NetCDF chunk cache")

    monkeypatch.setattr(netCDF4, "set_chunk_cache", refuse)
    lat, lon = np.array([43.0, 43.1]), np.array([-152.0, -151.9])
    path = regular_file(study_dir / "sst.nc", {"sst": (np.full((2, 2, 2), 9.0, np.float32),
                                                      {"units": "degC", "_FillValue": np.float32(-999)})},
                        lat, lon, time=[1.0, 2.0])
    write_profile(study_dir, "sst_sat", 'sst = "sea_surface_temperature"')
    result = run(load_study(study_dir), "sst_sat", {"rows": path})
    assert result.status == "complete" and result.rows_accepted == 8
    assert netCDF4.get_chunk_cache() == before


def test_settings_come_from_the_boundary_not_the_environment(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from harmonize import settings
    from harmonize.errors import StoreError
    from harmonize.store import DEFAULT_LOCK_TIMEOUT_S, Store

    outside = settings.current()  # the test run's own (tests/conftest.py), unchanged by the library
    monkeypatch.setenv("HARMONIZE_LOCK_TIMEOUT", "7")
    assert Store(tmp_path).lock_timeout_s == DEFAULT_LOCK_TIMEOUT_S == 60.0
    with settings.applied(settings.from_environment({"HARMONIZE_LOCK_TIMEOUT": "7"})):
        assert Store(tmp_path).lock_timeout_s == 7.0
        assert Store(tmp_path, lock_timeout_s=2).lock_timeout_s == 2.0
    with settings.applied(settings.from_environment({"HARMONIZE_LOCK_TIMEOUT": "soon"})):
        with pytest.raises(StoreError, match="HARMONIZE_LOCK_TIMEOUT='soon' is not a number of seconds"):
            Store(tmp_path)
    assert settings.from_environment({"HARMONIZE_ENGINE": "  ", "OTHER": "x"}) == settings.Settings()
    assert settings.current() == outside


def test_the_cli_reads_the_environment_for_one_command(study_dir: Path) -> None:
    from cli_runner import run_cli

    from harmonize import settings

    outside = settings.current()  # the test run's own (tests/conftest.py)
    # the command line applies HARMONIZE_LOCK_TIMEOUT: a bad value is its one-line usage error
    result = run_cli("--study", str(study_dir), "status", env={"HARMONIZE_LOCK_TIMEOUT": "soon"})
    assert result.exit_code == 2
    assert "HARMONIZE_LOCK_TIMEOUT='soon' is not a number of seconds" in result.stderr
    assert settings.current() == outside   # nothing left behind in this process



def test_no_list_of_kind_names_outside_the_adapters() -> None:
    # every list of kinds derives from the adapter classes (registry.kinds(**traits)); a literal
    # tuple, list or set naming two or more kinds anywhere else is a second copy
    from harmonize.adapters.registry import kinds

    names = set(kinds())
    found = []
    for mod, path in sorted(MODULES.items()):
        if _under(mod, "harmonize.adapters") or _under(mod, "harmonize.demo"):
            continue
        for node in ast.walk(_tree(path)):
            if isinstance(node, ast.Tuple | ast.List | ast.Set):
                named = [e.value for e in node.elts if isinstance(e, ast.Constant) and e.value in names]
                if len(named) >= 2:
                    found.append(f"{mod} line {node.lineno}: {named}")
    assert found == []


def test_merge_rules_come_from_the_adapter_classes() -> None:
    from harmonize import parts
    from harmonize.adapters.registry import list_adapters

    rules = {kind: parts.merge_rule(cls.merges_parts, cls.parts_add_up) for kind, cls in list_adapters().items()}
    # docs/store.md: values that span files; fishing hours add up, a grid cell's value is the
    # area-weighted mean of its parts
    assert {kind: rule for kind, rule in rules.items() if rule != parts.NONE} == {"effort": "sum", "gridded": "mean"}



def _kind_texts(tree: ast.Module, names: tuple[str, ...]) -> list[tuple[int, list[str]]]:
    """String constants (an f-string's literal parts included) quoting two or more kind names."""
    quoted = re.compile("['\"]({})['\"]".format("|".join(re.escape(k) for k in names)))
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Constant) and isinstance(node.value, str):
            named = sorted(set(quoted.findall(node.value)))
            if len(named) >= 2:
                found.append((node.lineno, named))
    return found


def _outside_the_adapters(check: Callable[[ast.Module], list[tuple[int, object]]]) -> list[str]:
    """What ``check`` finds (line, what) in the library's modules but the adapters and the demo."""
    return [f"{mod} line {line}: {what!r}" for mod, path in sorted(MODULES.items())
            if not (_under(mod, "harmonize.adapters") or _under(mod, "harmonize.demo"))
            for line, what in check(_tree(path))]


def test_no_list_of_kind_names_in_sql_text_outside_the_adapters() -> None:
    # the same for lists written inside SQL or other text, e.g. "source_kind IN ('trawl',
    # 'plankton')": a second copy of a list the adapters' attributes define
    from harmonize.adapters.registry import kinds

    assert _outside_the_adapters(lambda tree: _kind_texts(tree, kinds())) == []


def test_the_kind_text_check_can_fail(tmp_path: Path) -> None:
    from harmonize.adapters.registry import kinds

    a, b = kinds()[:2]
    path = tmp_path / "leak.py"
    path.write_text(f"SQL = f\"WHERE source_kind IN ('{a}', '{b}') AND x = {{1}}\"\nONE = \"kind = '{a}'\"\n",
                    encoding="utf-8")
    assert _kind_texts(_tree(path), kinds()) == [(1, sorted([a, b]))]


_LOG_CALLS = {"debug", "info", "warning", "error", "exception", "critical", "warn"}


def _prose(tree: ast.Module) -> set[int]:
    """ids of the string constants that are prose: docstrings and the texts of log calls."""
    out: set[int] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Module | ast.ClassDef | ast.FunctionDef | ast.AsyncFunctionDef) and node.body:
            first = node.body[0]
            if isinstance(first, ast.Expr) and isinstance(first.value, ast.Constant):
                out.add(id(first.value))
        elif (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)
              and node.func.attr in _LOG_CALLS):
            out.update(id(n) for arg in node.args for n in ast.walk(arg))
    return out


def _single_kind_uses(tree: ast.Module, names: tuple[str, ...]) -> list[tuple[int, str]]:
    """Single kind names a module selects by: quoted in SQL text, or compared with in Python.

    SQL text: a string constant (an f-string's literal parts included; docstrings and log
    messages aside) holding a kind name in single quotes, e.g. ``source_kind = 'gridded'``.
    The variable kind ``'effort'`` (a column of its own, ``variable_kind``) is not a source kind.
    Python: ``==``, ``!=``, ``in``, ``not in`` with a kind name, or ``.eq`` / ``.ne`` / ``.isin``
    of one (pandas), unless the other side is a variable_kind.
    """
    kind = "|".join(re.escape(k) for k in names)
    quoted = re.compile(f"'({kind})'")
    variable_kind = re.compile(rf"variable_kind\s*(?:=|<>|!=)\s*'({kind})'|'({kind})'\s+AS\s+variable_kind", re.I)
    prose = _prose(tree)

    def constant_kinds(node: ast.AST) -> list[str]:
        elts = node.elts if isinstance(node, ast.Tuple | ast.List | ast.Set) else [node]
        return [e.value for e in elts if isinstance(e, ast.Constant) and e.value in names]

    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Constant) and isinstance(node.value, str) and id(node) not in prose:
            found += [(node.lineno, k) for k in quoted.findall(variable_kind.sub("", node.value))]
        elif isinstance(node, ast.Compare):
            sides = [node.left, *node.comparators]
            if not any("variable_kind" in ast.unparse(s) for s in sides):
                found += [(node.lineno, k) for s in sides for k in constant_kinds(s)]
        elif (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)
              and node.func.attr in ("eq", "ne", "isin") and "variable_kind" not in ast.unparse(node.func.value)):
            found += [(node.lineno, k) for a in node.args for k in constant_kinds(a)]
    return sorted(found)


def test_no_single_kind_name_in_sql_or_comparisons_outside_the_adapters() -> None:
    # what a behaviour depends on is an attribute of the adapter classes (e.g. grid_values,
    # locates_vessels, the merge rule of parts), selected through registry.kinds_sql; a
    # "source_kind = 'gridded'" outside the adapters is a kind's knowledge in a second place
    from harmonize.adapters.registry import kinds

    assert _outside_the_adapters(lambda tree: _single_kind_uses(tree, kinds())) == []


def test_the_single_kind_check_can_fail(tmp_path: Path) -> None:
    from harmonize.adapters.registry import kinds

    a, b = kinds()[:2]
    path = tmp_path / "leak.py"
    path.write_text(
        f'"""A docstring may name \'{a}\'."""\n'
        f"SQL = f\"WHERE source_kind <> '{a}' AND x = {{1}}\"\n"
        f"PANDAS = frame['source_kind'].ne('{b}')\n"
        f"PLAIN = kind == '{a}'\n"
        "FINE = \"'effort' AS variable_kind, variable_kind = 'effort'\"\n"
        f"log.warning(\"nothing of kind '{a}'\")\n",
        encoding="utf-8")
    assert _single_kind_uses(ast.parse(path.read_text(encoding="utf-8")), kinds()) == [(2, a), (3, b), (4, a)]


def _private_imports(prefix: str) -> list[str]:
    """Names with a leading underscore that modules under ``prefix`` import from library modules."""
    return [f"{mod} line {line}: {target}.{name}" for mod, target, name, line in _edges(prefix)
            if name is not None and name.startswith("_") and not name.startswith("__")]


def test_the_readers_use_each_other_through_public_names() -> None:
    # the block reader shares the text reader's header check through its public name (one
    # implementation, no reach into another module's private parts)
    assert _private_imports("harmonize.reading") == []
