"""What importing adfit costs, and where JAX comes in.

``import adfit``, ``import adfit.cli`` and ``adfit --help`` must not import JAX (it is most of a
help screen's time: docs/performance.md, benchmarks/bench_cli.py; no timing here). Every module
that computes with JAX imports it from ``adfit/_jax.py``, which switches float64 on, so that no
module can be imported first without it. Each check runs in a fresh interpreter: the test process
itself has JAX loaded (tests/conftest.py).
"""

from __future__ import annotations

import ast
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "adfit"
COMMANDS = ["gaps", "em", "fit", "score", "show", "impute", "query", "demo", "report", "sensitivity"]


def python(code: str, *args: str, env: dict | None = None) -> subprocess.CompletedProcess:
    """Run ``python -c code`` from the repository root (this checkout's adfit first on the path)."""
    full_env = {k: v for k, v in os.environ.items() if k != "ADFIT_COMPILE_CACHE"}
    full_env.update({"COLUMNS": "80", "TERM": "dumb", **(env or {})})
    return subprocess.run([sys.executable, "-c", code, *args], cwd=ROOT, capture_output=True, text=True,
                          env=full_env, timeout=300)


def test_importing_the_package_and_the_cli_imports_no_jax():
    r = python("import sys, adfit, adfit.cli; assert 'jax' not in sys.modules, 'jax imported'; "
               "assert 'pandas' not in sys.modules, 'pandas imported'; print(adfit.__version__)")
    assert r.returncode == 0, r.stderr
    # the public names are still there, loaded on first use
    r = python("import sys, adfit; n = adfit.Network; assert n.__module__ == 'adfit.network'; "
               "assert 'jax' not in sys.modules; assert set(adfit.__all__) <= set(dir(adfit)); "
               "from adfit import load_data, AdfitError; print('ok')")
    assert r.returncode == 0 and r.stdout.strip() == "ok", r.stderr
    r = python("import adfit; adfit.no_such_name")
    assert r.returncode != 0 and "AttributeError" in r.stderr and "no_such_name" in r.stderr


HELP_CHECK = """
import sys
sys.argv = ['adfit', *sys.argv[1:]]
from adfit.cli import main
try:
    main()
finally:
    sys.stderr.write('JAX_IMPORTED=%s\\n' % ('jax' in sys.modules))
"""


@pytest.mark.parametrize("argv", [["--help"], ["fit", "--help"], ["score", "--help"]])
def test_help_imports_no_jax_and_lists_the_commands(argv):
    r = python(HELP_CHECK, *argv)
    assert r.returncode == 0, r.stderr
    assert "JAX_IMPORTED=False" in r.stderr
    if argv == ["--help"]:
        for name in COMMANDS:
            assert f" {name} " in r.stdout, (name, r.stdout)
        assert "Usage: adfit " in r.stdout
    else:
        assert f"Usage: adfit {argv[0]} " in r.stdout
        assert "--help" in r.stdout


