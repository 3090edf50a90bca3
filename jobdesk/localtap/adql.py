"""ADQL 2.1 -> SQLite, through sqlglot's T-SQL reader (which knows ``TOP``).

Why its own module: the translation is where wrong answers would come from, so it is strict.
The query is parsed, every syntax node is checked against a list of what ADQL allows and this
service supports (anything else is refused with an :class:`AdqlError`, never passed through),
every table and column is resolved against the published metadata with ADQL's identifier rules
(regular identifiers case-insensitive, delimited ``"..."`` identifiers exact, ADQL 2.1 §2.1.3),
geometry calls are given fast forms, and the output columns get names (as the query spells
them) and VOTable types.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, replace

import sqlglot
from sqlglot import exp
from sqlglot.dialects.tsql import TSQL
from sqlglot.errors import ParseError, TokenError

from . import geometry
from .tapschema import Column, TableInfo


class AdqlError(Exception):
    """The query cannot be run: ``message`` says what is wrong, ``line``/``column`` where (1-based)."""

    def __init__(self, message: str, line: int | None = None, column: int | None = None):
        self.message = message
        self.line = line
        self.column = column
        where = f" (line {line}, column {column})" if line is not None else ""
        super().__init__(message + where)


class _Adql(TSQL):
    """T-SQL reading, minus T-SQL's ``[bracketed]`` identifiers, which ADQL does not have."""

    class Tokenizer(TSQL.Tokenizer):
        IDENTIFIERS = ['"']


@dataclass
class Resolved:
    """A table the query may name: its metadata and where it lives in SQLite."""

    table: TableInfo
    database: str  # SQLite schema name (main, aux, tap_upload)
    physical: str  # SQLite table name
    physical_columns: dict[str, str] | None = None  # column name -> SQLite column name


TableLookup = Callable[[exp.Identifier | None, exp.Identifier], Resolved | None]


@dataclass
class Translation:
    sql: str
    columns: list[Column]  # datatype "" when it can only be learnt from the values


# --- lexical checks -----------------------------------------------------------------------------


def _scan_unterminated(text: str) -> AdqlError | None:
    """Find an unterminated string or delimited identifier, with its position (ADQL 2.1 §2.1)."""
    i, line, col = 0, 1, 1
    n = len(text)
    while i < n:
        ch = text[i]
        if ch == "-" and text.startswith("--", i):
            while i < n and text[i] != "\n":
                i += 1
            continue
        if ch in "'\"":
            start_line, start_col = line, col
            i += 1
            col += 1
            while True:
                if i >= n:
                    what = "string literal" if ch == "'" else "delimited identifier"
                    return AdqlError(f"unterminated {what} (missing closing {ch})", start_line, start_col)
                if text[i] == ch:
                    if i + 1 < n and text[i + 1] == ch:  # doubled quote is an escape
                        i += 2
                        col += 2
                        continue
                    break
                if text[i] == "\n":
                    line, col = line + 1, 0
                i += 1
                col += 1
        if i < n and text[i] == "\n":
            line, col = line + 1, 0
        i += 1
        col += 1
    return None


def parse(adql: str) -> exp.Expression:
    """Parse one ADQL query; syntax errors carry the line and column where they were found."""
    if not adql or not adql.strip():
        raise AdqlError("the query is empty")
    problem = _scan_unterminated(adql)
    if problem:
        raise problem
    try:
        statements = [s for s in sqlglot.parse(adql, dialect=_Adql) if s is not None]
    except ParseError as exc:
        err = exc.errors[0] if exc.errors else {}
        line, col = err.get("line"), err.get("col")
        token = err.get("highlight") or ""
        if col is not None and token:
            col = max(1, col - len(token) + 1)  # sqlglot points at the token's last character
        desc = err.get("description") or str(exc)
        if "Required keyword" in desc:
            desc = "incomplete expression"
        near = f" near {token!r}" if token else ""
        raise AdqlError(f"syntax error{near}: {desc}", line, col) from None
    except TokenError as exc:
        raise AdqlError(f"cannot read the query: {exc}") from None
    if len(statements) != 1:
        raise AdqlError("give exactly one SELECT statement")
    tree = statements[0]
    if not isinstance(tree, exp.Query):
        raise AdqlError("only SELECT queries are allowed in ADQL")
    return tree


# --- what is allowed ----------------------------------------------------------------------------

