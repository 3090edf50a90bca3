"""Canonical ADQL text and the cache key of a TAP query.

A cached result may be served for a new query only when a re-run could not answer differently.
So two queries share a key only when their ADQL token streams are identical apart from the case
of keywords and function names: whitespace and ``--`` comments go, everything a service can see
(identifier spelling, literals, numbers as written) stays.  Our own small tokenizer follows the
ADQL 2.1 lexical rules and alone decides what is "the same query"; sqlglot, a real parser that
reads ADQL's TOP through its T-SQL dialect, is used only to name the tables read and to spot
queries that are not repeatable.

Decisions (see also :func:`canonical_adql` and :func:`query_key`):

- Fallback: when the text cannot be tokenized as ADQL (an unterminated ``'...'`` or ``"..."``,
  or a character outside ADQL's character set outside literals), the key uses the exact input
  (``parsed=False``).  When only sqlglot fails, the token text is still used: sharing a key
  needs identical token streams, which the tokenizer alone guarantees, and sqlglot rejects some
  valid ADQL (user-defined functions with odd arguments, service extensions).
- Only words that ADQL 2.1's grammar uses as keywords are upper-cased.  Reserved words the
  grammar never uses (``DATE``, ``SIZE``, ``VALUE``, ...) cannot appear unquoted in valid ADQL,
  and lenient services take them as column names, so they are kept as written.  Function names
  are upper-cased only before ``(``; a word right after ``.``, before ``.`` or after ``AS``
  (an alias) is an identifier and kept as written.  Every rule errs towards a cache miss, never
  towards sharing a key between queries that could answer differently.
"""

from __future__ import annotations

import functools
import hashlib
import json
import operator
import re
from collections.abc import Mapping
from dataclasses import dataclass
from typing import NamedTuple
from urllib.parse import urlsplit

import sqlglot
from sqlglot import exp

from jobdesk.errors import BadServiceURL, UploadInvalid

KEY_VERSION = 1

# --- ADQL 2.1 word lists --------------------------------------------------------------------
# Taken from the standard's text (ADQL 2.1 §2.1.3 "SQL reserved keywords", §2.1.4 "ADQL reserved
# keywords", and the productions of the Appendix A grammar named beside each group), not from
# memory.  Only words the grammar actually uses are here (see the module docstring).

# Keywords of the query grammar: <select_query>, <set_quantifier>, <set_limit>, <from_clause>,
# <qualified_join>, <join_type>, <outer_join_type>, <named_columns_join>, <where_clause>,
# <group_by_clause>, <having_clause>, <order_by_clause>, <order_by_direction>, <offset_clause>,
# <query_set_expression>, <with_clause>, <predicate>s, <search_condition>, <value_expression>
# (NULL) and <boolean_literal> (§2.1.8: "Boolean literals are not case-sensitive").
GRAMMAR_KEYWORDS = frozenset("""
    SELECT ALL DISTINCT TOP FROM AS JOIN NATURAL INNER LEFT RIGHT FULL OUTER ON USING WHERE
    GROUP BY HAVING ORDER ASC DESC OFFSET UNION EXCEPT INTERSECT WITH AND OR NOT BETWEEN LIKE
    ILIKE IN IS NULL EXISTS TRUE FALSE
""".split())

# Function names: <math_function>, <trig_function> (incl. COT), the geometry functions of
# §2.1.4 (<area> ... <region>), <set_function_type>, <case_folding_function>,
# <cast_specification>, <coalesce_expression>, and IN_UNIT (§2.1.4's grammar list).
FUNCTION_NAMES = frozenset("""
    ABS CEILING DEGREES EXP FLOOR LOG LOG10 MOD PI POWER RADIANS RAND ROUND SQRT TRUNCATE
    ACOS ASIN ATAN ATAN2 COS COT SIN TAN
    AREA BOX CENTROID CIRCLE CONTAINS COORD1 COORD2 COORDSYS DISTANCE INTERSECTS POINT POLYGON
    REGION
    AVG COUNT MAX MIN SUM LOWER UPPER CAST COALESCE IN_UNIT
""".split())

