"""List the longest functions and the public functions with the most parameters in a package (ast-based).

    python scripts/longest_functions.py [factorize] [--top 10] [--params 8]

Lines of code count the lines a function spans, less its docstring, blank lines and comment-only lines (a nested
function counts inside its parent and again on its own). Parameters count everything a caller can pass (``self`` /
``cls`` excluded, ``*args`` / ``**kwargs`` counted once each); the list shows public functions (no leading
underscore in the function's or its module's name) with more than ``--params``.
"""

from __future__ import annotations

import argparse
import ast
import io
import sys
import tokenize
from pathlib import Path


def _code_lines(source: str) -> set[int]:
    """Line numbers that hold code (not blank, not only a comment)."""
    lines: set[int] = set()
    for tok in tokenize.generate_tokens(io.StringIO(source).readline):
        if tok.type not in (tokenize.COMMENT, tokenize.NL, tokenize.NEWLINE, tokenize.INDENT, tokenize.DEDENT,
                            tokenize.ENDMARKER):
            lines.update(range(tok.start[0], tok.end[0] + 1))
    return lines


def _docstring_lines(fn: ast.AST) -> set[int]:
    body = getattr(fn, "body", [])
    if body and isinstance(body[0], ast.Expr) and isinstance(body[0].value, ast.Constant) \
            and isinstance(body[0].value.value, str):
        return set(range(body[0].lineno, body[0].end_lineno + 1))
    return set()


def _params(fn: ast.FunctionDef | ast.AsyncFunctionDef) -> tuple[int, str]:
    """(parameters a caller can pass, counting ``*args`` / ``**kwargs`` once each; the ``**`` name or '')."""
    a = fn.args
    names = [p.arg for p in a.posonlyargs + a.args + a.kwonlyargs]
    if names and names[0] in ("self", "cls"):
        names = names[1:]
    return len(names) + (a.vararg is not None) + (a.kwarg is not None), a.kwarg.arg if a.kwarg else ""


def functions(root: Path):
    """(path, qualified name, code lines, parameters, public) for every function under ``root``."""
    for path in sorted(root.rglob("*.py")):
        source = path.read_text()
        code = _code_lines(source)
        tree = ast.parse(source)
        module_public = not any(part.startswith("_") and part != "__init__.py" for part in path.parts)

        def visit(node, prefix, module_public=module_public, path=path, code=code):
            for child in ast.iter_child_nodes(node):
                if isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef)):
                    name = f"{prefix}{child.name}"
                    span = set(range(child.lineno, child.end_lineno + 1)) & code
                    n = len(span - _docstring_lines(child) - {d.lineno for d in child.decorator_list})
                    public = module_public and not any(p.startswith("_") for p in name.split("."))
                    yield path, name, n, _params(child), public
                    yield from visit(child, f"{name}.")
                elif isinstance(child, ast.ClassDef):
                    yield from visit(child, f"{prefix}{child.name}.")

        yield from visit(tree, "")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("root", nargs="?", default="factorize")
    ap.add_argument("--top", type=int, default=10)
    ap.add_argument("--params", type=int, default=8, help="list public functions with more parameters than this")
    ap.add_argument("--max-lines", type=int, default=80, help="exit 1 when a function has more code lines")
    a = ap.parse_args(argv)
    found = list(functions(Path(a.root)))
    print("| function | code lines |\n| --- | ---: |")
    for path, name, n, _, _ in sorted(found, key=lambda f: -f[2])[:a.top]:
        print(f"| `{path}:{name}` | {n} |")
    many = sorted((f for f in found if f[4] and f[3][0] > a.params), key=lambda f: -f[3][0])
    print(f"\n| public function with more than {a.params} parameters | parameters | of them `**` |\n"
          "| --- | ---: | --- |")
    for path, name, _, (p, star), _ in many:
        print(f"| `{path}:{name}` | {p} | {'**' + star if star else ''} |")
    return 1 if any(n > a.max_lines for _, _, n, _, _ in found) else 0


if __name__ == "__main__":
    sys.exit(main())
