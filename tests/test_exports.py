"""The public names of calcium/__init__.py: the lazy table and the explicit imports IDEs read agree."""
import ast
from pathlib import Path

import calcium

INIT = Path(calcium.__file__)


def _explicit_imports():
    tree = ast.parse(INIT.read_text(encoding="utf-8"))
    block = next(node for node in tree.body if isinstance(node, ast.If) and getattr(node.test, "id", "") ==
                 "TYPE_CHECKING")
    return {f"calcium{node.module and '.' + node.module if node.level else node.module}".rstrip("."):
            [alias.name for alias in node.names] for node in block.body if isinstance(node, ast.ImportFrom)}


def test_every_lazy_export_is_also_imported_explicitly_for_type_checkers():
    explicit = _explicit_imports()
    lazy = calcium._EXPORTS
    assert {m: sorted(n) for m, n in explicit.items()} == {m: sorted(n) for m, n in lazy.items()}


def test_every_export_resolves():
    for name in calcium.__all__:
        assert getattr(calcium, name) is not None, name
