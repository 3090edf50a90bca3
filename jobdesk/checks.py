"""Local checks of an ADQL query against a service's cached metadata, with positions.

The query is read with sqlglot (its T-SQL reader knows ADQL's ``TOP``; ``[...]`` identifiers
are switched off, as in ADQL), positions come from sqlglot's tokenizer (character offsets of
identifiers and literals), and names are resolved with ADQL 2.1's identifier rules (§2.1.7:
regular identifiers compare case-insensitively, delimited ones exactly).

A false error is worse than a missed one (an error blocks a query the service might accept):
every rule below reports an error only when it is sure; where the metadata is incomplete
(uploaded tables, a derived table we cannot see into, a service without metadata) it says
nothing or warns.
"""

from __future__ import annotations

import bisect
import difflib
import re
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Protocol

import sqlglot
from sqlglot import exp
from sqlglot.dialects.tsql import TSQL
from sqlglot.errors import ParseError, TokenError

WIDE_TABLE = 100            # columns: SELECT * beyond this warns (common practice, no source)
HUGE_TABLE = 10_000_000     # rows: a query without constraint on a larger table warns (same)
PARSE_LIMIT = 200_000       # characters; longer texts are not parsed (huge IN lists)

ERROR, WARNING = "error", "warning"
CHAR_TYPES = frozenset({"char", "unicodechar"})          # VOTable 1.4 §2.1 datatypes
NUMERIC_TYPES = frozenset({"short", "int", "long", "float", "double", "unsignedbyte"})


class _Adql(TSQL):
    """T-SQL reading minus its ``[bracketed]`` identifiers, which ADQL does not have."""

    class Tokenizer(TSQL.Tokenizer):
        IDENTIFIERS = ['"']


_DIALECT = _Adql()   # one instance: made once, not per query


# --- findings -----------------------------------------------------------------------------------


@dataclass(frozen=True)
class Finding:
    """One thing found in a query: where (1-based line and column) and what to do about it."""

    severity: str               # "error" or "warning"
    code: str                   # short and stable: syntax, unknown-table, unknown-column, ...
    message: str
    line: int
    column: int
    suggestion: str | None = None
    length: int = 1
    text: str = field(default="", repr=False, compare=False)   # the query line it points into

    def caret(self) -> str:
        """The query line and a caret under the spot (empty when the line is unknown)."""
        if not self.text:
            return ""
        gutter = f"  {self.line} | "
        caret = " " * (len(gutter) + self.column - 1) + "^" * max(1, min(self.length, 60))
        return f"{gutter}{self.text}\n{caret}"

    def __str__(self) -> str:
        head = f"{self.severity}: {self.message} [{self.code}] (line {self.line}, column {self.column})"
        if self.text:
            head += "\n" + self.caret()
        if self.suggestion:
            head += f"\n  suggestion: {self.suggestion}"
        return head

    def to_dict(self) -> dict:
        return {"severity": self.severity, "code": self.code, "message": self.message,
                "line": self.line, "column": self.column, "suggestion": self.suggestion,
                "length": self.length}


# --- what the checker needs to know about a service ---------------------------------------------


@dataclass
class ColumnMeta:
    name: str
    datatype: str | None = None
    unit: str | None = None
    ucd: str | None = None
    description: str | None = None


@dataclass
class TableMeta:
    name: str                                    # as the service lists it, e.g. "orrery.sources"
    columns: list[ColumnMeta]
    nrows: int | None = None

    def column(self, ident: exp.Identifier) -> ColumnMeta | None:
        return _pick(ident, self.columns, lambda c: c.name)


class Catalog(Protocol):
    """Table metadata of one service, asked for one name at a time (a service may list 10,000s)."""

    known: bool                                  # False: no metadata, check syntax only

    def table(self, name: str) -> list[TableMeta]:
        """Tables whose full or short name equals ``name`` ignoring case."""

    def table_names(self) -> list[str]:
        """Every table name (only used to suggest one after a miss)."""