# ADQL 2.1 functions that map to a sqlglot node, with the name a result column gets
FUNCTION_NAMES: dict[type, str] = {
    exp.Abs: "abs", exp.Ceil: "ceiling", exp.Floor: "floor", exp.Degrees: "degrees",
    exp.Radians: "radians", exp.Sin: "sin", exp.Cos: "cos", exp.Tan: "tan", exp.Cot: "cot",
    exp.Asin: "asin", exp.Acos: "acos", exp.Atan: "atan", exp.Atan2: "atan2", exp.Exp: "exp",
    exp.Ln: "log", exp.Log: "log10", exp.Pow: "power", exp.Sqrt: "sqrt", exp.Mod: "mod",
    exp.Pi: "pi", exp.Rand: "rand", exp.Round: "round", exp.Trunc: "truncate", exp.Sign: "sign",
    exp.Lower: "lower", exp.Upper: "upper", exp.Coalesce: "coalesce", exp.Contains: "contains",
    exp.Count: "count", exp.Avg: "avg", exp.Sum: "sum", exp.Min: "min", exp.Max: "max",
}
GEOMETRY_FUNCTIONS = {"POINT", "CIRCLE", "BOX", "POLYGON", "INTERSECTS", "DISTANCE", "COORD1",
                      "COORD2", "AREA", "CENTROID"}
REFUSED_FUNCTIONS = {
    "REGION": "REGION (STC-S strings) is not supported",
    "COORDSYS": "COORDSYS is not supported (it is deprecated in ADQL 2.1)",
    "IN_UNIT": "IN_UNIT is not supported",
}

_ALLOWED_NODES: tuple[type, ...] = (
    exp.Select, exp.Union, exp.Intersect, exp.Except, exp.Subquery, exp.With, exp.CTE,
    exp.From, exp.Join, exp.Table, exp.TableAlias, exp.Alias, exp.Identifier, exp.Column, exp.Star,
    exp.Where, exp.Group, exp.Having, exp.Order, exp.Ordered, exp.Limit, exp.Offset,
    exp.Literal, exp.Null, exp.Neg, exp.Paren, exp.Add, exp.Sub, exp.Mul, exp.Div, exp.DPipe,
    exp.EQ, exp.NEQ, exp.GT, exp.GTE, exp.LT, exp.LTE, exp.And, exp.Or, exp.Not, exp.Is,
    exp.In, exp.Between, exp.Like, exp.ILike, exp.Exists, exp.Case, exp.If, exp.Cast,
    exp.DataType, exp.DataTypeParam, exp.Distinct, exp.HexString, exp.Anonymous,
    *FUNCTION_NAMES,
)
_CAST_TYPES = {
    exp.DataType.Type.SMALLINT: ("short", None), exp.DataType.Type.INT: ("int", None),
    exp.DataType.Type.BIGINT: ("long", None), exp.DataType.Type.FLOAT: ("float", None),
    exp.DataType.Type.DOUBLE: ("double", None), exp.DataType.Type.CHAR: ("char", "*"),
    exp.DataType.Type.VARCHAR: ("char", "*"),
}


def _where(node: exp.Expression) -> tuple[int | None, int | None]:
    """Line and column of a node when sqlglot kept them (identifiers and literals do)."""
    for n in node.walk():
        meta = getattr(n, "meta", None) or {}
        if "line" in meta and "col" in meta:
            text = n.name if isinstance(n, exp.Identifier | exp.Literal) else ""
            return meta["line"], max(1, meta["col"] - len(text) + 1)
    return None, None


def _refuse(node: exp.Expression, message: str) -> AdqlError:
    line, col = _where(node)
    return AdqlError(message, line, col)


def check_supported(tree: exp.Expression) -> None:
    """Refuse every syntax node this translator does not know to be ADQL and handled."""
    for node in tree.walk():
        if isinstance(node, exp.Anonymous):
            name = node.name.upper()
            if name in REFUSED_FUNCTIONS:
                raise _refuse(node, REFUSED_FUNCTIONS[name])
            if name not in GEOMETRY_FUNCTIONS:
                raise _refuse(node, f"unknown function {node.name!r}: not an ADQL 2.1 function "
                                    "supported here")
            continue
        if isinstance(node, exp.Array):
            raise _refuse(node, "square brackets are not ADQL; delimit identifiers with double quotes")
        if not isinstance(node, _ALLOWED_NODES):
            if isinstance(node, exp.Func):
                raise _refuse(node, f"function {node.sql(dialect=_Adql).split('(')[0]} is not "
                                    "supported (not an ADQL 2.1 function)")
            raise _refuse(node, f"not supported in ADQL here: {node.sql(dialect=_Adql)[:60]!r}")
        if isinstance(node, exp.Limit) and node.args.get("limit_options") is not None:
            raise _refuse(node, "TOP ... PERCENT / WITH TIES are not ADQL")
        if isinstance(node, exp.Join) and node.args.get("kind") in ("CROSS APPLY", "OUTER APPLY"):
            raise _refuse(node, "APPLY joins are not ADQL")
        if isinstance(node, exp.Join) and "NATURAL" in (node.args.get("method") or "").upper():
            raise _refuse(node, "NATURAL JOIN is not supported here; write the condition with ON")
        if isinstance(node, exp.TableAlias) and node.args.get("columns"):
            raise _refuse(node, "column lists after a table alias, AS t(a, b), are not supported")
        if isinstance(node, exp.Table) and not isinstance(node.this, exp.Identifier):
            raise _refuse(node, "only named tables and subqueries may appear in FROM")
        if isinstance(node, exp.Select):
            for key in ("into", "hint", "kind", "locks", "sample", "qualify", "windows", "pivots"):
                if node.args.get(key):
                    raise _refuse(node, f"{key.upper()} is not ADQL")
        if isinstance(node, exp.Table) and (node.args.get("hints") or node.args.get("pivots")):
            raise _refuse(node, "table hints are not ADQL")
        if isinstance(node, exp.Literal) and node.is_string and node.args.get("national"):
            raise _refuse(node, "N'...' strings are not ADQL")
        if isinstance(node, exp.Cast) and node.to.this not in _CAST_TYPES:
            raise _refuse(node, f"CAST to {node.to.sql()} is not supported (use SMALLINT, INTEGER, "
                                "BIGINT, REAL, DOUBLE PRECISION, CHAR(n) or VARCHAR(n))")


