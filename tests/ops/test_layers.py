"""Layers and one home per rule, checked on the source text (ast and grep, no running server).

* Import layers: ``server/alarms`` never imports ``server.routes``; no module below the HTTP layer
  (analysis, storage, services, alarms, the worker, MQTT, errors) imports FastAPI or Starlette.
* The worker's loop (server/worker/loop.py) writes nothing itself: results go through server/worker/store.py,
  claims and failures through server/worker/claim.py.
* The demo plant (halfwatch_demo/) stays out of production: nothing in ``server/`` imports it except the
  ``halfwatch demo`` command's own module (server/cli/demo.py), which imports it on use.
* One home per rule: each formula, table, precedence, bucketing and forecast below is written once; a
  second copy anywhere in ``server/`` or ``analysis/`` fails the test with the file that holds it.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
HTTP_FREE = ["analysis", "server/storage", "server/services", "server/alarms", "server/mqtt", "server/ops",
             "server/audit", "server/worker", "server/errors.py", "server/settings.py"]


def _py(*parts: str) -> list[Path]:
    out = []
    for part in parts:
        p = ROOT / part
        out += [p] if p.is_file() else sorted(p.rglob("*.py"))
    return out


def _imports(path: Path) -> set[str]:
    names = set()
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.Import):
            names |= {a.name for a in node.names}
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module)
        elif isinstance(node, ast.ImportFrom) and node.level:  # relative: resolve against the package
            pkg = ".".join(path.relative_to(ROOT).with_suffix("").parts[:-node.level])
            names.add(f"{pkg}.{node.module}" if node.module else pkg)
    return names


def test_alarms_never_import_the_routes():
    bad = {str(p.relative_to(ROOT)): sorted(n for n in _imports(p) if n.startswith("server.routes"))
           for p in _py("server/alarms")}
    assert not {k: v for k, v in bad.items() if v}


@pytest.mark.parametrize("part", HTTP_FREE)
def test_no_web_framework_below_the_http_layer(part):
    bad = {}
    for p in _py(part):
        web = sorted(n for n in _imports(p) if n.split(".")[0] in ("fastapi", "starlette")
                     or n.startswith("server.routes") or n in ("server.app", "server.http_errors"))
        if web:
            bad[str(p.relative_to(ROOT))] = web
    assert not bad


def test_the_layer_check_sees_a_violation():
    """The checker itself can fail: the HTTP layer's own modules are seen importing FastAPI and routes."""
    assert "fastapi" in _imports(ROOT / "server/http_errors.py")
    assert any(n.startswith("server.routes") for n in _imports(ROOT / "server/app.py"))


# rule -> (regular expression of its formula/table/call, the one file allowed to hold it)
ONE_HOME = {
    "instability threshold a_c(f) = 2 sqrt(((f - 2 f0)/f0)^2 + 4 zeta^2) / k":
        (r"\*\*\s*2\s*\+\s*4(\.0)?\s*\*\s*zeta\s*\*\*\s*2", "analysis/physics/tongue.py"),
    "ISO 20816 zone table (group 2 rigid row)":
        (r"\(\s*1\.4\s*,\s*2\.8\s*,\s*4\.5\s*\)", "analysis/record/severity.py"),
    "rule precedence (edited point rule > asset rule > default point rule)":
        (r"not\s+\w+\.is_default\s+or", "server/alarms/rules.py"),
    "chart time buckets (width slightly above (b - a) / n)":
        (r"1\s*\+\s*1e-9\)\s*/", "server/storage/queries.py"),
    "trend forecast for charts and emails (a call of analysis.trend.fit_trend)":
        (r"(?<!def )\bfit_trend\(", "server/alarms/checks.py"),
    "dB per neper": (r"20(\.0)?\s*/\s*(math|np)\.log\(10", "analysis/physics/trend.py"),
}
# the CLI runs each method on a user's own data; the numerics below are the method's definition
ONE_HOME_SCOPE = ["server/alarms", "server/services", "server/routes", "server/storage", "server/worker",
                  "analysis/physics/window.py", "analysis/physics/tongue.py", "analysis/record/severity.py",
                  "analysis/physics/trend.py",
                  "halfwatch_demo"]


@pytest.mark.parametrize("rule", list(ONE_HOME))
def test_each_rule_has_one_home(rule):
    pattern, home = ONE_HOME[rule]
    rx = re.compile(pattern)
    holders = sorted({str(p.relative_to(ROOT)) for p in _py(*ONE_HOME_SCOPE)
                      if "migrations" not in p.parts and rx.search(p.read_text())})
    assert holders == [home], f"{rule}: defined in {holders}, should be only in {home}"