# <cast_target>: upper-cased after AS inside CAST( ... ), where they cannot be an alias.
TYPE_NAMES = frozenset("""
    SMALLINT INTEGER BIGINT REAL DOUBLE PRECISION CHAR VARCHAR TIMESTAMP POINT CIRCLE POLYGON
""".split())

# Warnings: reasons a cached answer may differ from a re-run (ADQL 2.1 §2.2: "The order of the
# rows MAY be arbitrary unless an ORDER BY clause is specified"; RAND() is random by definition).
WARN_TOP = "TOP without ORDER BY: the service chooses which rows come back"
WARN_OFFSET = "OFFSET without ORDER BY: the service chooses which rows are skipped"
WARN_RAND = "RAND(): random values differ on every run"

_PARSER_LIMIT = 200_000  # characters; longer queries (huge IN lists) skip sqlglot, use heuristics

# --- tokenizer ------------------------------------------------------------------------------
# One pattern, tried in order at each position (the order is the rule):
_LEXER = re.compile(r"""
  (?P<space>[ \t\n\r\f\v]+)
    # ASCII separators only: a no-break space pasted from a web page is no separator to a service.
| (?P<comment>--[^\n\r]*)
    # ADQL 2.1 Appendix A <comment>: '--' [more '-'] then anything up to a newline.
| (?P<string>'[^']*(?:''[^']*)*+')
    # §2.1.8 <character_string_literal>; '' inside is a <quote_symbol>.  Possessive: no
    # backtracking into a shorter literal.
| (?P<quoted>"[^"]*(?:""[^"]*)*+")
    # §2.1.6 escape syntax, <delimited_identifier>; "" inside is a <double_quote_symbol>.
| (?P<open>['"].*)
    # an unterminated literal or delimited identifier swallows the rest: fallback.
| (?P<number>0[xX][0-9a-fA-F]+|(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?)
    # §2.1.8: <unsigned_hexadecimal> 0x..., <exact_numeric_literal> 1, 1., 1.5, .5, and
    # <approximate_numeric_literal> <mantissa>E<exponent>.
| (?P<word>[A-Za-z_][A-Za-z0-9_]*)
    # §2.1.5 <regular_identifier> and keywords: Latin letters, digits, underscores.  A leading
    # underscore is accepted too (kept as written): a wider token is always safe.
| (?P<op><>|!=|<=|>=|\|\||::|/\*|\*/|[%()*+,\-./:;<=>&?^~|])
    # §2.1.1 special characters; multi-character operators from Appendix A (<>, !=, <=, >=, ||).
    # Ours, not ADQL: '::', '/*' and '*/' stay whole, so that a service passing them on to a
    # database (cast, block comment) never shares a key with a spaced-out spelling.
    # Common practice, no source.
| (?P<bad>.)
    # anything else is not ADQL outside literals (§2.1.1; '!' only in '!='): fallback.
""", re.VERBOSE | re.DOTALL)

_WORD_KINDS = frozenset({"word", "number", "string", "quoted", "glued"})


class _Token(NamedTuple):
    kind: str      # word, number, string, quoted, op, glued (or open / bad: not ADQL)
    text: str      # exactly as written
    gap: bool      # whitespace or a comment came before it


def _tokenize(adql: str) -> tuple[list[_Token], list[str]]:
    """Split ADQL into tokens; never raises.  Returns (tokens, problems); problems -> fallback."""
    tokens: list[_Token] = []
    problems: list[str] = []
    gap = False
    for m in _LEXER.finditer(adql):
        kind = m.lastgroup
        if kind in ("space", "comment"):
            gap = True
            continue
        if kind == "open":
            problems.append(f"unterminated {m.group()[0]}...{m.group()[0]} at offset {m.start()}")
        elif kind == "bad":
            problems.append(f"character {m.group()!r} at offset {m.start()} is not ADQL")
        tokens.append(_Token(kind, m.group(), gap))
        gap = False
    return _glue(tokens), problems


def _glue(tokens: list[_Token]) -> list[_Token]:
    """Join word-like tokens that touch (``1abc``, ``E'x'``, ``'a'"b"``) into one verbatim token.

    Joining tokens with a space must never merge two inputs a service reads differently; where
    no ADQL token boundary exists without a separator, keep the touching spelling whole.
    """
    out: list[_Token] = []
    for t in tokens:
        if out and not t.gap and t.kind in _WORD_KINDS and out[-1].kind in _WORD_KINDS:
            prev = out.pop()
            t = _Token("glued", prev.text + t.text, prev.gap)
        out.append(t)
    return out