# --- identifiers --------------------------------------------------------------------------------


def ident_matches(ident: exp.Identifier, name: str) -> bool:
    """ADQL 2.1 §2.1.3: delimited identifiers match exactly, regular ones ignore case."""
    if ident.quoted:
        return ident.this == name
    return ident.this.lower() == name.lower()


@dataclass
class _Source:
    """A table, derived table or CTE in a FROM clause, as columns can see it."""

    sql_alias: str
    alias: exp.Identifier | None  # the query's own alias, if it gave one
    table: TableInfo | None  # for base tables
    columns: list[Column]
    sql_columns: list[str]  # SQLite name of each column

    def matches(self, table: exp.Identifier, schema: exp.Identifier | None) -> bool:
        if self.alias is not None:
            return schema is None and ident_matches(table, self.alias.this)
        if self.table is None:
            return False
        return ident_matches(table, self.table.name) and (
            schema is None or ident_matches(schema, self.table.schema))


class _Translator:
    def __init__(self, lookup: TableLookup):
        self.lookup = lookup
        self.counter = 0

    def new_alias(self) -> str:
        self.counter += 1
        return f"t{self.counter}"

    # -- queries --

    def query(self, q: exp.Expression, outer: list[list[_Source]], ctes: dict[str, _Source]
              ) -> list[Column]:
        """Resolve a query in place; returns its output columns."""
        ctes = dict(ctes)
        with_ = q.args.get("with_") or q.args.get("with")
        if with_ is not None:
            if with_.args.get("recursive"):
                raise _refuse(with_, "WITH RECURSIVE is not supported")
            for cte in with_.expressions:
                cols = self.query(cte.this, outer, ctes)
                name = cte.alias_or_name
                sql_name = self.new_alias()
                cte.set("alias", exp.TableAlias(this=exp.to_identifier(sql_name, quoted=True)))
                ctes[name.lower()] = _Source(sql_name, cte.args["alias"].this, None, cols,
                                             [c.name for c in cols])
                ctes[name.lower()].cte_name = name  # type: ignore[attr-defined]
        if isinstance(q, exp.Subquery):
            return self.query(q.this, outer, ctes)
        if isinstance(q, exp.SetOperation):
            left = self.query(q.left, outer, ctes)
            right = self.query(q.right, outer, ctes)
            if len(left) != len(right):
                raise _refuse(q, f"the two sides of {q.key.upper()} have {len(left)} and "
                                 f"{len(right)} columns")
            self._tail(q, [left], outer, ctes, output=left)
            return left
        if not isinstance(q, exp.Select):
            raise _refuse(q, "expected a SELECT")
        return self.select(q, outer, ctes)

    def select(self, q: exp.Select, outer: list[list[_Source]], ctes: dict[str, _Source]
               ) -> list[Column]:
        from_ = q.args.get("from_") or q.args.get("from")
        if from_ is None:
            raise _refuse(q, "ADQL requires a FROM clause")
        sources: list[_Source] = [self.source(from_.this, outer, ctes)]
        for join in q.args.get("joins") or []:
            if join.args.get("using"):
                raise _refuse(join, "JOIN ... USING is not supported here; write the condition "
                                    "with ON")
            sources.append(self.source(join.this, outer, ctes))
        scopes = [sources] + outer

        # output names come first: they follow the query's spelling, before any rewriting
        projections: list[exp.Expression] = []
        names: list[str] = []
        for item in q.expressions:
            if isinstance(item, exp.Star) or (isinstance(item, exp.Column)
                                              and isinstance(item.this, exp.Star)):
                for src, i in self._star_sources(item, sources):
                    col = exp.column(exp.to_identifier(src.sql_columns[i], quoted=True),
                                     table=exp.to_identifier(src.sql_alias, quoted=True))
                    col.meta["adql"] = src.columns[i]
                    projections.append(col)
                    names.append(src.columns[i].name)
            else:
                projections.append(item)
                names.append(_output_name(item))
        names = _unique(names)
        aliases = [n for n in names]

        for join in q.args.get("joins") or []:
            self.resolve_part(join.args.get("on"), scopes, ctes, None)
        for part in (q.args.get("where"), q.args.get("group"), q.args.get("having")):
            self.resolve_part(part, scopes, ctes, aliases if part is not q.args.get("where") else None)
        for p in projections:
            self.resolve_part(p, scopes, ctes, None)
        self._tail(q, [sources] + outer, [], ctes, output=None, aliases=aliases)

        columns = []
        new_exprs = []
        for name, p in zip(names, projections):
            inner = p.this if isinstance(p, exp.Alias) else p
            columns.append(_infer(inner).renamed(name))
            new_exprs.append(exp.alias_(inner, exp.to_identifier(name, quoted=True)))
        q.set("expressions", new_exprs)
        return columns

    def _tail(self, q, scopes, outer, ctes, *, output, aliases=None):
        """ORDER BY may name output columns (aliases) as well as source columns."""
        order = q.args.get("order")
        if order is None:
            return
        if output is not None:  # set operation: only output names and positions
            names = [c.name for c in output]
            for col in order.find_all(exp.Column):
                if not any(ident_matches(col.this, n) for n in names):
                    raise _refuse(col, f"ORDER BY of a {q.key.upper()} may only name its output "
                                       f"columns, not {col.sql()!r}")
                col.set("this", exp.to_identifier(
                    next(n for n in names if ident_matches(col.this, n)), quoted=True))
            return
        # an unqualified ORDER BY name means the output column first (SQL), then a source column
        self.resolve_part(order, scopes, ctes, aliases, prefer_aliases=True)

    def _star_sources(self, item, sources):
        if isinstance(item, exp.Star):
            return [(s, i) for s in sources for i in range(len(s.columns))]
        table = item.args.get("table")
        schema = item.args.get("db")
        hits = [s for s in sources if s.matches(table, schema)]
        if not hits:
            raise _refuse(item, f"unknown table or alias {table.this!r} in {item.sql()}")
        return [(hits[0], i) for i in range(len(hits[0].columns))]

    def source(self, node: exp.Expression, outer, ctes) -> _Source:
        if isinstance(node, exp.Subquery):
            alias = node.args.get("alias")
            if alias is None:
                raise _refuse(node, "a subquery in FROM needs an alias (ADQL 2.1 §2.2)")
            cols = self.query(node.this, [], ctes)
            sql_alias = self.new_alias()
            original = alias.this
            node.set("alias", exp.TableAlias(this=exp.to_identifier(sql_alias, quoted=True)))
            return _Source(sql_alias, original, None, cols, [c.name for c in cols])
        if not isinstance(node, exp.Table):
            raise _refuse(node, f"not supported in FROM: {node.sql()[:60]!r}")
        name: exp.Identifier = node.this
        schema: exp.Identifier | None = node.args.get("db")
        if node.args.get("catalog") is not None:
            raise _refuse(node, f"catalog-qualified table names are not supported: {node.sql()}")
        alias_node = node.args.get("alias")
        alias = alias_node.this if alias_node is not None else None
        sql_alias = self.new_alias()
        if schema is None and name.this.lower() in ctes and (
                not name.quoted or getattr(ctes[name.this.lower()], "cte_name", "") == name.this):
            cte = ctes[name.this.lower()]
            node.set("this", exp.to_identifier(cte.sql_alias, quoted=True))
            node.set("alias", exp.TableAlias(this=exp.to_identifier(sql_alias, quoted=True)))
            return _Source(sql_alias, alias if alias is not None else name, None, cte.columns,
                           cte.sql_columns)
        found = self.lookup(schema, name)
        if found is None:
            shown = f"{schema.this}.{name.this}" if schema is not None else name.this
            hint = "" if schema is not None else " (tables are named schema.table, e.g. orrery.sources)"
            raise _refuse(node, f"unknown table {shown!r}{hint}")
        node.set("this", exp.to_identifier(found.physical, quoted=True))
        node.set("db", exp.to_identifier(found.database, quoted=True))
        node.set("alias", exp.TableAlias(this=exp.to_identifier(sql_alias, quoted=True)))
        phys = found.physical_columns or {}
        return _Source(sql_alias, alias, found.table, list(found.table.columns),
                       [phys.get(c.name, c.name) for c in found.table.columns])

    # -- columns --

    def resolve_part(self, part, scopes, ctes, aliases, prefer_aliases=False):
        if part is None:
            return
        for node in _own_nodes(part):
            if isinstance(node, exp.Query) or isinstance(node, exp.Subquery):
                self.query(node, scopes, ctes)
            elif isinstance(node, exp.Column):
                self.column(node, scopes, aliases, prefer_aliases and node.parent is not None
                            and isinstance(node.parent, exp.Ordered))

    def column(self, col: exp.Column, scopes, aliases, prefer_aliases=False):
        if "adql" in col.meta:
            return  # produced by star expansion, already resolved
        ident = col.this
        if isinstance(ident, exp.Star):
            raise _refuse(col, f"{col.sql()} is only allowed in the select list")
        table = col.args.get("table")
        if prefer_aliases and table is None and aliases:
            for a in aliases:
                if ident_matches(ident, a):
                    col.set("this", exp.to_identifier(a, quoted=True))
                    return
        schema = col.args.get("db")
        if col.args.get("catalog") is not None:
            raise _refuse(col, f"too many qualifiers in {col.sql()}")
        for sources in scopes:
            candidates = [s for s in sources if s.matches(table, schema)] if table is not None else sources
            hits = [(s, i) for s in candidates for i, c in enumerate(s.columns)
                    if ident_matches(ident, c.name)]
            if len({id(s) for s, _ in hits}) > 1:
                raise _refuse(col, f"column {ident.this!r} is ambiguous: qualify it with a table "
                                   "name or alias")
            if hits:
                src, i = hits[0]
                col.set("this", exp.to_identifier(src.sql_columns[i], quoted=True))
                col.set("table", exp.to_identifier(src.sql_alias, quoted=True))
                col.set("db", None)
                col.meta["adql"] = src.columns[i]
                return
            if table is not None and candidates:
                src = candidates[0]
                where = src.table.qualified if src.table is not None else table.this
                raise _refuse(col, f"unknown column {ident.this!r} in {where}")
        if table is None and aliases:
            for a in aliases:
                if ident_matches(ident, a):
                    col.set("this", exp.to_identifier(a, quoted=True))
                    return
        if table is not None:
            raise _refuse(col, f"unknown table or alias {table.this!r} in {col.sql(dialect=_Adql)}")
        raise _refuse(col, f"unknown column {ident.this!r}" + (
            " (delimited identifiers are case-sensitive)" if ident.quoted else ""))