def test_the_one_home_patterns_match_their_home():
    """Each pattern still finds its own definition (a renamed formula would make the check vacuous)."""
    for rule, (pattern, home) in ONE_HOME.items():
        assert re.search(pattern, (ROOT / home).read_text()), rule


# what writing to the database looks like in the source: SQL constructs (sqlalchemy.exc, errors only, is
# allowed), the session/connection calls that open a write or run a statement, the store's own statements
WRITE_IMPORTS = {"sqlalchemy", "server.storage.tables", "server.storage.blobs", "server.storage.packing"}
WRITE_CALLS = {"write", "unit_of_work", "execute", "executemany", "add", "add_all", "merge", "flush",
               "commit", "insert", "update", "delete"}


def _writes(path: Path) -> list[str]:
    """Every place in a module that could write rows itself, as 'line: what'."""
    tree = ast.parse(path.read_text(), str(path))
    out = [f"{n.lineno}: import {m}" for n in ast.walk(tree) if isinstance(n, ast.Import | ast.ImportFrom)
           for m in ([n.module] if isinstance(n, ast.ImportFrom) else [a.name for a in n.names])
           if m and m != "sqlalchemy.exc" and (m in WRITE_IMPORTS or m.split(".")[0] == "sqlalchemy")]
    for n in ast.walk(tree):
        if isinstance(n, ast.Call):
            f = n.func
            name = f.attr if isinstance(f, ast.Attribute) else f.id if isinstance(f, ast.Name) else ""
            if name in WRITE_CALLS:
                out.append(f"{n.lineno}: {name}()")
        elif isinstance(n, ast.Name) and n.id in ("_INSERT_RESULT", "_COMPACT", "_SUPERSEDE", "_DONE"):
            out.append(f"{n.lineno}: {n.id}")
    return out


def test_the_worker_loop_writes_only_through_the_store():
    loop = ROOT / "server/worker/loop.py"
    assert _writes(loop) == []
    # and its results do go through the store module (the loop is not simply doing nothing)
    assert "server.worker.store" in _imports(loop)
    assert "store_batch(" in loop.read_text()


def test_the_write_check_sees_writes():
    """The checker can fail: the store and claim modules, which do write, are seen writing."""
    store = _writes(ROOT / "server/worker/store.py")
    assert any("_INSERT_RESULT" in w for w in store) and any("unit_of_work()" in w for w in store)
    assert any("write()" in w for w in _writes(ROOT / "server/worker/claim.py"))


DEMO_ENTRY = "server/cli/demo.py"
_DEMO_DYNAMIC = re.compile(r"""(import_module|__import__)\(\s*f?["']halfwatch_demo""")


def _demo_imports(path: Path) -> list[str]:
    """The halfwatch_demo imports of a module: import statements and importlib/__import__ by name."""
    found = sorted(n for n in _imports(path) if n.split(".")[0] == "halfwatch_demo")
    return found + [m.group(0) for m in _DEMO_DYNAMIC.finditer(path.read_text())]


def test_production_never_imports_the_demo_plant():
    bad = {str(p.relative_to(ROOT)): _demo_imports(p) for p in _py("server", "analysis")
           if str(p.relative_to(ROOT)) != DEMO_ENTRY}
    assert not {k: v for k, v in bad.items() if v}
    assert not list((ROOT / "server" / "demo").glob("*.py"))  # the old home is gone, not merely unused


def test_the_demo_check_sees_the_entry_and_the_demo_itself():
    """The checker can fail: the demo CLI entry (allowed) and the demo's own modules are seen importing it."""
    assert _demo_imports(ROOT / DEMO_ENTRY)
    assert "halfwatch_demo.backfill" in _demo_imports(ROOT / "halfwatch_demo/run.py")


@pytest.mark.parametrize("argv", [["demo", "--no-serve", "--days", "1"], ["mail-sink", "--port", "0"]])
def test_the_demo_commands_say_what_to_install_without_the_demo_package(argv, monkeypatch, capsys, tmp_path):
    """A server installed without halfwatch_demo: ``halfwatch demo`` exits 2 with a one-line message that says
    how to get it, not a traceback (None in sys.modules makes the import fail as a missing package would)."""
    import sys

    from server.cli import main

    monkeypatch.chdir(tmp_path)
    for name in [n for n in sys.modules if n.split(".")[0] == "halfwatch_demo"]:
        monkeypatch.delitem(sys.modules, name)
    monkeypatch.setitem(sys.modules, "halfwatch_demo", None)
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert f"halfwatch {argv[0]}: the demo plant (package halfwatch_demo) is not installed" in err
    assert "make demo" in err and "pip install -e ." in err
    assert not list(tmp_path.iterdir())  # it stopped before writing anything