def _canonical_words(tokens: list[_Token]) -> list[str]:
    """The canonical spelling of each token: keywords and function names upper-cased."""
    words: list[str] = []
    cast_parens: list[bool] = []   # one entry per open '(': was it opened by CAST?
    for i, t in enumerate(tokens):
        text = t.text
        if t.kind == "op":
            if text == "(":
                cast_parens.append(i > 0 and tokens[i - 1].kind == "word"
                                   and tokens[i - 1].text.upper() == "CAST")
            elif text == ")" and cast_parens:
                cast_parens.pop()
        elif t.kind == "word":
            upper = text.upper()
            prev = tokens[i - 1] if i > 0 else None
            nxt = tokens[i + 1] if i + 1 < len(tokens) else None
            after_dot = prev is not None and prev.text == "."
            before_dot = nxt is not None and nxt.text == "."
            after_as = prev is not None and prev.kind == "word" and prev.text.upper() == "AS"
            in_cast = bool(cast_parens) and cast_parens[-1]
            after_double = prev is not None and prev.kind == "word" and prev.text.upper() == "DOUBLE"
            if after_dot or before_dot:
                pass                                   # part of a qualified name
            elif in_cast and upper in TYPE_NAMES and (after_as or after_double):
                text = upper                           # CAST(x AS double precision)
            elif after_as:
                pass                                   # an alias, as spelled
            elif nxt is not None and nxt.text == "(" and upper in FUNCTION_NAMES:
                text = upper
            elif upper in GRAMMAR_KEYWORDS:
                text = upper
        words.append(text)
    return words


# --- the canonical form -----------------------------------------------------------------------

@dataclass(frozen=True)
class Canonical:
    """A query's canonical ADQL, whether it could be tokenized, and what we learnt reading it."""

    text: str                    # canonical ADQL, or the exact input when tokenizing failed
    parsed: bool                 # False -> the exact input is used (fallback)
    warnings: tuple[str, ...]    # reasons a cached answer may differ from a re-run
    tables: tuple[str, ...]      # tables the query reads, as spelled (for provenance)


@functools.lru_cache(maxsize=4096)
def canonical_text(adql: str) -> tuple[str, bool]:
    """(canonical text, parsed) from the tokenizer alone: all the key needs, and cheap.

    ``parsed`` is False when the text is not lexically ADQL; the text is then the exact input.
    """
    if not isinstance(adql, str):
        raise TypeError(f"ADQL must be a str, not {type(adql).__name__}")
    tokens, problems = _tokenize(adql)
    if problems or not tokens:
        return adql, False
    return " ".join(_canonical_words(tokens)), True


@functools.lru_cache(maxsize=2048)
def canonical_adql(adql: str) -> Canonical:
    """Canonical ADQL of ``adql``; never raises on any text (a notebook re-run hits the cache).

    Adds what a real parser tells about the query (tables read, reasons it is not
    repeatable) to :func:`canonical_text`; that parse costs far more than the key does.
    """
    text, parsed = canonical_text(adql)    # tokenized there (and cached for the key)
    read = _read_with_parser(text) if parsed else None
    if read is not None:
        warnings, tables = read
        return Canonical(text, True, warnings, tables)
    # Only a query the parser cannot read is tokenized again, for the heuristics.
    tokens, _ = _tokenize(adql)
    return Canonical(text if parsed else adql, parsed, _heuristic_warnings(tokens),
                     _heuristic_tables(tokens))