class StaticCatalog:
    """A catalogue held in memory (tests, and small services)."""

    def __init__(self, tables: Iterable[TableMeta] | None):
        self.known = tables is not None
        self.tables = list(tables or [])

    def table(self, name: str) -> list[TableMeta]:
        low = name.replace('"', "").lower()
        plain = [(t, t.name.replace('"', "").lower()) for t in self.tables]
        return [t for t, n in plain if n == low or n.rsplit(".", 1)[-1] == low]

    def table_names(self) -> list[str]:
        return [t.name for t in self.tables]


def _pick(ident: exp.Identifier, items, name_of):
    """The item an identifier names: exactly for a delimited one, ignoring case otherwise."""
    if ident.quoted:
        return next((i for i in items if name_of(i) == ident.this), None)
    low = ident.this.lower()
    return next((i for i in items if name_of(i).lower() == low), None)


# --- positions ----------------------------------------------------------------------------------


class _Text:
    def __init__(self, adql: str):
        self.adql = adql
        self.starts = [0] + [m.end() for m in re.finditer(r"\r\n|\n|\r", adql)]

    def place(self, offset: int) -> tuple[int, int]:
        offset = max(0, min(offset, len(self.adql)))
        i = bisect.bisect_right(self.starts, offset) - 1
        return i + 1, offset - self.starts[i] + 1

    def line_text(self, line: int) -> str:
        start = self.starts[line - 1]
        end = self.starts[line] if line < len(self.starts) else len(self.adql)
        return self.adql[start:end].rstrip("\r\n").expandtabs(1)

    def finding(self, severity: str, code: str, message: str, offset: int, length: int = 1,
                suggestion: str | None = None) -> Finding:
        line, col = self.place(offset)
        return Finding(severity, code, message, line, col, suggestion, max(1, length),
                       self.line_text(line))


def _offset(node: exp.Expression | None) -> tuple[int, int] | None:
    """(start offset, length) of the first identifier or literal under ``node``."""
    if node is None:
        return None
    for n in node.walk():
        meta = getattr(n, "meta", None) or {}
        if "start" in meta and "end" in meta:
            start, end = meta["start"], meta["end"]
            if isinstance(n, exp.Identifier) and n.quoted:
                start -= 1
                end += 1
            return start, end - start + 1
    return None


# --- the checker --------------------------------------------------------------------------------

_KEYWORDS = ("SELECT", "FROM", "WHERE", "GROUP", "ORDER", "HAVING", "JOIN", "DISTINCT", "TOP",
             "UNION", "OFFSET", "BETWEEN", "INNER", "OUTER", "LEFT", "RIGHT")

# ADQL 2.1 Appendix A (<point>, <circle>, <box>, <polygon>, <distance_function>, <contains>,
# <intersects>, <area>, <centroid>, <coord1>, <coord2>, <extract_coordsys>, <region>):
# the number of arguments each geometry function takes, (least, most); None = no upper bound.
GEOMETRY_ARGS: dict[str, tuple[int, int | None]] = {
    "POINT": (2, 3), "CIRCLE": (2, 4), "BOX": (3, 5), "POLYGON": (3, None),
    "DISTANCE": (2, 4), "CONTAINS": (2, 2), "INTERSECTS": (2, 2), "AREA": (1, 1),
    "CENTROID": (1, 1), "COORD1": (1, 1), "COORD2": (1, 1), "COORDSYS": (1, 1), "REGION": (1, 1),
}
_COMPARISONS = (exp.EQ, exp.NEQ, exp.GT, exp.GTE, exp.LT, exp.LTE)


