"""The import contract, read from the source with Python's own parser (ast): the core never
imports Qt, only the conv codec's modules import torch, the file formats import no codec,
and nothing outside the app imports the app."""

import ast
from pathlib import Path

import pytest

PKG = Path(__file__).resolve().parents[1] / "workbench"
TORCH_ALLOWED = {"codecs/conv.py", "codecs/conv_model.py", "training.py", "models/make_default.py"}
FORMATS = {"formats/container.py", "formats/bundle.py", "formats/basisfile.py", "formats/modelfile.py"}
FRONT_ENDS = {"cli.py"}  # the command line starts the app (``workbench gui``); it is not the core


def _imports(path: Path) -> set[str]:
    """Every module a file imports, relative imports made absolute (``workbench.x.y``)."""
    tree = ast.parse(path.read_text(), str(path))
    here = ["workbench", *path.relative_to(PKG).parent.parts]
    out = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            base = here[: len(here) - node.level + 1] if node.level else []
            mod = ".".join(base + ([node.module] if node.module else []))
            out.add(mod)
            out.update(f"{mod}.{a.name}" for a in node.names)
    return out


def _modules():
    return sorted(p for p in PKG.rglob("*.py"))


@pytest.mark.parametrize("path", [p for p in _modules() if "gui" not in p.relative_to(PKG).parts
                                  and p.relative_to(PKG).as_posix() not in FRONT_ENDS],
                         ids=lambda p: str(p.relative_to(PKG)))
def test_the_core_never_imports_qt_or_the_app(path):
    bad = {m for m in _imports(path) if m.split(".")[0] in ("PySide6", "PyQt5", "PyQt6") or
           m.startswith("workbench.gui")}
    assert not bad, f"{path.name} imports {sorted(bad)}"


@pytest.mark.parametrize("path", _modules(), ids=lambda p: str(p.relative_to(PKG)))
def test_only_the_conv_codec_imports_torch(path):
    rel = path.relative_to(PKG).as_posix()
    if rel in TORCH_ALLOWED:
        return
    assert not {m for m in _imports(path) if m.split(".")[0] == "torch"}, f"{rel} imports torch"


@pytest.mark.parametrize("name", sorted(FORMATS))
def test_file_formats_import_no_codec(name):
    # only the data-type parts named in EXCEPTIONS (the basis of the KLT, the coder's alphabet)
    allowed = {f"workbench.{b}" for a, b in EXCEPTIONS if a == name.removesuffix(".py").replace("/", ".")}
    bad = {m for m in _imports(PKG / name) if m.startswith("workbench.codecs.")
           and not any(m == x or m.startswith(x + ".") for x in allowed)}
    assert not bad, f"{name} imports {sorted(bad)}"


def test_the_front_end_imports_the_app_only_to_start_it():
    tree = ast.parse((PKG / "cli.py").read_text())
    gui_imports = [n for n in ast.walk(tree) if isinstance(n, ast.ImportFrom) and (n.module or "").startswith("gui")]
    top_level = [n for n in tree.body if isinstance(n, ast.ImportFrom) and (n.module or "").startswith("gui")]
    assert len(gui_imports) == 1 and not top_level  # one lazy import, inside the gui command


def _module_graph():
    names = {}
    for p in _modules():
        parts = list(p.relative_to(PKG.parent).with_suffix("").parts)
        names[".".join(parts[:-1] if parts[-1] == "__init__" else parts)] = p
    graph = {}
    for name, p in names.items():
        graph[name] = set()
        for m in _imports(p):
            while m and m not in names:
                m = m.rpartition(".")[0]
            if m and m != name:
                graph[name].add(m)
    return graph


def test_the_import_graph_has_no_circle():
    # every import, lazy ones inside functions included, as the import-linter would read them
    graph = _module_graph()
    for g in graph.values():
        g.discard("workbench")  # "from . import x" names the module x, not the package
    state = {}

    def visit(node, path):
        state[node] = "open"
        for n in graph[node]:
            if state.get(n) == "open":
                raise AssertionError("import circle: " + " -> ".join(path[path.index(n):] + [n]))
            if n not in state:
                visit(n, path + [n])
        state[node] = "done"

    for node in graph:
        if node not in state:
            visit(node, [node])


LAYERS = [  # lowest first; the same table as DEVELOPERS.md's architecture screen
    {"settings", "codecs", "errors", "color", "display", "notices", "version", "runtime"},
    {"formats"},
    {"codecs.base", "codecs.klt", "codecs.conv", "codecs.klt_basis", "codecs.tiling", "codecs.coefcode",
     "codecs.symbols", "codecs.ans", "codecs.compiled", "codecs.conv_model", "codecs.hyperprior"},
    {"quality"},
    {"pipeline", "ratecontrol", "blockchoice", "preview", "sheet", "sheetpdf", "archive", "training", "session",
     "jobs", "demo", "models.make_default", "models.dead_leaves"},
    {"cli", "cliargs", "cli_extra", "cli_archive", "api", "__main__", "gui"},
]
# File formats that read a codec part's data type: the basis file holds a klt_basis.Basis, the model
# file validates entropy tables against the coefficient coder's alphabet.
EXCEPTIONS = {("formats.basisfile", "codecs.klt_basis"), ("formats.modelfile", "codecs.symbols")}


def _layer(module: str) -> int:
    name = module.removeprefix("workbench.") if module != "workbench" else "api"
    for i, members in enumerate(LAYERS):
        if name in members or name.split(".")[0] in members and name.split(".")[0] != "codecs":
            return i
    raise AssertionError(f"{module} is in no layer of DEVELOPERS.md's table")


def test_every_module_imports_only_from_its_layer_or_lower_ones():
    upward = []
    for a, deps in _module_graph().items():
        for b in deps - {"workbench"}:
            pair = (a.removeprefix("workbench."), b.removeprefix("workbench."))
            if _layer(b) > _layer(a) and pair not in EXCEPTIONS:
                upward.append(f"{pair[0]} -> {pair[1]}")
    assert not upward, upward