def _read_with_parser(text: str) -> tuple[tuple[str, ...], tuple[str, ...]] | None:
    """Warnings and tables from sqlglot's tree, or None when it cannot read the text as a query."""
    if len(text) > _PARSER_LIMIT:
        return None
    try:
        tree = sqlglot.parse_one(text, read="tsql")   # T-SQL reads TOP as ADQL writes it
    except Exception:                                   # ParseError, TokenError, RecursionError...
        return None
    if not isinstance(tree, exp.Query):
        return None
    warnings: list[str] = []
    for node in tree.walk():
        if isinstance(node, exp.Query) and not node.args.get("order"):
            if node.args.get("limit") is not None:
                warnings.append(WARN_TOP)
            if node.args.get("offset") is not None:
                warnings.append(WARN_OFFSET)
        if isinstance(node, exp.Rand) or (isinstance(node, exp.Anonymous)
                                          and str(node.this).upper() == "RAND"):
            warnings.append(WARN_RAND)
    ctes = {_fold(cte.args["alias"].this) for cte in tree.find_all(exp.CTE)
            if cte.args.get("alias") is not None}
    tables: list[str] = []
    for table in tree.find_all(exp.Table, bfs=False):
        parts = [p for p in table.parts if isinstance(p, exp.Identifier)]
        if not parts:
            continue
        if len(parts) == 1 and _fold(parts[0]) in ctes:
            continue
        tables.append(".".join(_spell(p) for p in parts))
    return _unique(warnings), _unique(tables)


def _spell(ident: exp.Identifier) -> str:
    """An identifier as the user wrote it (sqlglot keeps names as written, minus the quotes)."""
    name = ident.this
    return '"' + name.replace('"', '""') + '"' if ident.args.get("quoted") else name


def _fold(ident: exp.Identifier) -> str:
    """ADQL 2.1 §2.1.7: regular identifiers compare case-insensitively, delimited ones exactly."""
    return ident.this if ident.args.get("quoted") else ident.this.upper()


def _unique(items: list[str]) -> tuple[str, ...]:
    return tuple(dict.fromkeys(items))


def _is(t: _Token, word: str) -> bool:
    return t.kind == "word" and t.text.upper() == word


def _heuristic_warnings(tokens: list[_Token]) -> tuple[str, ...]:
    """Repeatability warnings from the token stream alone (when the parser cannot help)."""
    ordered = any(_is(a, "ORDER") and _is(b, "BY") for a, b in zip(tokens, tokens[1:]))
    warnings = []
    if not ordered and any(_is(t, "TOP") for t in tokens):
        warnings.append(WARN_TOP)
    if not ordered and any(_is(t, "OFFSET") for t in tokens):
        warnings.append(WARN_OFFSET)
    if any(_is(a, "RAND") and b.text == "(" for a, b in zip(tokens, tokens[1:])):
        warnings.append(WARN_RAND)
    return tuple(warnings)


_CLAUSE_END = frozenset({"WHERE", "GROUP", "HAVING", "ORDER", "OFFSET", "UNION", "EXCEPT",
                         "INTERSECT", "ON", "USING"})


def _heuristic_tables(tokens: list[_Token]) -> tuple[str, ...]:
    """Names after FROM / JOIN / a FROM-list comma, from the token stream alone."""
    ctes = {tokens[i].text.upper() if tokens[i].kind == "word" else tokens[i].text
            for i in range(len(tokens) - 2)
            if tokens[i].kind in ("word", "quoted") and _is(tokens[i + 1], "AS")
            and tokens[i + 2].text == "("}
    tables: list[str] = []
    depth, from_depths = 0, []          # paren depths at which a FROM list is open
    expect_name = False
    i = 0
    while i < len(tokens):
        t = tokens[i]
        if expect_name and t.kind in ("word", "quoted"):
            parts = [t.text]
            while i + 2 < len(tokens) and tokens[i + 1].text == "." \
                    and tokens[i + 2].kind in ("word", "quoted"):
                parts.append(tokens[i + 2].text)
                i += 2
            name = ".".join(parts)
            if not (len(parts) == 1 and (name.upper() if t.kind == "word" else name) in ctes):
                tables.append(name)
            expect_name = False
        elif t.text == "(":
            depth += 1
            expect_name = False
        elif t.text == ")":
            depth -= 1
            while from_depths and from_depths[-1] > depth:
                from_depths.pop()
        elif _is(t, "FROM"):
            from_depths.append(depth)
            expect_name = True
        elif _is(t, "JOIN"):
            expect_name = True
        elif t.text == "," and from_depths and from_depths[-1] == depth:
            expect_name = True
        elif t.kind == "word" and t.text.upper() in _CLAUSE_END:
            if from_depths and from_depths[-1] == depth:
                from_depths.pop()
        i += 1
    return _unique(tables)