def check(adql: str, catalog: Catalog | None = None, *, wide: int = WIDE_TABLE,
          huge: int = HUGE_TABLE) -> list[Finding]:
    """Findings for ``adql``, errors first, each in query order; never raises on any text."""
    if not isinstance(adql, str):
        raise TypeError(f"ADQL must be a str, not {type(adql).__name__}")
    text = _Text(adql)
    if not adql.strip():
        return [text.finding(ERROR, "syntax", "the query is empty", 0)]
    if len(adql) > PARSE_LIMIT:
        return [text.finding(WARNING, "not-checked", f"the query is longer than {PARSE_LIMIT} "
                             "characters; it was not checked", 0)]
    tree = _parse(adql, text)
    if isinstance(tree, Finding):
        return [tree]
    found: list[Finding] = []
    if catalog is None or not catalog.known:
        found.append(text.finding(WARNING, "no-metadata", "no table metadata known for this "
                                  "service: only the syntax was checked", 0))
        catalog = None
    try:
        _Checker(text, catalog, found, wide=wide, huge=huge).query(tree, [], {})
    except RecursionError:
        found.append(text.finding(WARNING, "not-checked", "the query nests too deeply to check", 0))
    except Exception as exc:   # noqa: BLE001 - a checker fault must never block a query
        found[:] = [f for f in found if f.severity != ERROR]
        found.append(text.finding(WARNING, "not-checked", "the checker could not follow this "
                                  f"query ({exc.__class__.__name__}); it was not checked", 0))
    order = {ERROR: 0, WARNING: 1}
    unique = list(dict.fromkeys(found))
    return sorted(unique, key=lambda f: (order.get(f.severity, 2), f.line, f.column))


def errors(findings: Iterable[Finding]) -> list[Finding]:
    return [f for f in findings if f.severity == ERROR]


def _parse(adql: str, text: _Text) -> exp.Expression | Finding:
    unterminated = _unterminated(adql)
    if unterminated is not None:
        offset, quote = unterminated
        what = "string literal" if quote == "'" else "delimited identifier"
        return text.finding(ERROR, "syntax", f"unterminated {what} (missing closing {quote})",
                            offset, suggestion=f"close it with {quote}")
    try:
        statements = [s for s in sqlglot.parse(adql, dialect=_DIALECT) if s is not None]
    except ParseError as exc:
        return _syntax_finding(exc, text)
    except TokenError as exc:
        return text.finding(ERROR, "syntax", f"cannot read the query: {exc}", 0)
    except RecursionError:
        return text.finding(WARNING, "not-checked", "the query nests too deeply to check", 0)
    if len(statements) != 1:
        return text.finding(ERROR, "syntax", "give exactly one SELECT statement",
                            0 if not statements else len(adql) - 1)
    if not isinstance(statements[0], exp.Query):
        return text.finding(ERROR, "syntax", "an ADQL query starts with SELECT (or WITH)", 0)
    return statements[0]


def _unterminated(adql: str) -> tuple[int, str] | None:
    """Offset and quote of an unterminated '...' or "..." (ADQL 2.1 §2.1.8, §2.1.6)."""
    for m in re.finditer(r"--[^\n\r]*|'(?:[^']|'')*'|\"(?:[^\"]|\"\")*\"|(['\"])", adql):
        if m.group(1):
            return m.start(), m.group(1)
    return None


