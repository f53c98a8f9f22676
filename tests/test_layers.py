"""The package's layers: data flows one way, read from the source with ``ast`` (nothing imported).

Rank of each subpackage, lowest first; a module may import from its own subpackage or from a
lower one, never from a higher one.  The top-level modules (pipeline, cli) sit above them all.
"""

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "pairvel"
LAYERS = ["core", "model", "input", "maps", "pairs", "stats", "report", "sims"]
TOP = len(LAYERS)
MAY_IMPORT_MOCK = {"pairvel.cli"}  # the `pairvel mock` command; no pipeline stage


def module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def is_module(dotted: str) -> bool:
    path = PACKAGE.parent.joinpath(*dotted.split("."))
    return path.with_suffix(".py").is_file() or (path / "__init__.py").is_file()


def layer_of(module: str) -> int:
    """Rank of a dotted module name inside pairvel (TOP for top-level modules)."""
    parts = module.split(".")
    if len(parts) >= 2 and parts[1] in LAYERS:
        return LAYERS.index(parts[1])
    return TOP


def imported_modules(source: str, module: str, *, is_package: bool) -> list[tuple[int, str]]:
    """(line, absolute dotted name) of every pairvel module or name imported, at any depth."""
    package = module if is_package else module.rpartition(".")[0]
    out = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            out += [(node.lineno, a.name) for a in node.names if a.name.split(".")[0] == "pairvel"]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - node.level + 1]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            if target.split(".")[0] != "pairvel":
                continue
            # "from ..pairs import _kernels" names a module; "from .fit import X" a name in module .fit
            out += [(node.lineno, f"{target}.{a.name}" if is_module(f"{target}.{a.name}") else target)
                    for a in node.names]
    return out


def violations(source: str, module: str, *, is_package: bool = False) -> list[str]:
    own = layer_of(module)
    own_sub = module.split(".")[1] if layer_of(module) < TOP else None
    found = []
    for line, target in imported_modules(source, module, is_package=is_package):
        where = f"{module} line {line} imports {target}"
        if layer_of(target) > own:
            found.append(f"{where}: a higher layer")
        if target.startswith("pairvel.sims.mock") and not module.startswith("pairvel.sims") \
                and module not in MAY_IMPORT_MOCK:
            found.append(f"{where}: only the synthetic-sky code and the CLI may use the mock")
        last = target.split(".")[-1]
        target_sub = target.split(".")[1] if layer_of(target) < TOP else None
        if last.startswith("_") and not last.startswith("__") and target_sub != own_sub:
            found.append(f"{where}: a private module of another subpackage")
    return found


def package_modules():
    return sorted(PACKAGE.rglob("*.py"))


def test_every_subpackage_has_a_layer():
    folders = {p.name for p in PACKAGE.iterdir() if p.is_dir() and (p / "__init__.py").exists()}
    assert folders == set(LAYERS)


@pytest.mark.parametrize("path", package_modules(), ids=lambda p: str(p.relative_to(PACKAGE)))
def test_module_imports_only_its_own_or_lower_layers(path):
    found = violations(path.read_text(), module_name(path), is_package=path.name == "__init__.py")
    assert not found, "\n".join(found)


@pytest.mark.parametrize("path", [p for p in PACKAGE.rglob("__init__.py") if p.parent != PACKAGE],
                         ids=lambda p: p.parent.name)
def test_subpackage_says_what_flows_in_and_out(path):
    doc = ast.get_docstring(ast.parse(path.read_text())) or ""
    assert "In:" in doc and "Out:" in doc, f"{path}: docstring must say what flows in and out"


# The checker itself must be able to fail: each case below is a violation it has to report.
@pytest.mark.parametrize("source, module, expected", [
    ("from ..report.outputs import write_outputs", "pairvel.stats.fit", "a higher layer"),
    ("from ..pipeline import run_pipeline", "pairvel.sims.validate", "a higher layer"),
    ("import pairvel.stats.fit", "pairvel.maps.photometry", "a higher layer"),
    ("def f():\n    from ..sims.mock import make_mock_survey", "pairvel.stats.simcov", "a higher layer"),
    ("from .sims.mock import make_mock_survey", "pairvel.pipeline", "may use the mock"),
    ("from ..pairs import _kernels", "pairvel.stats.covariance", "private module"),
])
def test_checker_reports_a_violation(source, module, expected):
    assert any(expected in v for v in violations(source, module))


def test_checker_accepts_downward_and_sibling_imports():
    source = "from . import _kernels\nfrom .estimator import pass_sums\nfrom ..core.errors import InputError"
    assert violations(source, "pairvel.pairs.distributed") == []
    assert violations("from .sims.mock import make_mock_survey", "pairvel.cli") == []