def _own_nodes(node: exp.Expression):
    """Walk a clause without entering nested queries (yielded once, for recursive resolution)."""
    stack = [node]
    while stack:
        n = stack.pop()
        if n is not node and isinstance(n, exp.Query | exp.Subquery):
            yield n
            continue
        yield n
        for child in reversed(list(n.iter_expressions())):
            stack.append(child)


def _unique(names: list[str]) -> list[str]:
    seen: dict[str, int] = {}
    out = []
    for n in names:
        key = n.lower()
        if key in seen:
            seen[key] += 1
            n = f"{n}_{seen[key]}"
            while n.lower() in seen:
                seen[key] += 1
                n = f"{n}_{seen[key]}"
            seen[n.lower()] = 1
        else:
            seen[key] = 1
        out.append(n)
    return out


def _output_name(item: exp.Expression) -> str:
    """Result column name: the alias, else the column as written, else the function's name."""
    if isinstance(item, exp.Alias):
        return item.alias
    if isinstance(item, exp.Column):
        return item.this.this
    if isinstance(item, exp.Paren):
        return _output_name(item.this)
    if isinstance(item, exp.Anonymous):
        return item.name.lower()
    for cls, name in FUNCTION_NAMES.items():
        if type(item) is cls:
            return name
    return "expr"


