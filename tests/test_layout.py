"""The package tree: public names kept, imports one way from the faces down, no circles."""
import ast
import subprocess
import sys
from pathlib import Path

import pytest

import rnnkit

PKG = Path(rnnkit.__file__).parent

# Bottom to top: a part may import itself and the parts before it in this list.
# notebook and cli are both faces: neither imports the other.
ORDER = ["plots", "recurrent", "data", "training", "inspection", "evaluation", "fitting", "sweeps",
         ("notebook", "cli")]
RANK = {}
for rank, entry in enumerate(ORDER):
    for part in (entry if isinstance(entry, tuple) else (entry,)):
        RANK[part] = rank
LEAVES = {"_version"}  # a constant every part may read

# Every public name of rnnkit 0.1 (dir(rnnkit) without underscores before the
# package was split into parts): they must keep working.
PUBLIC_0_1 = ["Config", "DataError", "Diagnostics", "FingerprintWarning", "FitResult", "Prepared",
              "RunStore", "SweepResult", "check_fingerprint", "check_gradients", "compile_count",
              "datasets", "fit", "hidden_states", "init_params", "load_config", "load_fit", "loss",
              "loss_slice", "loss_surface", "outputs", "panel", "plan", "plots", "predict_classes",
              "prepare", "reference", "run", "save_config", "sweep"]


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PKG.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _modules():
    return {_module_name(p): p for p in sorted(PKG.rglob("*.py"))}


def _imports(name: str, path: Path, known: set) -> set:
    """rnnkit modules that `name` imports anywhere in its file (also inside functions)."""
    is_pkg = path.name == "__init__.py"
    base = name.split(".") if is_pkg else name.split(".")[:-1]
    found = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name.split(".")[0] == "rnnkit")
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                anchor = base[:len(base) - node.level + 1]
                mod = ".".join(anchor + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            if mod.split(".")[0] != "rnnkit":
                continue
            for alias in node.names:  # `from pkg import module` imports the module
                sub = f"{mod}.{alias.name}"
                found.add(sub if sub in known else mod)
    return found


def _part(module: str):
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else None  # None: the top-level package itself


def _graph():
    mods = _modules()
    return {name: _imports(name, path, set(mods)) for name, path in mods.items()}


def test_every_public_name_of_0_1_still_works():
    for name in PUBLIC_0_1:
        assert name in dir(rnnkit), name
        assert getattr(rnnkit, name) is not None
    assert callable(rnnkit.plots.forecast) and callable(rnnkit.reference.bptt)
    assert callable(rnnkit.datasets.cold_storage_load)


def test_every_module_belongs_to_a_known_part():
    for name in _modules():
        part = _part(name)
        assert part is None or part in RANK or part in LEAVES or part == "__main__", (
            f"{name} is in no part; add its folder to ORDER in this test and to DEVELOPERS.md")


def test_imports_run_one_way_from_the_faces_down():
    bad = []
    for name, targets in _graph().items():
        me = _part(name)
        if me is None or me == "__main__":  # the public surface and `python -m rnnkit` sit on top
            continue
        for target in targets:
            other = _part(target)
            if other is None:
                bad.append(f"{name} imports the top-level package {target}")
            elif other in LEAVES or other == me:
                continue
            elif RANK[other] >= RANK[me]:
                bad.append(f"{name} ({me}) imports {target} ({other}), a part at or above its own")
    assert not bad, "\n".join(bad)


def test_no_import_circle_between_modules():
    graph = _graph()
    state = {}

    def visit(node, stack):
        state[node] = "open"
        for nxt in graph.get(node, ()):
            # a module importing its own package's __init__ (re-exports) is not a circle of code
            if nxt in graph and node.startswith(nxt + "."):
                continue
            if state.get(nxt) == "open":
                circle = stack[stack.index(nxt):] + [nxt] if nxt in stack else [node, nxt]
                pytest.fail("import circle: " + " -> ".join(circle))
            if nxt in graph and nxt not in state:
                visit(nxt, stack + [nxt])
        state[node] = "done"

    for name in graph:
        if name not in state and _part(name) is not None:
            visit(name, [name])


def test_the_math_knows_nothing_of_frames_or_config():
    for name, path in _modules().items():
        if _part(name) != "recurrent":
            continue
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, (ast.Import, ast.ImportFrom)):
                names = [a.name for a in node.names] + [getattr(node, "module", None) or ""]
                assert not any(n.split(".")[0] == "pandas" for n in names), f"{name} imports pandas"


def test_the_graph_check_would_catch_an_upward_import(tmp_path):
    # The checker itself: a data module that imported the sweeps part must be reported.
    fake = {"rnnkit.data._x": {"rnnkit.sweeps._sweep"}}
    me, other = _part("rnnkit.data._x"), _part("rnnkit.sweeps._sweep")
    assert RANK[other] > RANK[me]
    assert _imports("rnnkit.data._x", _write(tmp_path, "from ..sweeps._sweep import sweep\n"),
                    {"rnnkit.sweeps._sweep"}) == fake["rnnkit.data._x"]


def _write(tmp_path, text):
    path = tmp_path / "_x.py"
    path.write_text(text)
    return path


def test_import_rnnkit_stays_lazy_about_heavy_modules():
    code = ("import sys, rnnkit; heavy = [m for m in ('matplotlib', 'ipywidgets', 'jsonschema', "
            "'optax', 'tqdm') if m in sys.modules]; print(','.join(heavy))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "", f"import rnnkit loaded {out.stdout.strip()}"