def _syntax_finding(exc: ParseError, text: _Text) -> Finding:
    err = exc.errors[0] if exc.errors else {}
    token = err.get("highlight") or ""
    line, col = err.get("line") or 1, err.get("col") or 1
    offset = text.starts[min(max(line, 1), len(text.starts)) - 1] + max(col - len(token), 0)
    desc = err.get("description") or str(exc)
    geometry = re.search(r"missing for <class '[\w.]*\.(\w+)'>", desc)
    if geometry and geometry.group(1).upper() in GEOMETRY_ARGS:
        name = geometry.group(1).upper()
        start = text.adql.upper().rfind(name, 0, offset + 1)
        return text.finding(ERROR, "geometry-args", f"{name} takes "
                            f"{_arity(GEOMETRY_ARGS[name])}", start if start >= 0 else offset,
                            len(name) if start >= 0 else len(token))
    if "Required keyword" in desc or "Expected" in desc:
        desc = "incomplete or misplaced expression"
    elif "Invalid expression" in desc or "Unexpected token" in desc:
        desc = "unexpected word"
    prev = _previous_word(text.adql, offset)
    suggestion = None
    first = re.match(r"\s*(?:--[^\n]*\s*)*([A-Za-z_]\w*)", text.adql)
    if first and first.group(1).upper() not in ("SELECT", "WITH"):
        close = difflib.get_close_matches(first.group(1).upper(), ("SELECT", "WITH"), n=1,
                                          cutoff=0.6)
        if close:
            return text.finding(ERROR, "syntax", f"syntax error near {first.group(1)!r}: a "
                                "query starts with SELECT or WITH", first.start(1),
                                len(first.group(1)),
                                f"did you mean {close[0]} instead of {first.group(1)}?")
    for word in (prev, token):
        close = difflib.get_close_matches(word.upper(), _KEYWORDS, n=1, cutoff=0.75) if word else []
        if close and close[0] != word.upper():
            suggestion = f"did you mean {close[0]} instead of {word}?"
            if word == prev:
                offset = text.adql.rfind(prev, 0, offset)
                token = prev
            break
    near = f" near {token!r}" if token else ""
    return text.finding(ERROR, "syntax", f"syntax error{near}: {desc}", offset, len(token),
                        suggestion)


def _previous_word(adql: str, offset: int) -> str:
    m = re.search(r"([A-Za-z_]\w*)\s*$", adql[:offset])
    return m.group(1) if m else ""


def _arity(bounds: tuple[int, int | None]) -> str:
    least, most = bounds
    if most is None:
        return f"at least {least} arguments"
    if least == most:
        return f"{least} argument" + ("s" if least != 1 else "")
    return f"{least} to {most} arguments"


@dataclass
class _Source:
    """A table, derived table or CTE in FROM, as a column reference sees it."""

    alias: exp.Identifier | None
    table: TableMeta | None                     # a base table with metadata
    names: tuple[str, ...]                      # full and short name of a base table
    columns: list[ColumnMeta] | None            # None: unknown, accept any column

    def answers_to(self, qualifier: list[exp.Identifier]) -> bool:
        last = qualifier[-1]
        if self.alias is not None and len(qualifier) == 1 and _same(last, self.alias.this):
            return True
        if not self.names:
            return False
        if len(qualifier) == 1:
            return any(_same(last, n.rsplit(".", 1)[-1]) for n in self.names)
        full = ".".join(i.this for i in qualifier)
        return any(n.lower() == full.lower() for n in self.names)

    def column(self, ident: exp.Identifier) -> ColumnMeta | None:
        if self.columns is None:
            return None
        return _pick(ident, self.columns, lambda c: c.name)


def _same(ident: exp.Identifier, name: str) -> bool:
    return ident.this == name if ident.quoted else ident.this.lower() == name.lower()