@pytest.mark.parametrize("module", ["adfit", "adfit.cli"])
def test_python_m_runs_the_command_line(module):
    r = subprocess.run([sys.executable, "-m", module, "--help"], cwd=ROOT, capture_output=True, text=True,
                       env={**os.environ, "COLUMNS": "80", "TERM": "dumb"}, timeout=300)
    assert r.returncode == 0, r.stderr
    for name in COMMANDS:
        assert f" {name} " in r.stdout, name
    # and an error still ends as one line and exit code 1
    r = subprocess.run([sys.executable, "-m", module, "show", str(ROOT / "pyproject.toml")], cwd=ROOT,
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 1, (r.returncode, r.stderr)
    assert r.stderr.startswith("adfit: error: ") and len(r.stderr.strip().splitlines()) == 1, r.stderr


def _jax_imports(path: Path) -> list[str]:
    """``import jax...`` / ``from jax... import`` statements anywhere in a module (also inside functions)."""
    found = []
    for node in ast.walk(ast.parse(path.read_text(), filename=str(path))):
        if isinstance(node, ast.Import):
            found += [f"{path.name}:{node.lineno}" for a in node.names if a.name.split(".")[0] == "jax"]
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and (node.module or "").split(".")[0] == "jax":
            found.append(f"{path.name}:{node.lineno}")
    return found


def test_jax_is_imported_only_through_adfit_jax():
    """float64 cannot be forgotten: only adfit/_jax.py (and the cache set-up, which it calls with
    JAX configured) import JAX themselves."""
    allowed = {"_jax.py", "_compile_cache.py"}
    offenders = [hit for p in sorted(PACKAGE.rglob("*.py")) if p.name not in allowed for hit in _jax_imports(p)]
    assert offenders == []
    # the scan sees an import where there is one (a check that cannot fail is no check)
    assert _jax_imports(PACKAGE / "_jax.py")


FIRST_IMPORT = """
import json, sys
from adfit._compile_cache import request_compilation_cache
request_compilation_cache(sys.argv[2])
import importlib
importlib.import_module(sys.argv[1])
import jax, jax.numpy as jnp
print(json.dumps({"dtype": str(jnp.asarray(1.0).dtype), "x64": bool(jax.config.jax_enable_x64),
                  "cache": jax.config.jax_compilation_cache_dir}))
"""


@pytest.mark.parametrize("module", ["adfit.minibatch", "adfit.uncertainty"])
def test_any_jax_module_imported_first_switches_on_float64_and_the_requested_cache(module, tmp_path):
    r = python(FIRST_IMPORT, module, str(tmp_path / "cache"))
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout.strip().splitlines()[-1])
    assert out == {"dtype": "float64", "x64": True, "cache": str(tmp_path / "cache")}
    assert (tmp_path / "cache").is_dir()


def test_the_cache_can_still_be_switched_off(tmp_path):
    r = python(FIRST_IMPORT, "adfit.likelihood", str(tmp_path / "cache"), env={"ADFIT_COMPILE_CACHE": "0"})
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout.strip().splitlines()[-1])
    assert out["dtype"] == "float64" and not out["cache"]
    assert not (tmp_path / "cache").exists()


def _package_imports() -> dict[str, set[str]]:
    """adfit module -> the adfit modules it imports, at its top or inside functions (ast).

    Modules of a subpackage are named with dots (``likelihood.plan``; its ``__init__`` is
    ``likelihood``). Inside a subpackage an import names the submodule it reads; from outside,
    importing any part of a subpackage runs its ``__init__``, so the edge goes to the package."""
    graph = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = path.relative_to(PACKAGE).with_suffix("").parts
        name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
        if not name:
            continue
        here = parts[:-1]  # the package the module is in, relative to adfit
        deps = set()
        for node in ast.walk(ast.parse(path.read_text())):
            if not (isinstance(node, ast.ImportFrom) and node.level >= 1):
                continue
            base = here[:len(here) - (node.level - 1)] if node.level > 1 else here
            targets = [(*base, *node.module.split("."))] if node.module else [(*base, a.name) for a in node.names]
            for t in targets:
                if t and t[0] != (here[:1] or ("",))[0]:
                    t = t[:1]  # from outside a subpackage: its __init__ runs
                mod = ".".join(t)
                while mod and not ((PACKAGE / mod.replace(".", "/")).with_suffix(".py").exists()
                                   or (PACKAGE / mod.replace(".", "/") / "__init__.py").exists()):
                    mod = mod.rpartition(".")[0]  # "from .x import name": the module x
                if mod and mod != name:
                    deps.add(mod)
        graph[name] = deps
    return graph