# --- types --------------------------------------------------------------------------------------

_INTEGER = {"short", "int", "long"}
_GEOMETRY_XTYPE = {"POINT": "point", "CIRCLE": "circle", "BOX": "polygon", "POLYGON": "polygon",
                   "CENTROID": "point"}


def _t(datatype: str, arraysize: str | None = None, **kw) -> Column:
    return Column("", datatype, arraysize=arraysize, **kw)


UNKNOWN = ""


def _infer(node: exp.Expression) -> Column:
    """The VOTable type of an expression; datatype UNKNOWN means 'learn it from the values'."""
    if isinstance(node, exp.Column):
        meta = node.meta.get("adql")
        return replace(meta) if meta is not None else _t(UNKNOWN)
    if isinstance(node, exp.Paren):
        return _infer(node.this)
    if isinstance(node, exp.Literal):
        if node.is_string:
            return _t("char", "*")
        return _t("long") if _is_int_literal(node.this) else _t("double")
    if isinstance(node, exp.HexString):
        return _t("long")
    if isinstance(node, exp.Null):
        return _t(UNKNOWN)
    if isinstance(node, exp.Neg):
        inner = _infer(node.this)
        return _t(inner.datatype, unit=inner.unit) if inner.datatype else inner
    if isinstance(node, exp.DPipe | exp.Lower | exp.Upper):
        return _t("char", "*")
    if isinstance(node, exp.Add | exp.Sub | exp.Mul | exp.Div | exp.Mod):
        a, b = _infer(node.this), _infer(node.expression)
        if not a.datatype or not b.datatype:
            return _t(UNKNOWN)
        if a.datatype in _INTEGER and b.datatype in _INTEGER:
            return _t("long")
        return _t("double")
    if isinstance(node, exp.Count):
        return _t("long", ucd="meta.number")
    if isinstance(node, exp.Avg):
        inner = _infer(node.this)
        return _t("double", unit=inner.unit, ucd=_stat(inner.ucd, "stat.mean"))
    if isinstance(node, exp.Sum):
        inner = _infer(node.this)
        if inner.datatype in _INTEGER or inner.datatype == "boolean":
            return _t("long")
        return _t("double", unit=inner.unit) if inner.datatype else _t(UNKNOWN)
    if isinstance(node, exp.Min | exp.Max):
        inner = _infer(node.this)
        stat = "stat.min" if isinstance(node, exp.Min) else "stat.max"
        return replace(inner, ucd=_stat(inner.ucd, stat), description=None, principal=False,
                       indexed=False, std=False, name="")
    if isinstance(node, exp.Abs):
        inner = _infer(node.this)
        return _t(inner.datatype, unit=inner.unit) if inner.datatype else inner
    if isinstance(node, exp.Sign):
        inner = _infer(node.this)
        return _t("long") if inner.datatype in _INTEGER else _t("double")
    if isinstance(node, exp.Degrees):
        return _t("double", unit="deg")
    if isinstance(node, exp.Radians):
        return _t("double", unit="rad")
    if isinstance(node, exp.Ceil | exp.Floor | exp.Round | exp.Trunc):
        inner = _infer(node.this)
        return _t("double", unit=inner.unit)
    if isinstance(node, exp.Coalesce):
        return _infer(node.this)
    if isinstance(node, exp.Case):
        ifs = node.args.get("ifs") or []
        return _infer(ifs[0].args["true"]) if ifs else _t(UNKNOWN)
    if isinstance(node, exp.Cast):
        datatype, size = _CAST_TYPES[node.to.this]
        return _t(datatype, size)
    if isinstance(node, exp.Contains):
        return _t("int")
    if isinstance(node, exp.Subquery):
        select = node.this
        if isinstance(select, exp.Select) and select.expressions:
            first = select.expressions[0]
            return _infer(first.this if isinstance(first, exp.Alias) else first)
        return _t(UNKNOWN)
    if isinstance(node, exp.Anonymous):
        name = node.name.upper()
        if name in _GEOMETRY_XTYPE:
            return _t("double", "*", unit="deg", xtype=_GEOMETRY_XTYPE[name])
        if name in ("CONTAINS", "INTERSECTS"):
            return _t("int")
        if name in ("DISTANCE", "COORD1", "COORD2"):
            ucd = {"DISTANCE": "pos.angDistance", "COORD1": "pos.eq.ra", "COORD2": "pos.eq.dec"}[name]
            return _t("double", unit="deg", ucd=ucd)
        if name == "AREA":
            return _t("double", unit="deg**2")
    if isinstance(node, exp.Func):
        return _t("double")
    if isinstance(node, exp.Predicate | exp.Not | exp.And | exp.Or):
        return _t("boolean")
    return _t(UNKNOWN)