class _Checker:
    def __init__(self, text: _Text, catalog: Catalog | None, found: list[Finding], *,
                 wide: int, huge: int):
        self.text = text
        self.catalog = catalog
        self.found = found
        self.wide = wide
        self.huge = huge
        self.types: dict[int, ColumnMeta] = {}

    def add(self, severity, code, message, node, suggestion=None, *, at=None):
        where = at or _offset(node) or (0, 1)
        self.found.append(self.text.finding(severity, code, message, where[0], where[1],
                                            suggestion))

    # -- queries -----------------------------------------------------------------------------

    def query(self, q: exp.Expression, outer: list[list[_Source]],
              ctes: dict[str, list[ColumnMeta] | None]) -> list[ColumnMeta] | None:
        """Check a query; return its output columns (None when they cannot be known)."""
        ctes = dict(ctes)
        with_ = q.args.get("with_") or q.args.get("with")
        if with_ is not None:
            for cte in with_.expressions:
                cols = self.query(cte.this, outer, ctes)
                ctes[cte.alias_or_name.lower()] = cols
        if isinstance(q, exp.Subquery):
            return self.query(q.this, outer, ctes)
        if isinstance(q, exp.SetOperation):
            left = self.query(q.left, outer, ctes)
            self.query(q.right, outer, ctes)
            return left
        if not isinstance(q, exp.Select):
            return None
        return self.select(q, outer, ctes)

    def select(self, q: exp.Select, outer, ctes) -> list[ColumnMeta] | None:
        from_ = q.args.get("from_") or q.args.get("from")
        sources: list[_Source] = []
        if from_ is not None:
            sources.append(self.source(from_.this, outer, ctes))
        joins = q.args.get("joins") or []
        for join in joins:
            sources.append(self.source(join.this, outer, ctes))
        shared = {i.this.lower() for j in joins for i in (j.args.get("using") or [])
                  if isinstance(i, exp.Identifier)}
        loose = any("NATURAL" in (j.args.get("method") or "").upper() for j in joins)
        aliases = {item.alias.lower() for item in q.expressions if isinstance(item, exp.Alias)}
        scopes = [sources, *outer]

        sub_queries: list[exp.Expression] = []
        for node in _local_nodes(q, sub_queries):
            if isinstance(node, exp.Column):
                self.column(node, scopes, shared, loose, aliases)
        for sub in sub_queries:
            self.query(sub, scopes, ctes)
        for node in _local_nodes(q, []):
            if isinstance(node, exp.Anonymous | exp.Contains | exp.Distance):
                self.geometry_args(node)
            if isinstance(node, _COMPARISONS):
                self.comparison(node)
        self.select_rules(q, sources)
        return self.output(q, sources)

    def source(self, node: exp.Expression, outer, ctes) -> _Source:
        alias_node = node.args.get("alias")
        alias = alias_node.this if isinstance(alias_node, exp.TableAlias) else None
        if isinstance(node, exp.Subquery):
            return _Source(alias, None, (), self.query(node.this, outer, ctes))
        if not isinstance(node, exp.Table) or not isinstance(node.this, exp.Identifier):
            return _Source(alias, None, (), None)
        parts = [p for p in node.parts if isinstance(p, exp.Identifier)]
        name = ".".join(p.this for p in parts)
        if len(parts) == 1 and parts[0].this.lower() in ctes:
            return _Source(alias, None, (parts[0].this,), ctes[parts[0].this.lower()])
        if len(parts) > 1 and parts[-2].this.upper() == "TAP_UPLOAD":
            return _Source(alias, None, (name,), None)       # uploaded: columns unknown here
        if self.catalog is None:
            return _Source(alias, None, (name,), None)
        candidates = self.catalog.table(name)
        if len(parts) == 1:
            matching = candidates
        else:
            matching = [t for t in candidates
                        if t.name.replace('"', "").lower() == name.lower()]
        exact = [t for t in matching if all(
            not p.quoted or p.this in t.name.replace('"', "").split(".") for p in parts)]
        if not matching:
            if len(parts) > 1 and parts[-2].this.upper() == "TAP_SCHEMA":
                return _Source(alias, None, (name,), None)   # listed by few services
            close = difflib.get_close_matches(name.lower(), [n.lower() for n in
                                              self.catalog.table_names()], n=3, cutoff=0.6)
            names = {n.lower(): n for n in self.catalog.table_names()}
            hint = ("did you mean " + " or ".join(names[c] for c in close) + "?") if close else \
                "see the service's tables with desk.tables(service) or `jobdesk tables`"
            self.add(ERROR, "unknown-table", f"the service lists no table {name}", parts[0], hint,
                     at=_span(parts[0], parts[-1]))
            return _Source(alias, None, (name,), None)
        if not exact:
            self.add(WARNING, "table-case", f"{name} is spelled with another case than the "
                     f"service's {matching[0].name}; delimited identifiers are case-sensitive",
                     parts[0], f"write {matching[0].name}", at=_span(parts[0], parts[-1]))
        if len(parts) == 1 and len(matching) > 1:
            return _Source(alias, None, (name,), None)       # ambiguous short name: stay quiet
        table = (exact or matching)[0]
        plain = table.name.replace('"', "")
        names = (plain, plain.rsplit(".", 1)[-1])
        # a table listed without columns (some services list names only): columns unknown
        return _Source(alias, table, names, table.columns or None)

    # -- columns -----------------------------------------------------------------------------

    def column(self, col: exp.Column, scopes, shared, loose, aliases) -> None:
        ident = col.this
        parts = [p for p in col.parts if isinstance(p, exp.Identifier)]
        qualifier = parts[:-1] if isinstance(ident, exp.Identifier) else parts
        if qualifier:
            for sources in scopes:
                hit = next((s for s in sources if s.answers_to(qualifier)), None)
                if hit is not None:
                    break
            else:
                defined = [s.alias.this for sources in scopes for s in sources if s.alias] + \
                          [s.names[0] for sources in scopes for s in sources
                           if s.names and s.alias is None]
                label = ".".join(p.this for p in qualifier)
                close = difflib.get_close_matches(label, defined, n=1, cutoff=0.5)
                hint = f"did you mean {close[0]}?" if close else (
                    "define it in FROM (… AS " + label + ")")
                self.add(ERROR, "undefined-alias", f"{label} is neither a table nor an alias "
                         "defined in FROM", qualifier[0], hint,
                         at=_span(qualifier[0], qualifier[-1]))
                return
            if not isinstance(ident, exp.Identifier) or hit.columns is None:
                return
            meta = hit.column(ident)
            if meta is not None:
                self.types[id(col)] = meta
                return
            if _pick_any_case(ident, hit.columns):
                self.add(WARNING, "column-case", f"{ident.this!r} is delimited with another case "
                         "than the service's column", ident)
                return
            self.unknown_column(ident, hit.columns, f"table {hit.names[0] if hit.names else ''}"
                                .strip(), hit)
            return
        if not isinstance(ident, exp.Identifier):
            return
        for depth, sources in enumerate(scopes):
            hits = [s for s in sources if s.column(ident) is not None]
            blind = any(s.columns is None for s in sources)
            if len(hits) > 1 and not loose and ident.this.lower() not in shared and depth == 0:
                names = ", ".join((s.alias.this if s.alias else s.names[0]) for s in hits)
                first = hits[0].alias.this if hits[0].alias else hits[0].names[0]
                self.add(ERROR, "ambiguous-column", f"column {ident.this} is in more than one "
                         f"table of this FROM ({names})", ident,
                         f"qualify it, e.g. {first}.{ident.this}")
                return
            if hits:
                self.types[id(col)] = hits[0].column(ident)
                return
            if blind:
                return
        if ident.this.lower() in aliases:
            return                                       # an output name (ORDER BY, HAVING...)
        everything = [c for s in scopes[0] for c in (s.columns or [])]
        if any(c.name.lower() == ident.this.lower() for c in everything):
            self.add(WARNING, "column-case", f"{ident.this!r} is delimited with another case "
                     "than the service's column", ident)
            return
        self.unknown_column(ident, everything, "the tables of this FROM", None)

    def unknown_column(self, ident, columns, where, source) -> None:
        names = [c.name for c in columns]
        close = difflib.get_close_matches(ident.this.lower(), [n.lower() for n in names],
                                          n=3, cutoff=0.6)
        spelled = {n.lower(): n for n in names}
        hint = ("did you mean " + " or ".join(spelled[c] for c in close) + "?") if close else \
            "see the columns with desk.columns(service, table) or `jobdesk columns`"
        self.add(ERROR, "unknown-column", f"no column {ident.this} in {where}", ident, hint)

    # -- expressions -------------------------------------------------------------------------

    def geometry_args(self, node: exp.Expression) -> None:
        if isinstance(node, exp.Anonymous):
            name = str(node.this).upper()
            count = len(node.expressions)
        elif isinstance(node, exp.Contains):
            name, count = "CONTAINS", sum(1 for k in ("this", "expression") if node.args.get(k))
        else:
            return
        bounds = GEOMETRY_ARGS.get(name)
        if bounds is None:
            return
        least, most = bounds
        if count < least or (most is not None and count > most):
            self.add(ERROR, "geometry-args", f"{name} takes {_arity(bounds)}, not {count}",
                     node, at=self.word_at(name, node))

    def word_at(self, word: str, node: exp.Expression) -> tuple[int, int] | None:
        inner = _offset(node)
        end = inner[0] if inner else len(self.text.adql)
        start = self.text.adql.upper().rfind(word, 0, end)
        return (start, len(word)) if start >= 0 else None

    def comparison(self, node: exp.Expression) -> None:
        left, right = node.this, node.expression
        for a, b in ((left, right), (right, left)):
            name = _predicate_name(a)
            if name is not None:
                value = _number(b)
                if value is None and not isinstance(b, exp.Literal):
                    continue                              # compared with an expression: quiet
                if value not in (0, 1):
                    self.add(ERROR, "predicate-compare", f"{name}(...) is 1 or 0 and must be "
                             "compared with 0 or 1 (ADQL 2.1 §4.2.12)", b,
                             f"write 1 = {name}(...) for 'yes' or 0 = {name}(...) for 'no'")
                return
        for a, b in ((left, right), (right, left)):
            meta = self.types.get(id(a)) if isinstance(a, exp.Column) else None
            if meta is None or not meta.datatype:
                continue
            if meta.datatype.lower() in CHAR_TYPES and _number(b) is not None:
                self.add(ERROR, "type-mismatch", f"{meta.name} is a string column, compared "
                         "with a number", b, f"quote the value: '{b.sql()}'")
                return

    # -- the SELECT as a whole ---------------------------------------------------------------

    def select_rules(self, q: exp.Select, sources: list[_Source]) -> None:
        limit = q.args.get("limit")
        if limit is not None and not q.args.get("order") and isinstance(q.parent, exp.Subquery
                                                                         | type(None)):
            self.add(WARNING, "top-no-order", "TOP without ORDER BY: the service chooses which "
                     "rows come back, and may choose others next time", limit,
                     "add ORDER BY to make the result repeatable", at=self.word_at("TOP", limit))
        star = next((e for e in q.expressions if isinstance(e, exp.Star)), None)
        if star is not None:
            for s in sources:
                if s.table is not None and len(s.table.columns) > self.wide:
                    self.add(WARNING, "wide-star", f"SELECT * on {s.table.name}, which has "
                             f"{len(s.table.columns)} columns", None,
                             "name the columns you need", at=self.star_at(q))
        constrained = (q.args.get("where") is not None or limit is not None
                       or q.args.get("group") is not None
                       or any(isinstance(n, exp.AggFunc) for e in q.expressions for n in e.walk())
                       or any(j.args.get("on") is not None for j in q.args.get("joins") or []))
        if not constrained:
            for s in sources:
                if s.table is not None and (s.table.nrows or 0) > self.huge:
                    self.add(WARNING, "unconstrained", f"no constraint on {s.table.name}, which "
                             f"the service says holds {s.table.nrows:,} rows", None,
                             "add a WHERE clause or TOP, or count first with desk.estimate()",
                             at=self.table_at(s.table.name))

    def star_at(self, q: exp.Select) -> tuple[int, int] | None:
        m = re.search(r"(?is)\bSELECT\s+(?:ALL\s+|DISTINCT\s+)?(?:TOP\s+\d+\s+)?(\*)",
                      self.text.adql)
        return (m.start(1), 1) if m else None

    def table_at(self, name: str) -> tuple[int, int] | None:
        short = name.rsplit(".", 1)[-1]
        m = re.search(r"(?i)\b" + re.escape(short) + r"\b", self.text.adql)
        return (m.start(), len(short)) if m else None

    def output(self, q: exp.Select, sources: list[_Source]) -> list[ColumnMeta] | None:
        out: list[ColumnMeta] = []
        for item in q.expressions:
            if isinstance(item, exp.Star):
                for s in sources:
                    if s.columns is None:
                        return None
                    out.extend(s.columns)
            elif isinstance(item, exp.Column) and isinstance(item.this, exp.Star):
                return None
            else:
                name = item.alias_or_name
                if not name:
                    return None
                meta = self.types.get(id(item.unalias()))
                out.append(ColumnMeta(name, meta.datatype if meta else None))
        return out


