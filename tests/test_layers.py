"""docs/architecture.md's layer table is the rule: a module of jobdesk imports only modules of
lower layers (lazy imports inside functions included; imports under TYPE_CHECKING are types,
not calls, and are left out). Every module must be in the table once."""

import ast
import re
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
PACKAGE = REPO / "jobdesk"


def _layers() -> dict[str, int]:
    text = (REPO / "docs" / "architecture.md").read_text(encoding="utf-8")
    table = text.split("## Layers", 1)[1].split("\n## ", 1)[0]
    layers: dict[str, int] = {}
    for line in table.splitlines():
        found = re.match(r"\| (\d+) [^|]*\| (.*) \|$", line)
        if found:
            for name in re.findall(r"`([\w.]+)`", found.group(2)):
                assert name not in layers, f"{name} is in two layers"
                layers[name] = int(found.group(1))
    return layers


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE).with_suffix("").parts)
    if parts[-1] == "__init__" and len(parts) > 1:
        parts.pop()
    return ".".join(parts)


def _modules() -> dict[str, Path]:
    return {_module_name(p): p for p in PACKAGE.rglob("*.py")
            if "localtap" not in p.parts and "labextension" not in p.parts}


def _type_only(tree: ast.AST) -> set[int]:
    """Line numbers of imports inside ``if TYPE_CHECKING:`` blocks."""
    lines = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.If) and getattr(node.test, "id", None) == "TYPE_CHECKING":
            for inner in ast.walk(node):
                lines.add(getattr(inner, "lineno", -1))
    return lines


def _imports(path: Path, known: set[str]) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    skip = _type_only(tree)
    out = set()
    for node in ast.walk(tree):
        if getattr(node, "lineno", None) in skip:
            continue
        names = []
        if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            if node.module == "jobdesk":
                names = [f"jobdesk.{a.name}" for a in node.names]
            elif node.module.startswith("jobdesk."):
                names = [node.module] + [f"{node.module}.{a.name}" for a in node.names]
        elif isinstance(node, ast.Import):
            names = [a.name for a in node.names if a.name.startswith("jobdesk.")]
        for name in names:
            short = name.removeprefix("jobdesk.")
            # the longest known module the name is, or is inside of
            while short and short not in known:
                short = short.rpartition(".")[0]
            if short:
                out.add(short)
    return out


def test_every_module_has_one_layer():
    layers, modules = _layers(), _modules()
    missing = sorted(set(modules) - set(layers))
    assert not missing, f"modules missing from docs/architecture.md's layer table: {missing}"
    stale = sorted(set(layers) - set(modules))
    assert not stale, f"the layer table names modules that do not exist: {stale}"


def test_imports_go_only_to_lower_layers():
    layers, modules = _layers(), _modules()
    wrong = []
    for name, path in modules.items():
        for used in _imports(path, set(modules)) - {name}:
            if used.startswith(name + ".") or name.startswith(used + "."):
                continue   # a package and its own modules
            if layers[used] >= layers[name]:
                wrong.append(f"{name} (layer {layers[name]}) imports {used} "
                             f"(layer {layers[used]})")
    assert not wrong, "\n".join(sorted(wrong))


def test_the_checker_sees_a_wrong_import(tmp_path):
    # the test must be able to fail: an upward import in a copy of a module is reported
    source = (PACKAGE / "keys.py").read_text(encoding="utf-8")
    copy = tmp_path / "keys.py"
    copy.write_text(source + "\n\ndef _late():\n    from jobdesk.desk import Desk\n",
                    encoding="utf-8")
    assert "desk" in _imports(copy, set(_modules()))