def _stat(ucd: str | None, word: str) -> str | None:
    """The column's UCD qualified by a statistic word. UCD1+ 1.5 (IVOA EN) marks stat.mean,
    stat.min, stat.max as secondary words (flag S): they may not come first, so the column's own
    (primary) UCD leads, e.g. ``phot.mag;stat.mean``."""
    return f"{ucd};{word}" if ucd else None


def _is_int_literal(text: str) -> bool:
    return text.isdigit()


# --- geometry fast paths ------------------------------------------------------------------------


def _const(node: exp.Expression) -> float | None:
    """Value of a constant numeric expression, else None."""
    if isinstance(node, exp.Literal) and not node.is_string:
        return float(node.this)
    if isinstance(node, exp.Neg):
        v = _const(node.this)
        return None if v is None else -v
    if isinstance(node, exp.Paren):
        return _const(node.this)
    if isinstance(node, exp.Add | exp.Sub | exp.Mul | exp.Div):
        a, b = _const(node.this), _const(node.expression)
        if a is None or b is None:
            return None
        if isinstance(node, exp.Add):
            return a + b
        if isinstance(node, exp.Sub):
            return a - b
        if isinstance(node, exp.Mul):
            return a * b
        return a / b if b else None
    return None


def _geom_args(node: exp.Anonymous) -> list[exp.Expression]:
    args = list(node.expressions)
    if args and isinstance(args[0], exp.Literal) and args[0].is_string:
        args = args[1:]  # coordinate system, ignored
    return args