def _span(first: exp.Identifier, last: exp.Identifier) -> tuple[int, int] | None:
    a, b = _offset(first), _offset(last)
    if a is None or b is None:
        return a
    return a[0], b[0] + b[1] - a[0]


def _pick_any_case(ident: exp.Identifier, columns: list[ColumnMeta]) -> bool:
    return ident.quoted and any(c.name.lower() == ident.this.lower() for c in columns)


def _local_nodes(q: exp.Select, sub_queries: list[exp.Expression]):
    """Nodes of this SELECT, not of the queries nested in it (those go to ``sub_queries``)."""
    stack = [v for k, v in q.args.items() if k not in ("with_", "with")]
    while stack:
        item = stack.pop()
        if isinstance(item, list):
            stack.extend(item)
            continue
        if not isinstance(item, exp.Expression):
            continue
        if isinstance(item, exp.Subquery | exp.Query) and item is not q:
            if not isinstance(item.parent, exp.From | exp.Join):   # FROM items: source()
                sub_queries.append(item)
            continue
        if isinstance(item, exp.Table):
            continue
        yield item
        stack.extend(item.args.values())


def _predicate_name(node: exp.Expression) -> str | None:
    if isinstance(node, exp.Contains):
        return "CONTAINS"
    if isinstance(node, exp.Anonymous) and str(node.this).upper() in ("CONTAINS", "INTERSECTS"):
        return str(node.this).upper()
    return None