# --- the service and the key --------------------------------------------------------------------

_DEFAULT_PORTS = {"http": 80, "https": 443}


def service_id(url: str) -> str:
    """The normalised base URL that names a TAP service in keys and records.

    Scheme and host lower-cased (RFC 3986 §6.2.2.1), default port dropped (§6.2.3; section
    numbers from memory), no trailing '/', no query or fragment.  User info
    (``user:password@``) is dropped: it is a credential, and who asks is the key's ``scope``,
    never the secret.
    """
    if not isinstance(url, str):
        raise BadServiceURL(f"the service URL must be text, not {type(url).__name__}")
    text = url.strip()
    try:
        parts = urlsplit(text)
        port = parts.port
    except ValueError as exc:
        shown = _without_secrets(text)
        raise BadServiceURL(f"bad service URL {shown!r}: {exc}", service=shown) from None
    scheme = parts.scheme.lower()
    host = (parts.hostname or "").lower()
    if scheme not in _DEFAULT_PORTS or not host:
        shown = _without_secrets(text)
        raise BadServiceURL(f"not an http(s) URL with a host: {shown!r}", service=shown)
    if ":" in host:                                 # IPv6 literal goes back into brackets
        host = f"[{host}]"
    netloc = host if port in (None, _DEFAULT_PORTS[scheme]) else f"{host}:{port}"
    return f"{scheme}://{netloc}{parts.path.rstrip('/')}"


def _without_secrets(text: str) -> str:
    """A URL as it may be shown in a message: no ``user:password@``, no query or fragment
    (which may hold a key), even when the URL is too broken for urlsplit."""
    text = re.sub(r"(?<=//)[^/?#]*@", "", text)  # up to the last @ of the authority
    return re.split(r"[?#]", text, maxsplit=1)[0]


_SHA256_HEX = re.compile(r"[0-9a-fA-F]{64}")


def query_key(service: str, adql: str, *, maxrec: int | None, fmt: str,
              uploads: Mapping[str, str] | None = None, scope: str = "anonymous") -> str:
    """The cache key: sha256 hex of a versioned JSON record of everything that shapes the answer.

    ``uploads`` maps each upload name to the sha256 hex of its content.  Upload names are kept
    exactly as given, case included: the query may name the table as a delimited identifier
    (``TAP_UPLOAD."Mine"``, case-sensitive by ADQL 2.1 §2.1.7), and services differ in how they
    fold the names they create, so folding could share a key between different answers.
    """
    if maxrec is not None:
        if isinstance(maxrec, bool):
            raise TypeError("maxrec must be an integer or None")
        maxrec = operator.index(maxrec)
        if maxrec < 0:
            raise ValueError(f"maxrec must be >= 0, got {maxrec}")   # TAP 1.1 MAXREC (from memory)
    if not isinstance(fmt, str) or not fmt.strip():
        raise ValueError("fmt must be a non-empty response format, e.g. 'votable'")
    if not isinstance(scope, str) or not scope:
        raise ValueError("scope must be a non-empty name ('anonymous' or an identity)")
    digests: dict[str, str] = {}
    for name, digest in (uploads or {}).items():
        if not isinstance(name, str) or not name:
            raise UploadInvalid(f"upload name must be non-empty text, got {name!r}")
        if not isinstance(digest, str) or not _SHA256_HEX.fullmatch(digest):
            raise UploadInvalid(f"upload {name!r}: expected the sha256 hex digest of its content")
        digests[name] = digest.lower()
    text, parsed = canonical_text(adql)
    record = {
        "v": KEY_VERSION,
        "service": service_id(service),
        "adql": text,
        "exact": not parsed,             # a fallback text never equals a canonical one
        "maxrec": maxrec,                # JSON null is distinct from every number
        "format": fmt.strip().lower(),
        "uploads": digests,
        "scope": scope,
    }
    blob = json.dumps(record, sort_keys=True, ensure_ascii=False, separators=(",", ":"))
    return hashlib.sha256(blob.encode("utf-8")).hexdigest()