def _is_call(node, name: str) -> bool:
    return isinstance(node, exp.Anonymous) and node.name.upper() == name


def _point_parts(node) -> tuple[exp.Expression, exp.Expression] | None:
    if _is_call(node, "POINT"):
        args = _geom_args(node)
        if len(args) == 2:
            return args[0], args[1]
    return None


def _region_dec_range(region: exp.Expression) -> tuple[float, float] | None:
    """Declination band holding a constant region, for an index-friendly prefilter."""
    for name in ("CIRCLE", "POLYGON", "BOX"):
        if _is_call(region, name):
            args = _geom_args(region)
            values = [_const(a) for a in args]
            if not args or any(v is None for v in values):
                return None
            try:
                maker = {"CIRCLE": geometry.make_circle, "POLYGON": geometry.make_polygon,
                         "BOX": geometry.make_box}[name]
                shape = geometry.parse(maker(*values))
            except (geometry.GeometryError, ValueError, TypeError):
                return None  # the error surfaces when the query runs
            if isinstance(shape, geometry.Circle):
                centre_dec, reach = shape.dec, shape.radius
            else:
                centre_dec, reach = geometry.radec(shape.centre)[1], shape.cap_radius
            margin = 1e-9
            return centre_dec - reach - margin, centre_dec + reach + margin
    return None


def _point_region(node) -> tuple[tuple, exp.Expression] | None:
    """(point parts, region) of CONTAINS(POINT, r), INTERSECTS(POINT, r) or INTERSECTS(r, POINT)."""
    if isinstance(node, exp.Contains):
        a, b = node.this, node.expression
        parts = _point_parts(a)
        return (parts, b) if parts else None
    if _is_call(node, "INTERSECTS") and len(node.expressions) == 2:
        a, b = node.expressions
        parts = _point_parts(a)
        if parts:
            return parts, b
        parts = _point_parts(b)
        if parts:
            return parts, a
    return None


def _circle_parts(node) -> list[exp.Expression] | None:
    if _is_call(node, "CIRCLE"):
        args = _geom_args(node)
        if len(args) == 3:
            return args
    return None


def _fast_circles(node) -> tuple[exp.Expression, tuple[float, float] | None] | None:
    """INTERSECTS/CONTAINS of two CIRCLE(...) calls, as one function of six numbers."""
    if isinstance(node, exp.Contains):
        a, b, name = node.this, node.expression, "adql_circle_in_circle"
    elif _is_call(node, "INTERSECTS") and len(node.expressions) == 2:
        (a, b), name = node.expressions, "adql_circles_intersect"
    else:
        return None
    c1, c2 = _circle_parts(a), _circle_parts(b)
    if not c1 or not c2:
        return None
    new = exp.Anonymous(this=name, expressions=[*c1, *c2])
    band = None
    for (ra, dec, r), (cra, cdec, cr) in ((c1, c2), (c2, c1)):
        consts = [_const(x) for x in (cra, cdec, cr)]
        reach = _const(r)
        if isinstance(dec, exp.Column) and reach is not None and None not in consts:
            band = (dec, (consts[1] - consts[2] - reach - 1e-9, consts[1] + consts[2] + reach + 1e-9))
            break
    return new, band


def _fast_point_test(node) -> tuple[exp.Expression, tuple[float, float] | None] | None:
    found = _point_region(node)
    if not found:
        return None
    (ra, dec), region = found
    band = _region_dec_range(region)
    if _is_call(region, "CIRCLE"):
        args = _geom_args(region)
        if len(args) == 3:
            new = exp.Anonymous(this="adql_in_cone", expressions=[ra, dec, *args])
            return new, (band if isinstance(dec, exp.Column) else None)
    new = exp.Anonymous(this="adql_point_in", expressions=[ra, dec, region])
    return new, (band if isinstance(dec, exp.Column) else None)


def _is_true_test(cond: exp.Expression) -> exp.Expression | None:
    """The X of a conjunct that requires X = 1: ``1 = X``, ``X = 1`` or bare ``X``."""
    if isinstance(cond, exp.EQ):
        for a, b in ((cond.this, cond.expression), (cond.expression, cond.this)):
            if _const(a) == 1.0:
                return b
        return None
    return cond