def _number(node: exp.Expression) -> float | None:
    sign = 1
    while isinstance(node, exp.Neg | exp.Paren):
        if isinstance(node, exp.Neg):
            sign = -sign
        node = node.this
    if isinstance(node, exp.Literal) and not node.is_string:
        try:
            return sign * float(node.this)
        except ValueError:
            return None
    return None


# --- the service's own message ------------------------------------------------------------------

_POSITION = [
    re.compile(r"line[:\s]*(\d+)\s*,?\s*col(?:umn)?[:\s]*(\d+)", re.I),
    re.compile(r"at char(?:acter)?\s*(\d+)", re.I),
]
_TOKEN = re.compile(r"""['"`]([^'"`\s]{1,200})['"`]""")


def from_service(adql: str, message: str) -> Finding | None:
    """A finding at the spot a service's error message names (a line and column, a character
    offset, or a quoted word that appears in the query), or None when it names none."""
    if not adql or not message:
        return None
    text = _Text(adql)
    short = " ".join(message.split())[:500]
    for m in _TOKEN.finditer(message):
        word = m.group(1)
        found = re.search(r"(?<![\w\"])" + re.escape(word) + r"(?![\w\"])", adql, re.I)
        if found and word.upper() not in ("SELECT",) and len(word) > 1:
            return text.finding(ERROR, "service", short, found.start(), len(word))
    m = _POSITION[0].search(message)
    if m:
        line, col = int(m.group(1)), int(m.group(2))
        if 1 <= line <= len(text.starts):
            return text.finding(ERROR, "service", short, text.starts[line - 1] + col - 1)
    m = _POSITION[1].search(message)
    if m and int(m.group(1)) <= len(adql):
        return text.finding(ERROR, "service", short, int(m.group(1)))
    return None