def test_no_import_circles_between_modules():
    """No module reaches itself through imports, lazy ones included (DEVELOPERS.md). The one
    allowed pair: ``_jax`` calls ``_compile_cache`` once JAX is configured, which imports JAX
    back from ``_jax`` only inside a function (both are there to keep --help free of JAX)."""
    graph = _package_imports()
    allowed = {frozenset({"_jax", "_compile_cache"})}
    circles = []
    for start in graph:
        stack = [(start, (start,))]
        while stack:
            mod, path = stack.pop()
            for dep in graph.get(mod, ()):
                if dep == start and frozenset(path) not in allowed:
                    circles.append(" -> ".join(path + (dep,)))
                elif dep not in path:
                    stack.append((dep, path + (dep,)))
    assert not circles, circles
    # the parameterisation layer sits below the optimisers that use it
    assert not graph["params"] & {"fit", "restarts", "minibatch", "uncertainty"}
    assert "fit" not in graph["restarts"] | graph["minibatch"]
    # the EM reference (with its structured M-steps) shares nothing with the JAX core
    core = {"_jax", "likelihood", "params", "fit", "restarts", "minibatch", "uncertainty", "crosscheck"}
    core |= {m for m in graph if m.startswith("likelihood.")}
    assert {"likelihood", "likelihood.plan", "likelihood.api"} <= set(graph)  # the subpackage is seen
    assert "likelihood.plan" in graph["likelihood.api"] and "likelihood" in graph["fit"]
    for mod in ("em", "emforms"):
        reach, todo = set(), [mod]
        while todo:
            for dep in graph.get(todo.pop(), ()):
                if dep not in reach:
                    reach.add(dep)
                    todo.append(dep)
        assert not reach & core, (mod, reach & core)


def test_every_name_taken_from_the_likelihood_package_is_there():
    """adfit/likelihood/ was one module: every name that a module, test, benchmark or example
    imports from ``adfit.likelihood`` (``from adfit.likelihood import x``, ``from .likelihood
    import x``) is an attribute of the package."""
    import adfit.likelihood as lk
    wanted = set()
    for folder in ("adfit", "tests", "benchmarks", "examples"):
        for path in sorted((ROOT / folder).rglob("*.py")):
            for node in ast.walk(ast.parse(path.read_text())):
                if isinstance(node, ast.ImportFrom) and (node.module or "").split(".")[-1] == "likelihood" \
                        and (node.level == 1 or node.module == "adfit.likelihood"):
                    wanted.update((a.name, path.name) for a in node.names)
    assert {("Likelihood", "fit.py"), ("_group_plan", "minibatch.py")} <= wanted  # the scan sees imports
    missing = sorted((name, where) for name, where in wanted if not hasattr(lk, name))
    assert missing == []


def test_a_name_set_on_the_likelihood_package_reaches_every_file_that_reads_it(monkeypatch):
    """Tests and benchmarks set tunables and wrap functions on the package (as on the former single
    module); each file of the core holds its own binding, and every one of them must follow."""
    import adfit.likelihood as lk
    from adfit.likelihood import api, plan, posteriors, settings, sharding
    real = lk.build_plan
    monkeypatch.setattr(lk, "SUM_BARREN_LEAVES", False)
    monkeypatch.setattr(lk, "SHARD_MIN_S", 123.0)

    def fake(*a, **k):
        raise AssertionError("not called")
    monkeypatch.setattr(lk, "build_plan", fake)
    assert plan.SUM_BARREN_LEAVES is False and settings.SUM_BARREN_LEAVES is False
    assert sharding.SHARD_MIN_S == 123.0 and lk.SHARD_MIN_S == 123.0
    assert plan.build_plan is fake and api.build_plan is fake and posteriors.build_plan is fake
    monkeypatch.undo()
    assert plan.SUM_BARREN_LEAVES is True and settings.SUM_BARREN_LEAVES is True and lk.SUM_BARREN_LEAVES is True
    assert api.build_plan is real and posteriors.build_plan is real and lk.build_plan is real
    assert sharding.SHARD_MIN_S == settings.SHARD_MIN_S != 123.0