def _distance_bound(cond: exp.Expression):
    """(DISTANCE(POINT(col..), POINT(c1, c2)), radius) for DISTANCE(...) < r and r > DISTANCE(...)."""
    if isinstance(cond, exp.LT | exp.LTE):
        d, r = cond.this, cond.expression
    elif isinstance(cond, exp.GT | exp.GTE):
        d, r = cond.expression, cond.this
    else:
        return None
    radius = _const(r)
    if radius is None or not _is_call(d, "DISTANCE") or len(d.expressions) != 2:
        return None
    p1, p2 = (_point_parts(x) for x in d.expressions)
    if not p1 or not p2:
        return None
    for (ra, dec), (cra, cdec) in ((p1, p2), (p2, p1)):
        c_dec = _const(cdec)
        if isinstance(dec, exp.Column) and c_dec is not None and _const(cra) is not None:
            return dec, (c_dec - radius - 1e-9, c_dec + radius + 1e-9)
    return None


def optimise_geometry(tree: exp.Expression) -> None:
    """Give point-in-region tests and DISTANCE a direct form; add declination prefilters."""
    for select in list(tree.find_all(exp.Select)):
        where = select.args.get("where")
        if where is None:
            continue
        conjuncts = list(where.this.flatten()) if isinstance(where.this, exp.And) else [where.this]
        bands = []
        for cond in conjuncts:
            target = _is_true_test(cond)
            fast = _fast_point_test(target) if target is not None else None
            if fast and fast[1] is not None:
                bands.append((_point_region(target)[0][1], fast[1]))
            circles = _fast_circles(target) if target is not None else None
            if circles and circles[1] is not None:
                bands.append(circles[1])
            bound = _distance_bound(cond)
            if bound:
                bands.append(bound)
        for dec_col, (lo, hi) in bands:
            if lo <= -90.0 and hi >= 90.0:
                continue
            between = exp.Between(this=dec_col.copy(), low=exp.Literal.number(repr(lo)),
                                  high=exp.Literal.number(repr(hi)))
            where.set("this", exp.and_(exp.Paren(this=where.this), between))
    # every point-in-region test anywhere gets its direct form
    for node in list(tree.walk()):
        if isinstance(node, exp.Contains) or _is_call(node, "INTERSECTS"):
            fast = _fast_point_test(node) or _fast_circles(node)
            if fast:
                node.replace(fast[0])
    for node in list(tree.walk()):
        if _is_call(node, "DISTANCE") and len(node.expressions) == 2:
            p1, p2 = (_point_parts(x) for x in node.expressions)
            if p1 and p2:
                node.set("expressions", [*p1, *p2])


# --- functions SQLite lacks or gets wrong -------------------------------------------------------


def map_functions(tree: exp.Expression) -> None:
    """Replace nodes whose SQLite spelling or meaning differs from ADQL by our own functions."""
    for node in list(tree.walk()):
        if isinstance(node, exp.Mod):
            # SQLite's % truncates both operands to integers; ADQL MOD works on reals too
            node.replace(exp.Anonymous(this="adql_mod", expressions=[node.this, node.expression]))
        elif isinstance(node, exp.Trunc):
            digits = node.args.get("decimals") or exp.Literal.number(0)
            node.replace(exp.Anonymous(this="adql_truncate", expressions=[node.this, digits]))
        elif isinstance(node, exp.Rand):
            # SQLite's RANDOM() is a 64-bit integer; ADQL RAND is in [0, 1)
            args = [node.this] if node.this is not None else []
            node.replace(exp.Anonymous(this="adql_rand", expressions=args))
        elif isinstance(node, exp.Contains):
            node.replace(exp.Anonymous(this="contains", expressions=[node.this, node.expression]))
        elif isinstance(node, exp.HexString):
            node.replace(exp.Literal.number(int(node.this, 16)))
        elif isinstance(node, exp.Log) and node.expression is None:
            node.replace(exp.Anonymous(this="ln", expressions=[node.this]))


# --- entry point --------------------------------------------------------------------------------


def translate(adql: str, lookup: TableLookup) -> Translation:
    """Translate one ADQL query into SQLite SQL and describe its result columns."""
    tree = parse(adql)
    check_supported(tree)
    translator = _Translator(lookup)
    columns = translator.query(tree, [], {})
    optimise_geometry(tree)
    map_functions(tree)
    try:
        sql = tree.sql(dialect="sqlite", unsupported_level=sqlglot.ErrorLevel.RAISE)
    except sqlglot.errors.UnsupportedError as exc:
        raise AdqlError(f"cannot translate to SQLite: {exc}") from None
    return Translation(sql, columns)


# --- Python versions of ADQL math that SQLite may lack ----------------------------------------


def adql_mod(a, b):
    if a is None or b is None:
        return None
    if isinstance(a, int) and isinstance(b, int):
        if b == 0:
            return None
        return int(math.fmod(a, b))
    return math.fmod(a, b) if b else None


def adql_truncate(x, digits=0):
    if x is None or digits is None:
        return None
    factor = 10.0 ** int(digits)
    return math.trunc(x * factor) / factor
