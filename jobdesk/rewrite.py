"""Renaming tables and columns in ADQL for a new data release, on the parsed query.

Why its own module: a text substitution would also change string literals, comments and names
that merely contain the old one.  The query is parsed (sqlglot's T-SQL reader, which knows ADQL's
``TOP``, as in :mod:`jobdesk.keys`), the identifiers to change are found in the tree, and only
their character spans are replaced in the original text: layout, comments and literals stay
byte for byte.

Rules (ADQL 2.1 §2.1.7: regular identifiers compare case-insensitively, delimited ones exactly):

- A name with a dot (``"orrery.sources"``) renames a table wherever the query names it so; a
  column qualified by that table's bare name follows (unless an alias of that name exists).
- A name without a dot renames a column (and a table named without its schema).  Columns of
  ``TAP_UPLOAD`` tables are never renamed.
- A renamed column that is a bare select item keeps its output name (``new AS old``), so the old
  and new results line up column by column when compared.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import sqlglot
from sqlglot import exp

UPLOAD_SCHEMA = "TAP_UPLOAD"


@dataclass(frozen=True)
class Name:
    """A rename source or target: its parts, each with its quoting."""

    parts: tuple[tuple[str, bool], ...]   # (text, quoted)

    @classmethod
    def parse(cls, text: str) -> Name:
        parts, buf, quoted, i = [], "", False, 0
        text = text.strip()
        while i < len(text):
            ch = text[i]
            if ch == '"':
                end = i + 1
                while True:
                    end = text.find('"', end)
                    if end < 0:
                        raise ValueError(f"unterminated quoted name in {text!r}")
                    if text[end + 1:end + 2] == '"':
                        end += 2
                        continue
                    break
                buf, quoted, i = text[i + 1:end].replace('""', '"'), True, end + 1
                continue
            if ch == ".":
                parts.append((buf, quoted))
                buf, quoted = "", False
            else:
                buf += ch
            i += 1
        parts.append((buf, quoted))
        if any(not p for p, _ in parts):
            raise ValueError(f"empty name part in {text!r}")
        return cls(tuple(parts))

    @property
    def folded(self) -> tuple[str, ...]:
        return tuple(p if q else p.upper() for p, q in self.parts)

    @property
    def bare(self) -> str:
        return _spell(*self.parts[-1])

    def spelled(self) -> str:
        return ".".join(_spell(p, q) for p, q in self.parts)

    def __str__(self) -> str:
        return self.spelled()


def _spell(text: str, quoted: bool) -> str:
    return '"' + text.replace('"', '""') + '"' if quoted else text


def _fold(ident: exp.Identifier) -> str:
    return ident.this if ident.args.get("quoted") else ident.this.upper()


@dataclass
class Rewritten:
    """One query after the renames: the new text and which renames it used."""

    adql: str
    used: set[str] = field(default_factory=set)           # rename sources (as given) applied
    tables: list[str] = field(default_factory=list)       # tables read, after the renames
    columns: list[tuple[str | None, str]] = field(default_factory=list)  # (qualifier, column)
    aliases: set[str] = field(default_factory=set)        # folded table and output aliases
    uncheckable: bool = False                            # subqueries/uploads: skip column checks


class QueryUnreadable(ValueError):
    """The query cannot be parsed, so it cannot be rewritten safely."""


def parse(adql: str) -> exp.Expression:
    try:
        tree = sqlglot.parse_one(adql, read="tsql")
    except Exception as exc:  # ParseError, TokenError, RecursionError ...
        raise QueryUnreadable(f"the query cannot be parsed: {exc}") from None
    if not isinstance(tree, exp.Query):
        raise QueryUnreadable("not a query")
    return tree


def rewrite(adql: str, renames: dict[str, str]) -> Rewritten:
    """Apply ``renames`` ({old: new}) to ``adql``; see the module docstring for the rules."""
    tree = parse(adql)
    tables = {Name.parse(k).folded: (k, Name.parse(v)) for k, v in renames.items() if "." in k}
    columns = {Name.parse(k).folded[0]: (k, Name.parse(v)) for k, v in renames.items()
               if "." not in k}
    # a delimited "name" matches a rename spelled exactly so (services that fold regular
    # identifiers to lower case, as PostgreSQL does, treat "ra" and ra alike)
    exact = {Name.parse(k).parts[0][0]: (k, Name.parse(v)) for k, v in renames.items()
             if "." not in k}

    def column_rename(ident: exp.Identifier):
        if ident.args.get("quoted"):
            return exact.get(ident.this)
        return columns.get(_fold(ident))
    out = Rewritten(adql)
    edits: list[tuple[int, int, str]] = []   # (start, end inclusive, replacement)

    table_aliases: set[str] = set()
    upload_refs: set[str] = set()              # folded names/aliases naming upload tables
    renamed_bare: dict[str, Name] = {}         # folded old bare name -> new name
    for t in tree.find_all(exp.Table):
        parts = [p for p in t.parts if isinstance(p, exp.Identifier)]
        alias = t.args.get("alias")
        if alias is not None and isinstance(alias.this, exp.Identifier):
            table_aliases.add(_fold(alias.this))
        if not parts:
            continue
        folded = tuple(_fold(p) for p in parts)
        if len(folded) >= 2 and folded[-2].upper() == UPLOAD_SCHEMA:
            upload_refs.add(folded[-1])
            if alias is not None:
                upload_refs.add(_fold(alias.this))
            out.uncheckable = True
            continue
        hit = tables.get(folded) or (columns.get(folded[0]) if len(folded) == 1 else None)
        if hit is not None:
            source, new = hit
            edits.append((_start(parts[0]), _end(parts[-1]), new.spelled()))
            out.used.add(source)
            renamed_bare[folded[-1]] = new
            out.tables.append(new.spelled())
        else:
            out.tables.append(".".join(_spell(p.this, bool(p.args.get("quoted"))) for p in parts))
    ctes = {_fold(c.args["alias"].this) for c in tree.find_all(exp.CTE)
            if c.args.get("alias") is not None}
    if ctes or any(isinstance(s.args.get("this"), exp.Query) for s in tree.find_all(exp.Subquery)):
        out.uncheckable = True
    output_aliases = {_fold(a.args["alias"]) for a in tree.find_all(exp.Alias)
                      if isinstance(a.args.get("alias"), exp.Identifier)}
    out.aliases = table_aliases | output_aliases | ctes

    selects = {id(e) for q in tree.find_all(exp.Select) for e in q.expressions}
    for col in tree.find_all(exp.Column):
        name = col.args.get("this")
        if not isinstance(name, exp.Identifier):
            continue                              # SELECT *, s.*
        qual = [col.args.get(k) for k in ("catalog", "db", "table")]
        qual = [q for q in qual if isinstance(q, exp.Identifier)]
        qfold = tuple(_fold(q) for q in qual)
        if qual:
            if qfold[-1] in upload_refs:
                continue
            if len(qual) >= 2 and qfold in tables:        # orrery.sources.ra
                source, new = tables[qfold]
                edits.append((_start(qual[0]), _end(qual[-1]), new.spelled()))
                out.used.add(source)
            elif qfold[-1] in renamed_bare and qfold[-1] not in table_aliases:
                new = renamed_bare[qfold[-1]]
                if _fold_name(new.parts[-1]) != qfold[-1]:
                    edits.append((_start(qual[-1]), _end(qual[-1]), new.bare))
        hit = column_rename(name)
        if hit is not None and not (not qual and _fold(name) in output_aliases
                                    and id(col) not in selects):
            source, new = hit
            text = new.spelled()
            if id(col) in selects:                      # a bare select item keeps its name
                text = f"{text} AS {_spell(name.this, bool(name.args.get('quoted')))}"
            edits.append((_start(name), _end(name), text))
            out.used.add(source)
            out.columns.append((qfold[-1] if qfold else None, new.folded[0]))
        else:
            out.columns.append((qfold[-1] if qfold else None, _fold(name)))
    for join in tree.find_all(exp.Join):                  # JOIN ... USING (a, b)
        for ident in join.args.get("using") or []:
            if isinstance(ident, exp.Identifier) and column_rename(ident) is not None:
                source, new = column_rename(ident)
                edits.append((_start(ident), _end(ident), new.spelled()))
                out.used.add(source)

    text = adql
    for start, end, new_text in sorted(set(edits), reverse=True):
        text = text[:start] + new_text + text[end + 1:]
    out.adql = text
    return out


def _fold_name(part: tuple[str, bool]) -> str:
    return part[0] if part[1] else part[0].upper()


def _start(ident: exp.Identifier) -> int:
    meta = ident.meta
    if "start" not in meta:
        raise QueryUnreadable(f"no position for identifier {ident.this!r}")
    return meta["start"]


def _end(ident: exp.Identifier) -> int:
    return ident.meta["end"]
